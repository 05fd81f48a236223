"""`nnlint fix` for NNL102, NNL602 and NNL501: exact rewrites, idempotency, what stays unfixed.

Reference checks run PyTorch (CPU) when it is installed and skip cleanly otherwise: they show
that what the fixed code computes is what the author meant.
"""
import textwrap

import pytest

from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text
from nnlint.fix import fix_text

SETTINGS = with_default_ignores(Settings())

TORCH_PRELUDE = "import torch\nimport torch.nn.functional as F\nfrom torch import nn\n"
TF_PRELUDE = "import tensorflow as tf\nfrom tensorflow import keras\n"


def _fixed(source: str) -> str:
    fixed, _, _ = fix_text(source, "x.py", SETTINGS)
    return fixed


def _findings(source: str, code: str) -> list[tuple[int, bool]]:
    """(line, fixable) of each finding of `code`."""
    findings = lint_text(source, "x.py", SETTINGS).findings
    return [(finding.line, finding.fixable) for finding in findings if finding.code == code]


def _assert_fixed_once(source: str, expected: str, code: str) -> None:
    """The fix gives exactly `expected`, leaves no fixable `code`, and a second run is a no-op."""
    fixed = _fixed(source)
    assert fixed == expected
    assert all(not fixable for _, fixable in _findings(fixed, code))
    assert _fixed(fixed) == fixed


def _assert_reported_not_fixable(source: str, code: str) -> None:
    found = _findings(source, code)
    assert found and all(not fixable for _, fixable in found)
    assert _fixed(source) == source


# -- NNL102: training=self.training ----------------------------------------------------------------
def _module(body: str, first: str = "self") -> str:
    return TORCH_PRELUDE + (
        "\n\nclass Head(nn.Module):\n"
        f"    def forward({first}, features):\n" + textwrap.indent(textwrap.dedent(body), " " * 8))


@pytest.mark.parametrize("call, expected", [
    ("F.dropout(features, p=0.3)", "F.dropout(features, p=0.3, training=self.training)"),
    ("F.dropout(features, 0.3,)", "F.dropout(features, 0.3, training=self.training,)"),
    ("F.dropout2d(features)", "F.dropout2d(features, training=self.training)"),
    ("F.dropout(features , p=0.3 )", "F.dropout(features , p=0.3, training=self.training )"),
    ("F.dropout(features, inplace=False)",
     "F.dropout(features, inplace=False, training=self.training)"),
])
def test_dropout_gets_the_module_mode_after_its_last_argument(call, expected):
    source = _module(f"return {call}\n")
    _assert_fixed_once(source, source.replace(call, expected), "NNL102")


def test_a_multiline_dropout_call_keeps_its_comment_and_line_count():
    source = _module("return F.dropout(\n    features,\n    p=0.3,  # belt noise\n)\n")
    expected = source.replace("p=0.3,  # belt noise",
                              "p=0.3, training=self.training,  # belt noise")
    _assert_fixed_once(source, expected, "NNL102")


def test_the_instance_is_reached_by_the_methods_own_first_parameter():
    source = _module("return F.dropout(features, 0.2)\n", first="module")
    _assert_fixed_once(source, source.replace("0.2)", "0.2, training=module.training)"), "NNL102")


def test_a_closure_inside_the_method_reads_the_methods_instance():
    source = _module("def block(h):\n    return F.dropout(h, 0.2)\nreturn block(features)\n")
    _assert_fixed_once(source, source.replace("0.2)", "0.2, training=self.training)"), "NNL102")


@pytest.mark.parametrize("body", [
    # an explicit True may keep dropout on at prediction on purpose
    "return F.dropout(features, 0.2, training=True)\n",
    "return F.dropout(features, 0.2, True)\n",
    # the name `self` means something else where the call is
    "def block(self):\n    return F.dropout(self, 0.2)\nreturn block(features)\n",
    "return (lambda self: F.dropout(self, 0.2))(features)\n",
    "self = features\nreturn F.dropout(features, 0.2)\n",
])
def test_dropout_findings_without_a_certain_rewrite_stay_unfixed(body):
    _assert_reported_not_fixable(_module(body), "NNL102")


