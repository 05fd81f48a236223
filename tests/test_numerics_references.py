"""Each NNL30x premise shown with outside references (numpy, scipy, PyTorch when installed),
and the numbers in the findings checked against what those libraries compute."""
import math

import numpy as np
import pytest
from scipy import special

from nnlint.analysis.precision import limits
from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text

FLOAT32 = limits("float32")
FLOAT16 = limits("float16")


def findings(source: str, precision: str | None = None):
    settings = with_default_ignores(Settings(precision=precision))
    result = lint_text(source, "probe.py", settings, ProjectIndex(settings))
    assert not result.errors
    return [(finding.code, finding.message) for finding in result.findings]


# -- NNL301: log of an exact zero ------------------------------------------------------------
def test_softmax_underflows_to_zero_and_log_softmax_stays_finite():
    scores = np.array([0.0, -800.0])
    # scipy.special.softmax / log_softmax (float64): exp(-800) is below 2**-1074
    with np.errstate(divide="ignore"):
        assert np.isneginf(np.log(special.softmax(scores))).any()
    assert np.isfinite(special.log_softmax(scores)).all()


def test_float32_softmax_zero_starts_where_the_message_says():
    gap = -FLOAT32.exp_underflow  # the message's "a score 104.0 below the row max"
    below = special.softmax(np.array([0.0, -(gap + 0.05)], dtype=np.float32))
    above = special.softmax(np.array([0.0, -(gap - 0.5)], dtype=np.float32))
    assert below[1] == 0 and above[1] > 0
    messages = findings("import torch\nprobs = torch.softmax(s, -1)\nloss = torch.log(probs)\n")
    assert messages == [("NNL301", "log of softmax output: exactly 0 for a score "
                         f"{gap:.1f} below the row max in float32; use log_softmax")]


def test_sigmoid_reaches_zero_and_one_in_float32():
    # scipy.special.expit in float32: 0 below -88.7 (exp(-x) overflows), 1 above 17.3
    assert special.expit(np.float32(FLOAT32.exp_underflow - 0.1)) == 0
    assert special.expit(np.float32(-FLOAT32.log_max - 0.5)) == 0
    assert special.expit(np.float32(FLOAT32.sigmoid_saturation + 0.1)) == 1
    with np.errstate(divide="ignore"):
        assert np.isneginf(np.log(1 - special.expit(np.float32(17.4))))
    assert np.isfinite(special.log_expit(np.float32(-17.4)))  # the stable form


def test_sigmoid_premises_in_torch():
    torch = pytest.importorskip("torch")
    functional = torch.nn.functional
    assert torch.sigmoid(torch.tensor(-89.0)).item() == 0  # PyTorch CPU, float32
    assert torch.sigmoid(torch.tensor(FLOAT32.sigmoid_saturation + 0.1)).item() == 1
    assert torch.sigmoid(torch.tensor(FLOAT16.sigmoid_saturation + 0.1,
                                      dtype=torch.float16)).item() == 1
    assert torch.isneginf(torch.log(torch.softmax(torch.tensor([0.0, -105.0]), 0)))[1]
    assert torch.isfinite(functional.log_softmax(torch.tensor([0.0, -105.0]), 0)).all()
    assert torch.isfinite(functional.logsigmoid(torch.tensor(-105.0)))


def test_cpu_autocast_keeps_softmax_in_bfloat16():
    torch = pytest.importorskip("torch")
    layer = torch.nn.Linear(4, 3)
    with torch.autocast("cpu"):
        probs = torch.softmax(layer(torch.ones(2, 4)), dim=-1)
    assert probs.dtype == torch.bfloat16  # so CPU autocast evidence keeps bfloat16 limits


def test_relu_output_is_exactly_zero():
    with np.errstate(divide="ignore"):
        assert np.isneginf(np.log(np.maximum(np.float32(-0.5), np.float32(0))))


# -- NNL302: epsilons lost to rounding -------------------------------------------------------
def test_epsilon_premises_from_numpy():
    assert np.float16(1e-8) == 0
    assert np.float32(1) - np.float32(1e-8) == 1
    assert np.float32(1) - np.float32(FLOAT32.epsneg) < 1
    with np.errstate(divide="ignore"):
        assert np.isneginf(np.log(np.float16(0) + np.float16(1e-8)))


def test_epsilon_message_uses_numpy_limits():
    source = "import torch\nrisk = torch.log(p.clamp(min=1e-8))\n"
    assert findings(source) == []
    messages = findings(source, precision="float16")
    smallest = np.finfo(np.float16).smallest_subnormal
    assert messages == [("NNL302", f"guard `1e-8` rounds to 0 in float16 (smallest subnormal "
                         f"{smallest:.1e}); use >= {np.finfo(np.float16).smallest_normal:.1e}")]


def test_one_minus_epsilon_message_uses_the_gap_below_one():
    messages = findings("import torch\nq = p.clamp(1e-6, 1 - 1e-8)\n")
    gap = float(np.finfo(np.float32).epsneg)
    assert messages == [("NNL302", f"guard `1e-8` makes 1 - eps == 1 in float32 (gap below 1: "
                         f"{gap:.2e}); use >= {gap:.2e}")]


# -- NNL303 / NNL304: exp overflow ------------------------------------------------------------
def naive_softmax(scores):
    weights = np.exp(scores)
    return weights / weights.sum()  # noqa: NNL303 - the hazard, shown on purpose


def test_naive_softmax_is_nan_in_float32_and_scipy_is_not():
    scores = np.array([1000.0, 0.0], dtype=np.float32)
    with np.errstate(over="ignore", invalid="ignore"):
        assert np.isnan(naive_softmax(scores)).any()
    assert np.allclose(special.softmax(scores), [1.0, 0.0])


def test_overflow_threshold_in_the_message_is_where_numpy_overflows():
    with np.errstate(over="ignore"):
        assert np.isinf(np.exp(np.float32(FLOAT32.log_max + 0.01)))
        assert np.isinf(np.exp(np.float16(FLOAT16.log_max + 0.01)))
    assert np.isfinite(np.exp(np.float32(FLOAT32.log_max - 0.01)))
    assert np.isfinite(np.exp(np.float16(FLOAT16.log_max - 0.01)))
    source = "import numpy as np\nw = np.exp(s)\nshares = w / w.sum()\n"
    assert findings(source, precision="float32")[0][1].startswith(
        f"`exp(x) / sum(exp(x))` is inf/inf = nan once a score passes {FLOAT32.log_max:.1f}")
    assert f"passes {FLOAT16.log_max:.1f} in float16" in findings(source, "float16")[0][1]
    assert math.isclose(FLOAT16.log_max, math.log(65504))  # IEEE 754 binary16 max


def test_naive_logsumexp_overflows_and_scipy_logsumexp_does_not():
    scores = np.array([1000.0, 0.0])
    with np.errstate(over="ignore"):
        assert np.isinf(np.log(np.sum(np.exp(scores))))  # noqa: NNL304 - on purpose
    assert special.logsumexp(scores) == pytest.approx(1000.0)
    messages = findings("import numpy as np\nnorm = np.log(np.sum(np.exp(s)))\n")
    assert messages == [("NNL304", "`log(sum(exp(x)))` is inf once a score passes "
                         f"{math.log(np.finfo(np.float64).max):.1f} in float64; use logsumexp")]
