"""Float formats: limits against IEEE 754 and numpy, bfloat16 from its layout, evidence."""
import math

import libcst as cst
import numpy as np
import pytest

from nnlint.analysis.model import ModuleModel
from nnlint.analysis.precision import (LAYOUTS, limits, limits_from_layout, precision_of,
                                       round_to_layout)
from nnlint.config import Settings


# IEEE 754-2019 table 3.5 gives emax (15, 127, 1023) and precision p (11, 24, 53) for
# binary16/32/64: smallest normal 2**(1 - emax), smallest subnormal 2**(1 - emax - (p - 1)),
# eps 2**(1 - p), max (2 - 2**(1 - p)) * 2**emax.
@pytest.mark.parametrize("name, emax, precision_bits", [
    ("float16", 15, 11), ("float32", 127, 24), ("float64", 1023, 53),
])
def test_limits_match_ieee_754_formulas(name, emax, precision_bits):
    bounds = limits(name)
    assert bounds.smallest_normal == 2.0 ** (1 - emax)
    assert bounds.smallest_subnormal == 2.0 ** (1 - emax - (precision_bits - 1))
    assert bounds.eps == 2.0 ** (1 - precision_bits)
    assert bounds.epsneg == 2.0 ** -precision_bits
    assert bounds.max == (2 - 2.0 ** (1 - precision_bits)) * 2.0 ** emax


@pytest.mark.parametrize("name, numpy_type", [
    ("float16", np.float16), ("float32", np.float32), ("float64", np.float64),
])
def test_layout_derivation_agrees_with_numpy_finfo(name, numpy_type):
    derived = limits_from_layout(name, *LAYOUTS[name])
    info = np.finfo(numpy_type)
    assert derived.smallest_normal == float(info.smallest_normal)
    assert derived.smallest_subnormal == float(info.smallest_subnormal)
    assert derived.eps == float(info.eps) and derived.epsneg == float(info.epsneg)
    assert derived.max == float(info.max)


def test_bfloat16_limits_follow_its_bit_layout():
    bounds = limits("bfloat16")
    # 8 exponent bits like binary32 (bias 127), 7 fraction bits (Intel BFLOAT16 spec, 2018)
    assert bounds.smallest_normal == 2.0 ** -126 == limits("float32").smallest_normal
    assert bounds.smallest_subnormal == 2.0 ** -133
    assert bounds.eps == 2.0 ** -7 and bounds.epsneg == 2.0 ** -8
    assert bounds.max == (2 - 2.0 ** -7) * 2.0 ** 127


def test_bfloat16_against_torch_finfo_when_installed():
    torch = pytest.importorskip("torch")
    info = torch.finfo(torch.bfloat16)
    bounds = limits("bfloat16")
    assert (bounds.eps, bounds.max, bounds.smallest_normal) == (info.eps, info.max, info.tiny)
    for value in (1e-8, 3e-39, 1e-40, 0.999, 1 - 1e-3, 65519.0, 3.0e38):
        assert bounds.round(value) == torch.tensor(value, dtype=torch.bfloat16).item()


@pytest.mark.parametrize("name, numpy_type", [("float16", np.float16), ("float32", np.float32)])
def test_layout_rounding_matches_numpy_casts(name, numpy_type):
    values = [1e-8, 2.9e-8, 3.0e-8, 6e-8, 1e-5, 0.1, 1 - 1e-8, 1 - 1e-4, 65519.0, 65520.0,
              1.5e-45, 7e-46, 3.4e38, 3.5e38, -2.5e-8, 1e-38]
    with np.errstate(over="ignore"):
        expected = [float(numpy_type(value)) for value in values]
    assert [round_to_layout(value, *LAYOUTS[name]) for value in values] == expected


def test_derived_thresholds():
    float32, float16 = limits("float32"), limits("float16")
    assert float32.log_max == pytest.approx(88.72, abs=0.01)  # ln(3.4028e38)
    assert float16.log_max == pytest.approx(11.09, abs=0.01)  # ln(65504)
    # exp(x) is exactly 0 in float32 just below the threshold and not just above it
    assert np.exp(np.float32(float32.exp_underflow - 0.01)) == 0
    assert np.exp(np.float32(float32.exp_underflow + 0.01)) > 0
    assert np.float16(math.exp(float16.exp_underflow - 0.01)) == 0
    assert np.float16(math.exp(float16.exp_underflow + 0.01)) > 0
    # 1 / (1 + e**-x), correctly rounded, is exactly 1 just above the saturation point
    assert np.float32(1 / (1 + math.exp(-(float32.sigmoid_saturation + 0.01)))) == 1
    assert np.float32(1 / (1 + math.exp(-(float32.sigmoid_saturation - 0.05)))) < 1


def test_epsilon_checks():
    assert limits("float16").rounds_to_zero(1e-8) and not limits("float32").rounds_to_zero(1e-8)
    assert not limits("bfloat16").rounds_to_zero(1e-8)
    assert limits("float32").one_minus_is_one(1e-8)
    assert not limits("float32").one_minus_is_one(1e-7)
    assert limits("bfloat16").one_minus_is_one(1e-3)
    assert not limits("float16").one_minus_is_one(1e-3)


def model_of(source: str, settings: Settings | None = None) -> ModuleModel:
    return ModuleModel(cst.parse_module(source), settings=settings)


@pytest.mark.parametrize("source, expected", [
    ("import torch\nx = torch.ones(3)\n", "float32"),
    ("import numpy as np\nx = np.ones(3)\n", "float64"),
    ("import numpy as np\nx = np.ones(3, dtype=np.float32)\n", "float32"),
    ("import numpy as np\nx = np.ones(3, dtype=np.float16)\n", "float16"),
    ("import torch\nmodel = Net().half()\n", "float16"),
    ("import torch\nx = y.to(torch.bfloat16)\n", "bfloat16"),
    ("from torch import float16 as f16\nimport torch\nx = y.to(torch.float16)\n", "float16"),
    ("import torch\nwith torch.autocast(device_type='cuda'):\n    pass\n", "float16"),
    ("import torch\nwith torch.autocast(device_type='cpu'):\n    pass\n", "bfloat16"),
    ("import torch\nwith torch.cuda.amp.autocast():\n    pass\n", "float16"),
    ("import torch\nwith torch.autocast('cuda', enabled=False):\n    pass\n", "float32"),
    ("import tensorflow as tf\ntf.keras.mixed_precision.set_global_policy('mixed_float16')\n",
     "float16"),
    ("import jax.numpy as jnp\nx = jnp.zeros(3, dtype=jnp.bfloat16)\n", "bfloat16"),
    ("import torch\n# we never use torch.float16 here\nx = 1\n", "float32"),
    ("import torch\n\"\"\"Notes on autocast and half precision.\"\"\"\n", "float32"),
    ("import torch\nfloat16 = mystery.float16\n", "float32"),
])
def test_precision_evidence(source, expected):
    assert precision_of(model_of(source)) == expected


def test_the_setting_wins_over_evidence():
    model = model_of("import torch\nmodel = Net().half()\n", Settings(precision="float64"))
    assert precision_of(model) == "float64"