def test_fixed_dropout_is_off_in_eval_mode_and_on_in_training_mode():
    torch = pytest.importorskip("torch")  # reference: PyTorch's own F.dropout and Module.eval
    source = _module("return F.dropout(features, p=0.5)\n")
    fixed = _fixed(source)
    namespace: dict = {}
    exec(compile(fixed, "fixed.py", "exec"), namespace)  # noqa: S102 - our own test source
    head = namespace["Head"]()
    features = torch.ones(4, 64)
    head.eval()
    assert torch.equal(head(features), features)
    head.train()
    torch.manual_seed(0)
    dropped = head(features)
    assert (dropped == 0).any() and torch.allclose(dropped[dropped != 0], torch.tensor(2.0))
    original: dict = {}
    exec(compile(source, "original.py", "exec"), original)  # noqa: S102
    still_on = original["Head"]().eval()
    assert (still_on(features) == 0).any()  # the bug the fix removes


# -- NNL602: .item() -------------------------------------------------------------------------------
def _loop(accumulate: str, after: str, backward: str = "loss.backward()",
          start: str = "total = 0.0") -> str:
    """A training function; `after` runs once the loop ends (its lines indented by 4)."""
    return TORCH_PRELUDE + (
        "\n\ndef fit(model, loader, optimizer, scaler):\n"
        f"    {start}\n"
        "    for crops, grades in loader:\n"
        "        optimizer.zero_grad()\n"
        "        loss = F.cross_entropy(model(crops), grades)\n"
        f"        {backward}\n"
        "        optimizer.step()\n"
        f"        {accumulate}\n"
        f"    {after}\n")


@pytest.mark.parametrize("accumulate, expected, after", [
    ("total += loss", "total += loss.item()", 'print(f"{total / len(loader):.3f}")'),
    ("total = total + loss * crops.size(0)", "total = total + (loss * crops.size(0)).item()",
     "print(total)"),
    ("total = loss / len(loader) + total", "total = (loss / len(loader)).item() + total",
     "print('%.3f' % total)"),
    ("total += loss.mean()", "total += loss.mean().item()", "best = total < 1.0"),
])
def test_a_scalar_loss_summed_into_a_printed_total_gets_item(accumulate, expected, after):
    source = _loop(accumulate, after)
    _assert_fixed_once(source, source.replace(accumulate, expected), "NNL602")


def test_a_total_averaged_into_another_name_that_is_only_printed_gets_item():
    source = _loop("total += loss", 'average = total / len(loader)\n    print(f"{average:.3f}")')
    _assert_fixed_once(source, source.replace("total += loss", "total += loss.item()"), "NNL602")


def test_a_loss_list_read_by_len_sum_and_max_gets_item():
    source = _loop("history.append(loss)", "print(sum(history) / len(history), max(history))",
                   start="history = []")
    expected = source.replace("history.append(loss)", "history.append(loss.item())")
    _assert_fixed_once(source, expected, "NNL602")


def test_a_grad_scaler_backward_also_proves_the_loss_is_one_element():
    source = _loop("total += loss", "print(total)", backward="scaler.scale(loss).backward()")
    _assert_fixed_once(source, source.replace("total += loss", "total += loss.item()"), "NNL602")


@pytest.mark.parametrize("accumulate, after, backward, start", [
    # the total leaves the function: a caller may use it as a tensor
    ("total += loss", "return total / len(loader)", "loss.backward()", "total = 0.0"),
    # read as a tensor afterwards
    ("total += loss", "print(total.item())", "loss.backward()", "total = 0.0"),
    ("total += loss", "log_total(total)", "loss.backward()", "total = 0.0"),
    ("total += loss", "summary = total.sum()", "loss.backward()", "total = 0.0"),
    # a name computed from the total leaves the function, or feeds a further name
    ("total += loss", "average = total / 3\n    return average", "loss.backward()",
     "total = 0.0"),
    ("total += loss", "average = total / 3\n    doubled = average * 2\n    print(doubled)",
     "loss.backward()", "total = 0.0"),
    ("history.append(loss)", "print(torch.stack(history).mean())", "loss.backward()",
     "history = []"),
    # the total starts as a tensor, not a number
    ("total += loss", "print(total)", "loss.backward()", "total = torch.zeros(())"),
    # `loss` may hold many elements: backward ran on its mean, or took a gradient
    ("total += loss", "print(total)", "loss.mean().backward()", "total = 0.0"),
    ("total += loss", "print(total)", "loss.backward(torch.ones_like(loss))", "total = 0.0"),
    # a loss scaled by an unknown name may be a tensor of many elements
    ("total += loss * weights", "print(total)", "loss.backward()", "total = 0.0"),
])
def test_loss_totals_without_a_certain_rewrite_stay_unfixed(accumulate, after, backward, start):
    source = _loop(accumulate, after, backward, start).replace(
        "fit(model,", "fit(weights, model,")
    _assert_reported_not_fixable(source, "NNL602")


