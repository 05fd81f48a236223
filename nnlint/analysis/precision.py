"""The active float format of a file and its limits, computed with numpy, never typed in.

`limits(name)` gives a format's numbers: float16/float32/float64 from `numpy.finfo`,
bfloat16 derived from its bit layout (1 sign, 8 exponent, 7 fraction bits; the layout is
the upper half of an IEEE 754 binary32). `precision_of(model, function)` is the format
arithmetic in a file runs in: the `precision` setting when set; else the narrowest format
the file asks for (`.half()`, `torch.float16`, autocast, Keras mixed-precision policies,
`jnp.bfloat16`, `np.float16`, ...); else float64 for a file that only uses NumPy/SciPy
(numpy's default dtype is float64, numpy docs "Data types"), else float32 (the default
dtype of PyTorch, TensorFlow and JAX).

Evidence is found by one regular-expression scan of the source text (DESIGN §6: no extra
walk), skipping matches inside comments, and confirmed through the file's import names.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import libcst as cst

    from nnlint.analysis.model import ModuleModel

#: format name -> (exponent bits, fraction bits) of the binary interchange layout
#: (IEEE 754-2019 table 3.5 for binary16/32/64; bfloat16: Intel "BFLOAT16 - Hardware
#: Numerics Definition" (2018), 8 exponent and 7 fraction bits)
LAYOUTS = {
    "float16": (5, 10),
    "bfloat16": (8, 7),
    "float32": (8, 23),
    "float64": (11, 52),
}

_NUMPY_TYPES = {"float16": np.float16, "float32": np.float32, "float64": np.float64}


@dataclass(frozen=True)
class FloatLimits:
    """The numbers of one binary floating-point format that the numerics rules use."""

    name: str
    exponent_bits: int
    fraction_bits: int
    #: smallest positive normal number (numpy `finfo.smallest_normal`)
    smallest_normal: float
    #: smallest positive subnormal number (numpy `finfo.smallest_subnormal`)
    smallest_subnormal: float
    #: machine epsilon: the gap between 1 and the next larger number (`finfo.eps`)
    eps: float
    #: the gap between 1 and the next smaller number (`finfo.epsneg`)
    epsneg: float
    #: largest finite number (`finfo.max`)
    max: float

    @property
    def log_max(self) -> float:
        """ln(max): `exp(x)` overflows to inf above it."""
        return math.log(self.max)

    @property
    def exp_underflow(self) -> float:
        """`exp(x)` rounds to exactly 0 below this x: ln(smallest_subnormal / 2).

        Values under half the smallest subnormal round to 0 (round to nearest, IEEE 754).
        """
        return math.log(self.smallest_subnormal) - math.log(2)

    @property
    def sigmoid_saturation(self) -> float:
        """`sigmoid(x)` rounds to exactly 1 above this x (then `1 - sigmoid(x)` is 0).

        1 / (1 + e**-x) rounds to 1 once e**-x is below epsneg / 2, half the gap below 1.
        """
        return -math.log(self.epsneg / 2)

    def round(self, value: float) -> float:
        """`value` rounded to this format (round to nearest, ties to even)."""
        numpy_type = _NUMPY_TYPES.get(self.name)
        if numpy_type is not None:
            with np.errstate(over="ignore", under="ignore"):
                return float(numpy_type(value))
        return round_to_layout(value, self.exponent_bits, self.fraction_bits)

    def rounds_to_zero(self, value: float) -> bool:
        return value != 0 and self.round(value) == 0

    def one_minus_is_one(self, value: float) -> bool:
        """True when `1 - value`, computed in this format, is exactly 1."""
        stored = self.round(value)
        return stored >= 0 and self.round(1.0 - stored) == 1.0


def round_to_layout(value: float, exponent_bits: int, fraction_bits: int) -> float:
    """Round a float to a binary format given only its layout (subnormals and inf included)."""
    if value == 0 or math.isnan(value) or math.isinf(value):
        return value
    bias = 2 ** (exponent_bits - 1) - 1
    min_exponent = 1 - bias
    magnitude = abs(value)
    # frexp gives magnitude = mantissa * 2**exponent with mantissa in [0.5, 1)
    _, exponent = math.frexp(magnitude)
    exponent = max(exponent - 1, min_exponent)
    quantum = 2.0 ** (exponent - fraction_bits)
    rounded = round(magnitude / quantum) * quantum  # Python's round: ties to even
    largest = (2 - 2.0 ** -fraction_bits) * 2.0 ** bias
    if rounded > largest:
        rounded = math.inf
    return math.copysign(rounded, value)


@lru_cache(maxsize=None)
def limits(name: str) -> FloatLimits:
    """The limits of `name` (bfloat16, float16, float32, float64)."""
    exponent_bits, fraction_bits = LAYOUTS[name]
    numpy_type = _NUMPY_TYPES.get(name)
    if numpy_type is not None:
        info = np.finfo(numpy_type)
        return FloatLimits(name, exponent_bits, fraction_bits, float(info.smallest_normal),
                           float(info.smallest_subnormal), float(info.eps),
                           float(info.epsneg), float(info.max))
    return limits_from_layout(name, exponent_bits, fraction_bits)


def limits_from_layout(name: str, exponent_bits: int, fraction_bits: int) -> FloatLimits:
    """Limits of an IEEE 754-style binary format from its exponent and fraction widths."""
    bias = 2 ** (exponent_bits - 1) - 1
    smallest_normal = 2.0 ** (1 - bias)
    return FloatLimits(
        name, exponent_bits, fraction_bits,
        smallest_normal=smallest_normal,
        smallest_subnormal=smallest_normal * 2.0 ** -fraction_bits,
        eps=2.0 ** -fraction_bits,
        epsneg=2.0 ** -(fraction_bits + 1),
        max=(2 - 2.0 ** -fraction_bits) * 2.0 ** bias,
    )


# -- evidence in a file ---------------------------------------------------------------------
#: cheap pre-check: a file mentioning none of these runs in its default format
_EVIDENCE_HINT = re.compile(r"float16|bfloat16|\bhalf\b|autocast|mixed_|precision|\bbf16\b")

#: (pattern, format, dotted prefix the receiver must resolve to, or None for methods/strings)
_EVIDENCE = (
    (re.compile(r"\b([\w.]+)\.(float16|half)\b(?!\s*\()"), "float16", "dtype"),
    (re.compile(r"\b([\w.]+)\.bfloat16\b(?!\s*\()"), "bfloat16", "dtype"),
    (re.compile(r"\.half\(\s*\)"), "float16", None),
    (re.compile(r"\.bfloat16\(\s*\)"), "bfloat16", None),
    (re.compile(r"""\bdtype\s*=\s*["'](float16|half)["']"""), "float16", None),
    (re.compile(r"""\bdtype\s*=\s*["']bfloat16["']"""), "bfloat16", None),
    (re.compile(r"""["']mixed_float16["']"""), "float16", None),
    (re.compile(r"""["']mixed_bfloat16["']"""), "bfloat16", None),
    # Lightning Trainer(precision=16 / "16-mixed" / "bf16-mixed") (Lightning docs)
    (re.compile(r"""\bprecision\s*=\s*(?:16\b|["']16(?:-mixed|-true)?["'])"""), "float16", None),
    (re.compile(r"""\bprecision\s*=\s*["']bf16(?:-mixed|-true)?["']"""), "bfloat16", None),
    # torch.autocast(...), torch.cuda.amp.autocast(...), torch.cpu.amp.autocast(...)
    (re.compile(r"\b([\w.]*autocast)\s*\(([^)]*)\)"), "autocast", None),
)

