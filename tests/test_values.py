"""Value facts: what expressions hold, through names, classes, helpers and modules."""
import textwrap

import libcst as cst
import pytest

from nnlint.analysis.model import ModuleModel
from nnlint.analysis.project import ProjectIndex
from nnlint.analysis.values import Kind, call_result, constant_value, fact_of

PRELUDE = ("import numpy as np\nimport torch\nimport torch.nn.functional as F\n"
           "from torch import nn\n")


def last_value(source: str, path: str = "<string>", project=None):
    """(model, function, expression, statement) of the final `probe = <expr>` line."""
    module = cst.parse_module(PRELUDE + textwrap.dedent(source))
    model = ModuleModel(module, path, project=project)
    for scope_function in [None, *model.functions.values(), *(
            method for info in model.classes.values() for method in info.methods.values())]:
        scope = model.scope_of(scope_function)
        bindings = scope.bindings.get("probe")
        if bindings:
            binding = bindings[-1]
            return model, scope_function, binding.value, binding.statement
    raise AssertionError("no `probe = ...` in source")


def fact(source: str, **kwargs):
    model, function, expr, statement = last_value(source, **kwargs)
    return fact_of(model, expr, function, statement)


@pytest.mark.parametrize("expression, kind, can_be_zero", [
    ("F.softmax(scores, dim=-1)", Kind.PROB, True),
    ("torch.sigmoid(scores)", Kind.PROB, True),
    ("scores.softmax(-1)", Kind.PROB, True),
    ("F.log_softmax(scores, dim=-1)", Kind.LOGPROB, False),
    ("F.logsigmoid(scores)", Kind.LOGPROB, False),
    ("torch.relu(scores)", Kind.NONNEG, True),
    ("torch.exp(scores)", Kind.POSITIVE, False),
    ("np.bincount(labels)", Kind.NONNEG, True),
    ("np.bincount(labels) + 1", Kind.POSITIVE, False),
    ("1 - torch.sigmoid(scores)", Kind.PROB, True),
    ("torch.sigmoid(scores).clamp(min=1e-6)", Kind.PROB, False),
    ("torch.clamp(torch.sigmoid(scores), 1e-6, 1 - 1e-6)", Kind.PROB, False),
    ("np.maximum(1e-12, np.bincount(labels))", Kind.POSITIVE, False),
    ("torch.sigmoid(scores).clamp(min=0.0)", Kind.PROB, True),
    ("np.exp(scores) / np.exp(scores).sum()", Kind.PROB, True),
    ("1.0 / (1.0 + np.exp(-scores))", Kind.PROB, True),
    ("sparsemax(scores, dim=-1)", Kind.PROB, True),
    ("np.loadtxt('scores.csv')", Kind.UNKNOWN, False),
    ("nn.Linear(8, 3)(features)", Kind.LOGITS, False),
])
def test_transfer_functions(expression, kind, can_be_zero):
    result = fact(f"probe = {expression}\n")
    assert (result.kind, result.can_be_zero) == (kind, can_be_zero)


def test_epsilon_through_a_name_and_a_default_parameter_is_the_guard():
    source = """
    class Loss(nn.Module):
        def __init__(self, eps=1e-7):
            super().__init__()
            self.eps = eps

        def forward(self, scores):
            probs = torch.sigmoid(scores)
            probe = probs + self.eps
    """
    result = fact(source)
    assert result.kind is Kind.POSITIVE and result.guard == 1e-7 and not result.can_be_zero


def test_straight_line_reassignment_hides_the_earlier_binding():
    source = """
    def loss(scores):
        probs = F.softmax(scores, dim=-1)
        probs = probs.clamp(min=1e-6)
        probe = probs
    """
    result = fact(source)
    assert result.kind is Kind.PROB and not result.can_be_zero and result.guard == 1e-6


def test_branch_bindings_are_joined():
    source = """
    def loss(scores, calibrated):
        probs = F.softmax(scores, dim=-1)
        if calibrated:
            probs = load_probabilities()
        probe = probs
    """
    assert fact(source).kind is Kind.UNKNOWN


def test_tuple_unpacking_of_a_helper_return():
    source = """
    def split(scores):
        return torch.sigmoid(scores), F.log_softmax(scores, dim=-1)

    def main(scores):
        gate, log_probs = split(scores)
        probe = gate
    """
    result = fact(source)
    assert result.kind is Kind.PROB and result.producer == "sigmoid"


def test_gan_discriminator_sequential_ends_in_sigmoid():
    source = """
    D = nn.Sequential(nn.Linear(64, 32), nn.LeakyReLU(0.2), nn.Linear(32, 1), nn.Sigmoid())

    def step(real):
        probe = D(real)
    """
    result = fact(source)
    assert result.kind is Kind.PROB and result.description == "sigmoid output of `D`"


def test_model_forward_through_self_attribute_and_to_device():
    source = """
    class Head(nn.Module):
        def __init__(self):
            super().__init__()
            self.fc = nn.Linear(16, 4)

        def forward(self, x):
            return self.fc(x).flatten(1)

    def main(batch, device):
        model = Head().to(device)
        probe = model(batch)
    """
    assert fact(source).kind is Kind.LOGITS


def test_keras_sequential_with_softmax_dense_layer():
    source = """
    import tensorflow as tf
    model = tf.keras.Sequential([tf.keras.layers.Dense(32, activation="relu"),
                                 tf.keras.layers.Dense(5, activation="softmax")])
    probe = model.predict(batch)
    """
    assert fact(source).kind is Kind.PROB


def test_recursive_helpers_degrade_to_unknown():
    source = """
    def ping(x):
        return pong(x)

    def pong(x):
        return ping(x)

    probe = ping(1)
    """
    assert fact(source).kind is Kind.UNKNOWN


def test_constant_value_of_a_module_level_epsilon():
    model, function, expr, statement = last_value("EPS = 1e-8\nprobe = EPS\n")
    assert constant_value(model, expr, function, statement) == 1e-8


def test_call_result_of_a_class_across_two_modules(tmp_path):
    (tmp_path / "nets.py").write_text(PRELUDE + textwrap.dedent("""
        class Critic(nn.Module):
            def __init__(self):
                super().__init__()
                self.body = nn.Sequential(nn.Linear(8, 1), nn.Sigmoid())

            def forward(self, x):
                return self.body(x).squeeze(-1)
    """))
    train = tmp_path / "train.py"
    source = "from nets import Critic\ncritic = Critic()\nprobe = critic(batch)\n"
    train.write_text(PRELUDE + source)
    model, function, expr, statement = last_value(source, str(train), ProjectIndex())
    result = fact_of(model, expr, function, statement)
    assert result.kind is Kind.PROB and result.can_be_zero
    # without a statement the bindings of `critic` are joined: still the one Critic()
    assert call_result(model, cst.Name("critic"), None).kind is Kind.PROB
