"""The premises of the mode rules, shown with the real PyTorch (skipped without it)."""
from __future__ import annotations

import pytest

torch = pytest.importorskip("torch")


def grader():
    """A small model holding both mode-dependent layer kinds NNL401 names."""
    torch.manual_seed(0)  # deterministic weights and dropout masks
    return torch.nn.Sequential(torch.nn.Linear(6, 16), torch.nn.BatchNorm1d(16),
                               torch.nn.ReLU(), torch.nn.Dropout(0.5), torch.nn.Linear(16, 3))


def test_same_input_gives_different_outputs_in_train_and_eval_mode():
    # PyTorch documentation, Module.eval: Dropout and BatchNorm behave differently in eval
    model = grader()
    batch = torch.randn(32, 6)
    with torch.no_grad():
        training_output = model(batch)
        model.eval()
        eval_output = model(batch)
        repeated = model(batch)
    assert not torch.allclose(training_output, eval_output)
    assert torch.equal(eval_output, repeated)  # eval mode is deterministic


def test_no_grad_alone_leaves_dropout_active():
    # torch.no_grad stops recording; it does not change the mode (PyTorch documentation)
    dropout = torch.nn.Dropout(0.5)
    with torch.no_grad():
        zeros = (dropout(torch.ones(10_000)) == 0).float().mean().item()
    assert 0.45 < zeros < 0.55  # about p = 0.5 of the units dropped (binomial, n = 10,000)
    assert dropout.training


def test_train_mode_forward_under_no_grad_updates_batch_norm_running_mean():
    norm = torch.nn.BatchNorm1d(4)
    before = norm.running_mean.clone()
    with torch.no_grad():
        norm(torch.randn(64, 4) + 3.0)
    # running_mean moves by momentum 0.1 toward the batch mean 3 (PyTorch BatchNorm1d docs)
    assert not torch.equal(before, norm.running_mean)
    assert torch.allclose(norm.running_mean, torch.full((4,), 0.3), atol=0.1)
    norm.eval()
    frozen = norm.running_mean.clone()
    with torch.no_grad():
        norm(torch.randn(64, 4) + 3.0)
    assert torch.equal(frozen, norm.running_mean)


def test_modules_are_constructed_in_training_mode():
    # the analysis starts every constructed model in TRAIN (PyTorch Module.training)
    assert grader().training and all(layer.training for layer in grader())


def test_eval_mode_persists_until_train_is_called():
    # NNL402's premise: nothing switches back by itself
    model = grader()
    model.eval()
    loss = model(torch.randn(8, 6)).sum()
    loss.backward()
    assert not model.training
    model.train()
    assert model.training


def test_backward_of_a_loss_computed_under_no_grad_raises():
    # NNL405: a tensor made inside no_grad has no graph
    weight = torch.randn(3, requires_grad=True)
    with torch.no_grad():
        loss = (weight * 2).sum()
        with pytest.raises(RuntimeError, match="does not require grad"):
            loss.backward()


def test_backward_of_a_graph_built_before_no_grad_works_inside_it():
    # why NNL405 only reports tensors computed inside the block
    weight = torch.randn(3, requires_grad=True)
    loss = (weight * 2).sum()
    with torch.no_grad():
        loss.backward()
    assert torch.equal(weight.grad, torch.full((3,), 2.0))


def test_enable_grad_inside_no_grad_records_again():
    weight = torch.randn(3, requires_grad=True)
    with torch.no_grad():
        with torch.enable_grad():
            loss = (weight * 3).sum()
        loss.backward()
    assert torch.equal(weight.grad, torch.full((3,), 3.0))


def test_evaluation_without_no_grad_records_a_graph():
    # NNL404's premise: outputs outside no_grad carry a grad_fn (the graph is kept)
    model = grader().eval()
    output = model(torch.randn(4, 6))
    assert output.grad_fn is not None
    with torch.no_grad():
        assert model(torch.randn(4, 6)).grad_fn is None