def test_an_attribute_total_is_not_rewritten():
    source = TORCH_PRELUDE + textwrap.dedent("""\

        class Trainer:
            def fit(self, model, loader, optimizer):
                self.running = 0.0
                for crops, grades in loader:
                    optimizer.zero_grad()
                    loss = F.cross_entropy(model(crops), grades)
                    loss.backward()
                    optimizer.step()
                    self.running += loss
        """)
    _assert_reported_not_fixable(source, "NNL602")


def test_files_that_also_use_tensorflow_get_no_item_rewrite():
    source = "import tensorflow as tf\n" + _loop("total += loss", "print(total)")
    _assert_reported_not_fixable(source, "NNL602")


def test_item_gives_a_python_float_without_history_and_the_same_total():
    torch = pytest.importorskip("torch")  # reference: torch.Tensor.item and autograd
    weight = torch.tensor([0.5, -0.25], requires_grad=True)
    as_tensor, as_number = 0.0, 0.0
    for step in range(3):
        loss = ((weight * (step + 1)) ** 2).sum()
        loss.backward()
        as_tensor += loss
        as_number += loss.item()
    assert as_tensor.grad_fn is not None  # the bug: the total holds every step's graph
    assert type(as_number) is float
    assert as_number == pytest.approx(as_tensor.item(), rel=1e-6)  # float32 rounding only


# -- NNL501: remove the inline softmax/sigmoid ----------------------------------------------
def _torch_loss(expression: str) -> str:
    return TORCH_PRELUDE + (
        "\n\ndef grade_loss(scores, grades, seal_scores, seals, temperature, criterion):\n"
        f"    return {expression}\n")


@pytest.mark.parametrize("expression, expected", [
    ("F.cross_entropy(F.softmax(scores, dim=1), grades)", "F.cross_entropy(scores, grades)"),
    ("nn.CrossEntropyLoss()(torch.softmax(scores, 1), grades)",
     "nn.CrossEntropyLoss()(scores, grades)"),
    ("F.cross_entropy(scores.softmax(1), grades)", "F.cross_entropy(scores, grades)"),
    ("F.cross_entropy(input=torch.special.softmax(scores, dim=1), target=grades)",
     "F.cross_entropy(input=scores, target=grades)"),
    ("F.cross_entropy(F.softmax(scores / temperature, dim=1), grades)",
     "F.cross_entropy(scores / temperature, grades)"),
    ("F.cross_entropy(nn.Softmax(dim=1)(scores), grades)", "F.cross_entropy(scores, grades)"),
    ("F.binary_cross_entropy_with_logits(torch.sigmoid(seal_scores), seals)",
     "F.binary_cross_entropy_with_logits(seal_scores, seals)"),
    ("nn.BCEWithLogitsLoss(pos_weight=temperature)(seal_scores.sigmoid(), seals)",
     "nn.BCEWithLogitsLoss(pos_weight=temperature)(seal_scores, seals)"),
])
def test_an_inline_torch_activation_is_removed(expression, expected):
    _assert_fixed_once(_torch_loss(expression), _torch_loss(expected), "NNL501")


@pytest.mark.parametrize("expression", [
    # dim -1 is the class axis only for 2-D scores; without dim the axis depends on the rank
    "F.cross_entropy(scores.softmax(-1), grades)",
    "F.cross_entropy(F.softmax(scores), grades)",
    "F.cross_entropy(torch.softmax(scores, dim=0), grades)",
    # dtype= changes the arithmetic the loss would do
    "F.cross_entropy(F.softmax(scores, dim=1, dtype=torch.float64), grades)",
    # a sigmoid before a softmax loss is another mistake than a double softmax
    "F.cross_entropy(torch.sigmoid(scores), grades)",
])
def test_inline_torch_activations_without_a_certain_rewrite_stay_unfixed(expression):
    _assert_reported_not_fixable(_torch_loss(expression), "NNL501")