#: modules whose `float16`/`bfloat16` attribute is a dtype
_DTYPE_MODULES = ("torch", "numpy", "jax.numpy", "jax", "tensorflow", "tensorflow.keras",
                  "flax", "ml_dtypes")

#: packages whose default float dtype is float32 (their docs); NumPy/SciPy default to float64
_FLOAT32_FRAMEWORKS = ("torch", "tensorflow", "jax", "flax", "keras", "optax", "haiku",
                       "equinox", "lightning", "pytorch_lightning", "transformers", "timm")


def precision_of(model: "ModuleModel", function: "cst.FunctionDef | None" = None) -> str:
    """The float format arithmetic in `function` (or the file) runs in.

    Evidence anywhere in a file applies to the whole file: a model cast with `.half()` in
    `main` runs its `forward` in float16 too.
    """
    settings = model.settings
    if settings is not None and settings.precision:
        return settings.precision
    return _file_precision(model)[0]


def is_autocast_only(model: "ModuleModel") -> bool:
    """True when the half format of the file comes only from CUDA autocast regions.

    CUDA autocast runs exp, log, softmax, log_softmax and sum in float32 even inside the
    region (PyTorch "Automatic Mixed Precision" docs, CUDA ops that autocast to float32),
    so rules judging those ops use float32 there. CPU autocast keeps softmax and exp in
    bfloat16 (checked against torch 2.13 CPU in tests/test_numerics_references.py).
    """
    settings = model.settings
    if settings is not None and settings.precision:
        return False
    return _file_precision(model)[1]


