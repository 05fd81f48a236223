"""The library functions `nnlint fix` writes in place of naive numerics (canonical names).

Each entry was checked against the function's documented signature: PyTorch 2.13 (inspect and
docstrings), SciPy 1.17 (inspect), the JAX (jax.nn) and TensorFlow 2 (tf.nn, tf.math) API
pages. A spelling is listed only where the stable function takes the same arguments with the
same meaning; anything else is left unfixed.
"""
from __future__ import annotations

#: module of a canonical function -> framework family (log, exp, sum and the stable function
#: must belong to one family, so the rewrite never mixes array types)
FAMILIES = {
    "torch": "torch", "torch.nn.functional": "torch", "torch.special": "torch",
    "numpy": "numpy", "scipy.special": "numpy",
    "jax.numpy": "jax", "jax.nn": "jax", "flax.linen": "jax",
    "tensorflow": "tensorflow", "tensorflow.math": "tensorflow", "tensorflow.nn": "tensorflow",
}

#: natural-log functions whose only argument is the value (log2/log10 are other functions)
NATURAL_LOGS = frozenset({"torch.log", "numpy.log", "jax.numpy.log", "tensorflow.math.log",
                          "tensorflow.log"})
#: the tensor method forms (`x.log()`, `x.softmax(dim)`, `x.exp()`) exist on torch.Tensor only
METHOD_FAMILY = "torch"


class Signature:
    """How many positional arguments, and which keywords, a rewrite may carry over."""

    __slots__ = ("positional", "keywords")

    def __init__(self, positional: int, keywords: tuple[str, ...]) -> None:
        self.positional = positional
        self.keywords = frozenset(keywords)


#: softmax -> (log_softmax with the same parameters, the arguments both accept alike);
#: `_stacklevel` and `name` are left out on purpose, and jax's `where`/`initial` changed
#: meaning across releases (flax 0.6 docs: `initial` required with `where`)
LOG_SOFTMAX: dict[str, tuple[str, Signature]] = {
    "torch.softmax": ("torch.log_softmax", Signature(2, ("input", "dim", "dtype"))),
    "torch.nn.functional.softmax": ("torch.nn.functional.log_softmax",
                                    Signature(2, ("input", "dim", "dtype"))),
    "torch.special.softmax": ("torch.special.log_softmax",
                              Signature(2, ("input", "dim", "dtype"))),
    "tensorflow.nn.softmax": ("tensorflow.nn.log_softmax", Signature(2, ("logits", "axis"))),
    "tensorflow.math.softmax": ("tensorflow.math.log_softmax",
                                Signature(2, ("logits", "axis"))),
    "jax.nn.softmax": ("jax.nn.log_softmax", Signature(2, ("x", "axis"))),
    "flax.linen.softmax": ("flax.linen.log_softmax", Signature(2, ("x", "axis"))),
    "scipy.special.softmax": ("scipy.special.log_softmax", Signature(2, ("x", "axis"))),
}
#: torch.Tensor.softmax(dim, dtype=None) and Tensor.log_softmax(dim, dtype=None)
LOG_SOFTMAX_METHOD = ("softmax", "log_softmax", Signature(1, ("dim", "dtype")))

#: sigmoid -> log-sigmoid; both take the one input only (torch.sigmoid's `out=` is not carried)
LOG_SIGMOID: dict[str, str] = {
    "torch.sigmoid": "torch.nn.functional.logsigmoid",
    "torch.nn.functional.sigmoid": "torch.nn.functional.logsigmoid",
    "torch.special.expit": "torch.nn.functional.logsigmoid",
    "tensorflow.sigmoid": "tensorflow.math.log_sigmoid",
    "tensorflow.math.sigmoid": "tensorflow.math.log_sigmoid",
    "tensorflow.nn.sigmoid": "tensorflow.math.log_sigmoid",
    "jax.nn.sigmoid": "jax.nn.log_sigmoid",
    "flax.linen.sigmoid": "flax.linen.log_sigmoid",
    # scipy.special.log_expit exists since SciPy 1.8.0 (its documentation)
    "scipy.special.expit": "scipy.special.log_expit",
}
LOG_SIGMOID_METHOD = ("sigmoid", "torch.nn.functional.logsigmoid")

#: exp functions by family (the naive softmax / log-sum-exp numerators)
EXP_FUNCTIONS = {"torch.exp": "torch", "numpy.exp": "numpy", "jax.numpy.exp": "jax",
                 "tensorflow.exp": "tensorflow", "tensorflow.math.exp": "tensorflow"}