def test_probabilities_held_by_a_name_are_reported_without_a_fix():
    source = TORCH_PRELUDE + (
        "\n\ndef grade_loss(scores, grades):\n"
        "    probs = F.softmax(scores, dim=1)\n"
        "    return F.cross_entropy(probs, grades)\n")
    _assert_reported_not_fixable(source, "NNL501")


def _keras_loss(expression: str) -> str:
    return TF_PRELUDE + (
        "\n\ndef delay_loss(model, routes, delays, late_scores, late):\n"
        "    loss_fn = keras.losses.SparseCategoricalCrossentropy(from_logits=True)\n"
        f"    return {expression}\n")


@pytest.mark.parametrize("expression, expected", [
    ("loss_fn(delays, tf.nn.softmax(model(routes)))", "loss_fn(delays, model(routes))"),
    ("loss_fn(delays, tf.nn.softmax(model(routes), axis=-1))", "loss_fn(delays, model(routes))"),
    ("keras.losses.categorical_crossentropy(delays, tf.nn.softmax(late_scores), "
     "from_logits=True)",
     "keras.losses.categorical_crossentropy(delays, late_scores, from_logits=True)"),
    ("tf.nn.softmax_cross_entropy_with_logits(labels=delays, "
     "logits=tf.nn.softmax(late_scores))",
     "tf.nn.softmax_cross_entropy_with_logits(labels=delays, logits=late_scores)"),
    ("keras.losses.BinaryCrossentropy(from_logits=True)(late, tf.sigmoid(late_scores))",
     "keras.losses.BinaryCrossentropy(from_logits=True)(late, late_scores)"),
])
def test_an_inline_keras_activation_is_removed(expression, expected):
    _assert_fixed_once(_keras_loss(expression), _keras_loss(expected), "NNL501")


@pytest.mark.parametrize("expression", [
    "loss_fn(delays, tf.nn.softmax(model(routes), axis=1))",
    "keras.losses.CategoricalCrossentropy(True, axis=1)(delays, tf.nn.softmax(late_scores))",
    "keras.losses.categorical_crossentropy(delays, tf.nn.softmax(late_scores), True, 0.0, 1)",
    "tf.nn.softmax_cross_entropy_with_logits(delays, tf.nn.softmax(late_scores), 0)",
])
def test_keras_losses_on_another_axis_stay_unfixed(expression):
    _assert_reported_not_fixable(_keras_loss(expression), "NNL501")


def test_removing_the_inline_activation_gives_the_loss_the_author_meant():
    torch = pytest.importorskip("torch")  # reference: torch.nn.functional losses
    functional = torch.nn.functional
    generator = torch.Generator().manual_seed(7)
    scores = torch.randn(6, 5, 3, generator=generator) * 4  # (N, C, d1): classes on dim 1
    grades = torch.randint(0, 5, (6, 3), generator=generator)
    temperature = 2.5
    # the fixed code: cross_entropy of the logits, which applies log_softmax over dim 1
    meant = -torch.log(functional.softmax(scores / temperature, dim=1)).gather(
        1, grades[:, None]).mean()
    fixed = functional.cross_entropy(scores / temperature, grades)
    assert fixed.item() == pytest.approx(meant.item(), rel=1e-5)
    # confident, correct scores: the fixed loss goes to 0, the double softmax the fix removes
    # stays above -log(e / (e + 4)) = 0.904 for 5 classes (NNL501's rationale)
    confident = functional.one_hot(grades, 5).permute(0, 2, 1).float() * 30
    assert functional.cross_entropy(confident, grades).item() < 1e-6
    doubled = functional.cross_entropy(functional.softmax(confident, dim=1), grades)
    assert doubled.item() > 0.904
    seal_scores = torch.randn(8, generator=generator) * 3
    seals = torch.randint(0, 2, (8,), generator=generator).float()
    assert functional.binary_cross_entropy_with_logits(seal_scores, seals).item() == \
        pytest.approx(functional.binary_cross_entropy(torch.sigmoid(seal_scores), seals).item(),
                      rel=1e-5)


def test_the_message_names_the_module_as_the_method_does():
    from nnlint import lint_source

    source = ("import torch.nn.functional as F\nfrom torch import nn\n\n\n"
              "class CropNet(nn.Module):\n    def forward(module, crops):\n"
              "        return F.dropout(crops, 0.2)\n")
    (finding,) = lint_source(source).findings
    assert finding.code == "NNL102" and finding.message.endswith(
        "pass `training=module.training`")