def _file_precision(model: "ModuleModel") -> tuple[str, bool]:
    memo = model.memo.setdefault("precision", {})
    if "file" not in memo:
        memo["file"] = _compute_file_precision(model)
    return memo["file"]


def _compute_file_precision(model: "ModuleModel") -> tuple[str, bool]:
    text = model.source
    found: dict[str, set[str]] = {}
    if _EVIDENCE_HINT.search(text):
        found = _evidence(model, text)
    for name in ("float16", "bfloat16"):
        if name in found:
            return name, found[name] == {"autocast-cuda"}
    return _default_precision(model, text), False


def _default_precision(model: "ModuleModel", text: str) -> str:
    modules = model.names.imported_modules
    if modules and not any(module.split(".")[0] in _FLOAT32_FRAMEWORKS for module in modules):
        if "float32" not in text and any(module.split(".")[0] in ("numpy", "scipy")
                                         for module in modules):
            return "float64"
    return "float32"


def _evidence(model: "ModuleModel", text: str) -> dict[str, set[str]]:
    """format -> kinds of evidence for it ("autocast-cuda", "autocast-cpu", "explicit")."""
    found: dict[str, set[str]] = {}
    for pattern, name, needs in _EVIDENCE:
        for match in pattern.finditer(text):
            if _in_comment(text, match.start()):
                continue
            if needs == "dtype" and not _names_dtype_module(model, match.group(1)):
                continue
            if name == "autocast":
                name_found = _autocast_format(match.group(1), match.group(2))
                if name_found:
                    device = "cpu" if _is_cpu_autocast(match.group(1), match.group(2)) else "cuda"
                    found.setdefault(name_found, set()).add(f"autocast-{device}")
                continue
            found.setdefault(name, set()).add("explicit")
    return found


def _autocast_format(function: str, arguments: str) -> str | None:
    """CUDA autocast defaults to float16, CPU autocast to bfloat16 (torch.amp docs)."""
    if "enabled=False" in arguments.replace(" ", ""):
        return None
    if "bfloat16" in arguments or "bf16" in arguments:
        return "bfloat16"
    if "float16" in arguments or "half" in arguments:
        return "float16"
    if _is_cpu_autocast(function, arguments):
        return "bfloat16"
    return "float16"


def _is_cpu_autocast(function: str, arguments: str) -> bool:
    return "cpu" in arguments or ".cpu." in function


def _names_dtype_module(model: "ModuleModel", receiver: str) -> bool:
    head, _, rest = receiver.partition(".")
    for candidate in model.names.candidates(head):
        full = f"{candidate}.{rest}" if rest else candidate
        if full.startswith(_DTYPE_MODULES) or full in _DTYPE_MODULES:
            return True
    return False


def _in_comment(text: str, position: int) -> bool:
    line_start = text.rfind("\n", 0, position) + 1
    return "#" in text[line_start:position]