class SumForm:
    """A sum reduction's parameters after the summed operand, as (axis, keep-dims) roles."""

    __slots__ = ("positional", "axis", "keep")

    def __init__(self, positional: tuple[str, ...], axis: str, keep: str) -> None:
        #: roles ("axis", "keep") of the positional parameters after the operand, in order
        self.positional = positional
        #: keyword names of the axis and keep-dims parameters
        self.axis = axis
        self.keep = keep


#: numpy's sum(a, axis, dtype, out, keepdims): only the axis is positional before dtype
_NUMPY_SUM = SumForm(("axis",), "axis", "keepdims")
#: (family, canonical sum or "method") -> its form; torch.sum(input, dim, keepdim),
#: Tensor.sum(dim, keepdim), tf.reduce_sum(input_tensor, axis, keepdims)
SUM_FORMS: dict[tuple[str, str], SumForm] = {
    ("torch", "torch.sum"): SumForm(("axis", "keep"), "dim", "keepdim"),
    ("torch", "method"): SumForm(("axis", "keep"), "dim", "keepdim"),
    ("numpy", "numpy.sum"): _NUMPY_SUM, ("numpy", "method"): _NUMPY_SUM,
    ("jax", "jax.numpy.sum"): _NUMPY_SUM, ("jax", "method"): _NUMPY_SUM,
    ("tensorflow", "tensorflow.reduce_sum"): SumForm(("axis", "keep"), "axis", "keepdims"),
    ("tensorflow", "tensorflow.math.reduce_sum"): SumForm(("axis", "keep"), "axis", "keepdims"),
}


class Stable:
    """A family's stable function: canonical name, keyword names, and its defaults."""

    __slots__ = ("name", "axis", "keep", "all_axes", "method")

    def __init__(self, name: str, axis: str, keep: str, all_axes: str | None,
                 method: str | None = None) -> None:
        self.name = name
        self.axis = axis
        self.keep = keep
        #: how to ask for every axis ("" : leave the axis out; None: the function cannot)
        self.all_axes = all_axes
        #: the torch.Tensor method of the same name, for `x.exp()` receivers
        self.method = method


#: softmax by family. torch.softmax needs a dim; tf.nn.softmax's default axis is -1, not
#: "all" (TF docs), so a full sum has no softmax there; scipy's default axis is None (all
#: axes); jax.nn.softmax takes axis=None for all axes (JAX docs)
SOFTMAX = {
    "torch": Stable("torch.softmax", "dim", "", None, "softmax"),
    "numpy": Stable("scipy.special.softmax", "axis", "", ""),
    "jax": Stable("jax.nn.softmax", "axis", "", "None"),
    "tensorflow": Stable("tensorflow.nn.softmax", "axis", "", None),
}
#: log-sum-exp by family: torch.logsumexp(input, dim, keepdim) needs a dim;
#: scipy/jax logsumexp(a, axis=None, b, keepdims) and tf.math.reduce_logsumexp(input_tensor,
#: axis=None, keepdims) reduce every axis by default, as sum does
LOGSUMEXP = {
    "torch": Stable("torch.logsumexp", "dim", "keepdim", None, "logsumexp"),
    "numpy": Stable("scipy.special.logsumexp", "axis", "keepdims", ""),
    "jax": Stable("jax.nn.logsumexp", "axis", "keepdims", ""),
    "tensorflow": Stable("tensorflow.math.reduce_logsumexp", "axis", "keepdims", ""),
}
#: families whose stable function lives in another library than the code's own: numpy has
#: no softmax or logsumexp, and SciPy is not imported for it (the file must already alias it)
NO_NEW_IMPORTS = frozenset({"numpy"})

#: a module -> the packages whose plain import also makes it reachable as an attribute
#: (`import torch` loads torch.nn.functional; `import jax` loads jax.nn; from memory of each
#: package's __init__); SciPy and Flax submodules are reachable only through their own import
REACHABLE_FROM = {
    "torch.nn.functional": ("torch", "torch.nn"),
    "torch.special": ("torch",),
    "tensorflow.math": ("tensorflow",),
    "tensorflow.nn": ("tensorflow",),
    "jax.nn": ("jax",),
}

#: when no alias fits: (import statement, the local name it binds, the module spelled through
#: it), first the conventional alias (common practice), then the package itself
IMPORTS = {
    "torch.nn.functional": (("import torch.nn.functional as F", "F", ""),
                            ("import torch", "torch", "nn.functional")),
    "torch": (("import torch", "torch", ""),),
    "torch.special": (("import torch", "torch", "special"),),
    "tensorflow.math": (("import tensorflow as tf", "tf", "math"),),
    "tensorflow.nn": (("import tensorflow as tf", "tf", "nn"),),
    "jax.nn": (("import jax", "jax", "nn"),),
    "scipy.special": (("import scipy.special", "scipy", "special"),),
}
