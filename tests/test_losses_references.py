"""The premises of NNL501/502 and NNL601-603, checked against numpy, scipy and PyTorch."""
import math
import re

import numpy as np
import pytest
from scipy import optimize, special

from nnlint.analysis.api.losses import KERAS_EPSILON
from nnlint.analysis.losses import (
    double_sigmoid_range, double_softmax_ceiling, double_softmax_floor, keras_clip_floor_loss,
)
from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import check_file
from tests.conftest import FIXTURES

RNG = np.random.default_rng(20261202)  # fixed seed: the checks are deterministic


def findings(relative: str) -> dict[int, str]:
    path = FIXTURES / "rules" / relative
    settings = with_default_ignores(Settings(root=str(path.parent)))
    result = check_file(str(path), settings, ProjectIndex(settings))
    return {finding.line: finding.message for finding in result.findings}


def fixture_line(relative: str, text: str) -> int:
    lines = (FIXTURES / "rules" / relative).read_text().splitlines()
    return next(number for number, line in enumerate(lines, start=1) if text in line)


def fixture_constant(relative: str, name: str) -> int:
    source = (FIXTURES / "rules" / relative).read_text()
    return int(re.search(rf"^{name} = (\d+)$", source, re.M).group(1))


# -- NNL501: a second softmax / sigmoid --------------------------------------------------------
@pytest.mark.parametrize("classes", [2, 4, 5, 10, 1000])
def test_second_softmax_never_exceeds_the_ceiling(classes):
    # Probabilities lie in [0, 1]; scipy's softmax of them, over many random draws and the
    # extreme one-hot vector, never gives a class more than e/(e+C-1).
    draws = special.softmax(RNG.normal(scale=6.0, size=(2000, classes)), axis=-1)
    one_hot = np.eye(classes)[:1]
    again = special.softmax(np.vstack([draws, one_hot]), axis=-1)
    ceiling = np.e / (np.e + classes - 1)  # softmax of [1, 0, ..., 0], computed by hand
    assert again.max() <= ceiling + 1e-12
    assert again[-1, 0] == pytest.approx(ceiling, rel=1e-12)  # attained by a one-hot input
    assert double_softmax_ceiling(classes) == pytest.approx(ceiling, rel=1e-12)
    assert double_softmax_floor(classes) == pytest.approx(-np.log(ceiling), rel=1e-12)


def test_the_issue_example_for_ten_classes():
    # For 10 classes: e/(e+9) = 0.232 and -log of it = 1.46 (numpy).
    assert round(float(np.e / (np.e + 9)), 3) == 0.232
    assert round(float(-np.log(np.e / (np.e + 9))), 2) == 1.46


def test_messages_carry_the_bound_of_the_fixtures_class_count():
    relative = "NNL501/bad_torch_probabilities.py"
    classes = fixture_constant(relative, "ROUTE_CLASSES")
    ceiling = float(special.softmax(np.eye(classes)[0])[0])  # scipy, independently
    message = findings(relative)[fixture_line(relative, "loss = criterion(probs, routes)")]
    assert f"p <= {ceiling:.3f} over {classes} classes" in message
    assert f"loss >= {-np.log(ceiling):.2f}" in message
    keras = "NNL501/bad_keras_tf_optax.py"
    delay_classes = fixture_constant(keras, "DELAY_CLASSES")
    delay_ceiling = float(special.softmax(np.eye(delay_classes)[0])[0])
    message = findings(keras)[fixture_line(keras, "SparseCategoricalCrossentropy(from_logits")]
    assert f"p <= {delay_ceiling:.3f} over {delay_classes} classes" in message


def test_class_count_crosses_modules_through_summaries():
    # RegionNet's head has len(ROUTE_REGIONS) outputs, in another module of the tree.
    source = (FIXTURES / "rules" / "NNL501" / "good_route_models.py").read_text()
    regions = re.search(r"^ROUTE_REGIONS = \((.*)\)$", source, re.M).group(1).count(",") + 1
    ceiling = float(special.softmax(np.eye(regions)[0])[0])
    relative = "NNL501/bad_cross_module.py"
    messages = findings(relative)
    for text in ("loss = criterion(probs, regions)", "F.cross_entropy(direct(features)"):
        message = messages[fixture_line(relative, text)]
        assert f"p <= {ceiling:.3f} over {regions} classes" in message, message


def _cross_entropy(scores: np.ndarray, target: int, twice: bool) -> float:
    probs = special.softmax(scores)
    if twice:
        probs = special.softmax(probs)
    return float(-np.log(probs[target]))  # noqa: NNL301 (the hazard, on purpose)


def _gradient(scores: np.ndarray, target: int, twice: bool) -> np.ndarray:
    """Analytic gradient of the cross-entropy with respect to the scores."""
    one_hot = np.eye(len(scores))[target]
    probs = special.softmax(scores)
    if not twice:
        return probs - one_hot  # d CE(softmax(z)) / dz
    jacobian = np.diag(probs) - np.outer(probs, probs)  # d softmax(z) / dz (symmetric)
    return jacobian @ (special.softmax(probs) - one_hot)


