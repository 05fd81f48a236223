"""The dropout rules' premises, checked against numpy simulation and PyTorch (when installed).

Inverted dropout (Srivastava et al. 2014, JMLR; the form PyTorch, TensorFlow/Keras and Flax
implement) divides kept units by the keep probability q during training, so its expected
output equals its input; scaling by q again at evaluation gives q times that expectation,
the ratio NNL101's message states.
"""
import inspect
import re

import numpy as np
import pytest

from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text

#: fixed seed and sample size of the simulations (common practice: any fixed seed)
SEED = 20140601
SAMPLES = 200_000


def simulate_inverted_dropout(inputs: np.ndarray, keep: float, samples: int) -> np.ndarray:
    """`samples` independent training passes of hand-written inverted dropout over `inputs`."""
    rng = np.random.default_rng(SEED)
    mask = rng.random((samples, inputs.size)) < keep
    return inputs * mask / keep


def standard_error(inputs: np.ndarray, keep: float, samples: int) -> np.ndarray:
    # One pass is x/q with probability q and 0 otherwise: variance x^2 (1 - q) / q
    # (Bernoulli variance, scaled by 1/q^2), so the mean of n passes has that over n.
    return np.abs(inputs) * np.sqrt((1 - keep) / keep / samples)


def lint(source: str) -> list:
    settings = with_default_ignores(Settings())
    return lint_text(source, "reference.py", settings).findings


def message_ratio(message: str) -> float:
    found = re.search(r"(?:shrink|grow) to ([0-9.]+)x", message)
    assert found, message
    return float(found.group(1))


@pytest.mark.parametrize("keep", [0.5, 0.7, 0.9])
def test_inverted_dropout_expectation_equals_the_input(keep):
    inputs = np.linspace(-2.0, 3.0, 16)
    passes = simulate_inverted_dropout(inputs, keep, SAMPLES)
    # 5 standard errors: a false failure has probability below 1e-6 per entry (normal tail)
    tolerance = 5 * standard_error(inputs, keep, SAMPLES)
    assert np.all(np.abs(passes.mean(axis=0) - inputs) <= tolerance + 1e-12)


EVAL_RESCALED = '''
import numpy as np


class RouteMLP:
    def __init__(self, keep: float = {keep}):
        self.keep = keep
        self.rng = np.random.default_rng(0)

    def hidden(self, h, train):
        if train:
            mask = self.rng.random(h.shape) < self.keep
            return h * mask / self.keep
        else:
            return h * self.keep
'''


@pytest.mark.parametrize("keep", [0.5, 0.7, 0.9])
def test_rescaled_evaluation_output_is_keep_times_the_expectation_as_the_message_says(keep):
    inputs = np.linspace(0.5, 3.0, 8)
    training_mean = simulate_inverted_dropout(inputs, keep, SAMPLES).mean(axis=0)
    evaluation = inputs * keep  # the else branch of EVAL_RESCALED
    ratio = evaluation / training_mean
    tolerance = 5 * standard_error(inputs, keep, SAMPLES) / inputs
    assert np.all(np.abs(ratio - keep) <= keep * tolerance * 1.01)
    findings = lint(EVAL_RESCALED.format(keep=keep))
    assert [finding.code for finding in findings] == ["NNL101"]
    assert message_ratio(findings[0].message) == pytest.approx(keep, abs=5e-4)


def test_dividing_twice_inflates_training_output_by_one_over_keep_as_the_message_says():
    keep = 0.8
    inputs = np.linspace(0.5, 3.0, 8)
    twice = simulate_inverted_dropout(inputs, keep, SAMPLES) / keep
    tolerance = 5 * standard_error(inputs, keep, SAMPLES) / keep / inputs
    assert np.all(np.abs(twice.mean(axis=0) / inputs - 1 / keep) <= tolerance)
    source = (
        "import numpy as np\n"
        "def hidden(h, rng, keep=0.8):\n"
        "    mask = rng.random(h.shape) < keep\n"
        "    h = h * mask / keep\n"
        "    return h / keep\n"
    )
    findings = lint(source)
    assert [finding.code for finding in findings] == ["NNL101"]
    assert message_ratio(findings[0].message) == pytest.approx(1 / keep, abs=5e-3)


def test_numpy_original_dropout_is_right_at_evaluation():
    # The 2014 form (no division in training, times q at test) also has matching expectations:
    # the reason NNL101 needs an inverted scaling before it flags a multiplication by q.
    keep = 0.6
    inputs = np.linspace(0.5, 3.0, 8)
    rng = np.random.default_rng(SEED)
    training = inputs * (rng.random((SAMPLES, inputs.size)) < keep)
    tolerance = 5 * np.abs(inputs) * np.sqrt(keep * (1 - keep) / SAMPLES)
    assert np.all(np.abs(training.mean(axis=0) - inputs * keep) <= tolerance)


# -- PyTorch: the NNL102 premise ----------------------------------------------------------
def make_torch_modules():
    """Two heads: the functional one ignores eval(), the module one does not."""
    import torch
    import torch.nn.functional as F
    from torch import nn

    class FunctionalHead(nn.Module):
        def forward(self, features):
            return F.dropout(features, 0.5)

    class ModuleHead(nn.Module):
        def __init__(self):
            super().__init__()
            self.drop = nn.Dropout(0.5)

        def forward(self, features):
            return self.drop(features)

    return torch, FunctionalHead, ModuleHead


def test_functional_dropout_still_drops_after_eval_and_nnlint_says_so():
    torch = pytest.importorskip("torch")
    _, FunctionalHead, ModuleHead = make_torch_modules()
    torch.manual_seed(SEED)
    features = torch.ones(10_000)
    functional = FunctionalHead().eval()
    output = functional(features)
    zeroed = (output == 0).float().mean().item()
    # about half the entries dropped (binomial: 5 standard errors of 0.005 around 0.5)
    assert abs(zeroed - 0.5) < 0.025
    # the kept ones are scaled by 1 / (1 - p) = 2: inverted dropout (PyTorch docs)
    assert torch.all(output[output != 0] == 2.0)
    module = ModuleHead().eval()
    assert torch.equal(module(features), features)
    source = "import torch\n" + inspect.getsource(make_torch_modules)
    codes = [finding.code for finding in lint(source)]
    assert codes == ["NNL102"]


def test_torch_dropout_modules_in_training_mode_are_inverted():
    torch = pytest.importorskip("torch")
    torch.manual_seed(SEED)
    features = torch.ones(SAMPLES)
    output = torch.nn.Dropout(0.3).train()(features)
    # E[output] = 1 within 5 standard errors (variance (1 - q) / q, q = 0.7)
    assert abs(output.mean().item() - 1.0) < 5 * np.sqrt(0.3 / 0.7 / SAMPLES)