@pytest.mark.parametrize("target", [0, 3])
def test_second_softmax_shrinks_the_gradient_of_a_confident_prediction(target):
    scores = np.array([7.0, 0.5, -1.0, 0.0, 1.5])  # confident in class 0 (p = 0.99)
    for twice in (False, True):
        numeric = optimize.approx_fprime(scores, _cross_entropy, 1e-7, target, twice)
        assert np.allclose(numeric, _gradient(scores, target, twice), atol=1e-5)
    single = np.linalg.norm(_gradient(scores, target, twice=False))
    double = np.linalg.norm(_gradient(scores, target, twice=True))
    assert double < single
    if target != 0:  # a confident mistake: the single loss pushes hard, the double barely
        assert double < 0.05 * single


def test_second_sigmoid_range():
    probabilities = np.linspace(0.0, 1.0, 1001)
    again = special.expit(probabilities)
    low, high = double_sigmoid_range()
    assert again.min() == pytest.approx(low) and again.max() == pytest.approx(high)
    assert round(high, 3) == 0.731


def test_keras_clip_costs_sixteen_nats():
    assert keras_clip_floor_loss() == pytest.approx(-np.log(np.float64(KERAS_EPSILON)))
    assert round(keras_clip_floor_loss(), 1) == 16.1


# -- PyTorch: what the rules claim happens -------------------------------------------------------
def test_two_backward_passes_without_reset_add_up():
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    layer = torch.nn.Linear(4, 3)
    first, second = torch.randn(8, 4), torch.randn(8, 4)
    expected = []
    for batch in (first, second):
        layer.zero_grad()
        layer(batch).square().mean().backward()
        expected.append(layer.weight.grad.clone())
    layer.zero_grad()
    layer(first).square().mean().backward()
    layer(second).square().mean().backward()  # no zero_grad in between (NNL601)
    assert torch.allclose(layer.weight.grad, expected[0] + expected[1], atol=1e-6)
    assert not torch.allclose(layer.weight.grad, expected[1], atol=1e-6)


def test_step_right_after_zero_grad_changes_nothing():
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    layer = torch.nn.Linear(4, 3)
    optimizer = torch.optim.SGD(layer.parameters(), lr=0.1, momentum=0.9)
    before = layer.weight.detach().clone()
    optimizer.zero_grad()  # set_to_none=True by default (PyTorch >= 2.0)
    optimizer.step()  # NNL603: the step sees no gradient
    layer(torch.randn(8, 4)).sum().backward()
    assert torch.equal(layer.weight.detach(), before)


def test_bce_loss_raises_on_raw_scores():
    torch = pytest.importorskip("torch")
    scores = torch.tensor([2.5, -1.0, 0.3])
    labels = torch.tensor([1.0, 0.0, 1.0])
    # PyTorch (CPU) refuses: "all elements of input should be between 0 and 1".
    with pytest.raises(RuntimeError, match="between 0 and 1"):
        torch.nn.BCELoss()(scores, labels)
    with pytest.raises(RuntimeError):
        torch.nn.functional.binary_cross_entropy(scores, labels)
    # Scores that happen to lie in [0, 1] pass silently, with the wrong loss.
    inside = torch.tensor([0.3, 0.9])
    wrong = torch.nn.BCELoss()(inside, labels[:2])
    right = torch.nn.BCEWithLogitsLoss()(inside, labels[:2])
    assert torch.isfinite(wrong) and not torch.isclose(wrong, right)


def test_nll_loss_of_raw_scores_is_unbounded_below():
    torch = pytest.importorskip("torch")
    target = torch.tensor([0])
    losses = [torch.nn.functional.nll_loss(torch.tensor([[scale, -scale]]), target).item()
              for scale in (1.0, 10.0, 1000.0)]
    assert losses == [-1.0, -10.0, -1000.0]  # -score[target]: lower without limit


def _graph_size(tensor) -> int:
    seen, stack = set(), [tensor.grad_fn]
    while stack:
        node = stack.pop()
        if node is None or node in seen:
            continue
        seen.add(node)
        stack.extend(child for child, _ in node.next_functions)
    return len(seen)


def test_tensor_total_keeps_a_growing_graph_and_item_keeps_none():
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    layer = torch.nn.Linear(4, 1)
    total, number, sizes = 0.0, 0.0, []
    for _ in range(6):
        loss = layer(torch.randn(8, 4)).square().mean()
        loss.backward()
        total += loss  # NNL602
        number += loss.item()
        sizes.append(_graph_size(total))
    # Each iteration adds the same number of autograd nodes to what `total` keeps alive.
    steps = np.diff(sizes)
    assert steps.min() > 0 and len(set(steps.tolist())) == 1
    assert isinstance(number, float)
    assert math.isclose(total.item(), number, rel_tol=1e-6)
