"""Framework knowledge for the losses rules: each loss and the input it expects.

A loss that "expects logits" applies softmax or sigmoid itself (fused with the log, for
stability); one that expects probabilities or log-probabilities applies nothing. Signatures
are those of each library's documentation: PyTorch `torch.nn` / `torch.nn.functional`,
TensorFlow `tf.nn`, Keras `keras.losses` (where `from_logits` defaults to False) and optax.
Names are canonical (names.py): `keras.*` is `tensorflow.keras.*`.
"""
from __future__ import annotations

import enum
from dataclasses import dataclass


class Expects(enum.Enum):
    LOGITS = "logits"
    PROB = "probabilities"
    LOGPROB = "log-probabilities"


@dataclass(frozen=True)
class LossSpec:
    """What one loss expects of its prediction argument."""

    #: what the prediction must be (for Keras losses: with from_logits=False)
    expects: Expects
    #: the normalisation the loss applies (or, for PROB/LOGPROB losses, expects applied)
    activation: str
    #: 0-based position of the prediction among the positional arguments of the call
    position: int
    #: keyword names of the prediction argument
    keywords: tuple[str, ...]
    #: Keras: the `from_logits` flag switches `expects` to LOGITS when True
    has_from_logits: bool = False
    #: where `from_logits` sits among the positional arguments of the loss function
    from_logits_position: int | None = None
    #: where it sits among the positional arguments of the loss class's constructor
    class_from_logits_position: int | None = None


def _torch(expects: Expects, activation: str) -> LossSpec:
    # torch.nn.functional.<loss>(input, target, ...) and <Loss>()(input, target)
    return LossSpec(expects, activation, 0, ("input",))


_TORCH_LOSSES = {
    "cross_entropy": ("CrossEntropyLoss", _torch(Expects.LOGITS, "softmax")),
    "binary_cross_entropy_with_logits": ("BCEWithLogitsLoss", _torch(Expects.LOGITS, "sigmoid")),
    "multilabel_soft_margin_loss": ("MultiLabelSoftMarginLoss",
                                    _torch(Expects.LOGITS, "sigmoid")),
    "binary_cross_entropy": ("BCELoss", _torch(Expects.PROB, "sigmoid")),
    "nll_loss": ("NLLLoss", _torch(Expects.LOGPROB, "log_softmax")),
    "kl_div": ("KLDivLoss", _torch(Expects.LOGPROB, "log_softmax")),
}

#: loss functions called directly: canonical name -> spec
LOSS_FUNCTIONS: dict[str, LossSpec] = {
    f"torch.nn.functional.{name}": spec for name, (_, spec) in _TORCH_LOSSES.items()
}
#: loss classes whose instances are called: canonical name -> spec of the instance call
LOSS_CLASSES: dict[str, LossSpec] = {}
for _name, (_class, _spec) in _TORCH_LOSSES.items():
    LOSS_CLASSES[f"torch.nn.{_class}"] = _spec
    LOSS_CLASSES[f"torch.nn.modules.loss.{_class}"] = _spec

# TensorFlow: tf.nn.<loss>(labels, logits, ...)
_TF_LOGITS = LossSpec(Expects.LOGITS, "softmax", 1, ("logits",))
_TF_SIGMOID = LossSpec(Expects.LOGITS, "sigmoid", 1, ("logits",))
for _prefix in ("tensorflow.nn", "tensorflow.compat.v1.nn"):
    LOSS_FUNCTIONS[f"{_prefix}.softmax_cross_entropy_with_logits"] = _TF_LOGITS
    LOSS_FUNCTIONS[f"{_prefix}.softmax_cross_entropy_with_logits_v2"] = _TF_LOGITS
    LOSS_FUNCTIONS[f"{_prefix}.sparse_softmax_cross_entropy_with_logits"] = _TF_LOGITS
    LOSS_FUNCTIONS[f"{_prefix}.sigmoid_cross_entropy_with_logits"] = _TF_SIGMOID
    LOSS_FUNCTIONS[f"{_prefix}.weighted_cross_entropy_with_logits"] = _TF_SIGMOID
LOSS_FUNCTIONS["tensorflow.compat.v1.losses.softmax_cross_entropy"] = _TF_LOGITS
LOSS_FUNCTIONS["tensorflow.compat.v1.losses.sparse_softmax_cross_entropy"] = _TF_LOGITS
LOSS_FUNCTIONS["tensorflow.compat.v1.losses.sigmoid_cross_entropy"] = _TF_SIGMOID

# Keras: objects are built with `from_logits` as their first parameter and called as
# loss(y_true, y_pred); functions are loss(y_true, y_pred, from_logits=False, ...).
_KERAS_LOSSES = {
    # function name: (class name, activation, from_logits position among the function's
    # positionals, among the class's), from the tf.keras.losses signatures (TF 2.13-2.16 docs)
    "categorical_crossentropy": ("CategoricalCrossentropy", "softmax", 2, 0),
    "sparse_categorical_crossentropy": ("SparseCategoricalCrossentropy", "softmax", 2, 0),
    "binary_crossentropy": ("BinaryCrossentropy", "sigmoid", 2, 0),
    # (y_true, y_pred, alpha, gamma, from_logits) and (alpha, gamma, from_logits)
    "categorical_focal_crossentropy": ("CategoricalFocalCrossentropy", "softmax", 4, 2),
    # (y_true, y_pred, apply_class_balancing, alpha, gamma, from_logits) and the class alike
    "binary_focal_crossentropy": ("BinaryFocalCrossentropy", "sigmoid", 5, 3),
}
#: Keras loss strings accepted by `model.compile(loss="...")`: from_logits is always False
KERAS_LOSS_STRINGS: dict[str, LossSpec] = {}
#: Keras loss classes: canonical name -> spec of the instance call
KERAS_LOSS_CLASSES: dict[str, LossSpec] = {}
for _name, (_class, _activation, _in_function, _in_class) in _KERAS_LOSSES.items():
    _function_spec = LossSpec(Expects.PROB, _activation, 1, ("y_pred",), True, _in_function,
                              _in_class)
    KERAS_LOSS_STRINGS[_name] = _function_spec
    for _prefix in ("tensorflow.keras.losses", "tensorflow.keras.metrics"):
        LOSS_FUNCTIONS[f"{_prefix}.{_name}"] = _function_spec
    # keras.backend.<loss>(target, output, ...): the same positions as the function
    LOSS_FUNCTIONS[f"tensorflow.keras.backend.{_name}"] = LossSpec(
        Expects.PROB, _activation, 1, ("output",), True, _in_function, _in_class)
    KERAS_LOSS_CLASSES[f"tensorflow.keras.losses.{_class}"] = _function_spec
LOSS_CLASSES.update(KERAS_LOSS_CLASSES)

#: the method that takes a Keras model's loss, and where `loss` sits among its positionals
KERAS_COMPILE = "compile"
KERAS_COMPILE_LOSS_POSITION = 1

# optax: <loss>(logits, labels); kl_divergence(log_predictions, targets)
_OPTAX_SOFTMAX = LossSpec(Expects.LOGITS, "softmax", 0, ("logits",))
_OPTAX_SIGMOID = LossSpec(Expects.LOGITS, "sigmoid", 0, ("logits",))
for _prefix in ("optax", "optax.losses"):
    for _name in ("softmax_cross_entropy", "softmax_cross_entropy_with_integer_labels",
                  "safe_softmax_cross_entropy", "poly_loss_cross_entropy"):
        LOSS_FUNCTIONS[f"{_prefix}.{_name}"] = _OPTAX_SOFTMAX
    for _name in ("sigmoid_binary_cross_entropy", "sigmoid_focal_loss"):
        LOSS_FUNCTIONS[f"{_prefix}.{_name}"] = _OPTAX_SIGMOID
    LOSS_FUNCTIONS[f"{_prefix}.kl_divergence"] = LossSpec(
        Expects.LOGPROB, "log_softmax", 0, ("log_predictions",))

#: Keras's fuzz factor: y_pred is clipped to [eps, 1 - eps] when from_logits=False
#: (keras.backend.epsilon() default, Keras documentation)
KERAS_EPSILON = 1e-7

#: final names of layer classes whose first (Keras) or second (PyTorch) argument is the width
CLASS_COUNT_ARGUMENTS: dict[str, tuple[int, str]] = {
    "torch.nn.Linear": (1, "out_features"),
    "torch.nn.LazyLinear": (0, "out_features"),
    "tensorflow.keras.layers.Dense": (0, "units"),
    "flax.linen.Dense": (0, "features"),
}

#: methods that add layers to a model after it is built (`model.add(layers.Activation(...))`,
#: `net.append(nn.Sigmoid())`): the last layer written in the constructor may not be the last
STACK_EDIT_METHODS = frozenset({"add", "append", "add_module", "insert", "extend"})
#: canonical-name prefixes of layers, for recognising such an edit
LAYER_PREFIXES = ("torch.nn.", "tensorflow.keras.layers.", "flax.linen.")


@dataclass(frozen=True)
class Normaliser:
    """A softmax or sigmoid written inline, and how its arguments are spelled."""

    #: "softmax" or "sigmoid"
    activation: str
    #: keyword names of the input
    input_keywords: tuple[str, ...]
    #: keyword of the class axis (None for the elementwise sigmoid)
    axis_keyword: str | None
    #: the axis used when none is passed; None when the framework guesses one from the rank
    default_axis: int | None


# Signatures checked with inspect under PyTorch 2.13: torch.nn.functional.softmax(input,
# dim=None, _stacklevel=3, dtype=None), whose dim=None picks 0 or 1 from the rank (a
# deprecated implicit choice, so unknown here); torch.softmax and torch.special.softmax
# (input, dim, *, dtype=None); torch.sigmoid(input); torch.special.expit(input).
# TensorFlow's tf.nn.softmax(logits, axis=None, name=None) normalises the last axis when
# axis is None, keras.activations.softmax(x, axis=-1); tf.sigmoid(x, name=None) and
# keras.activations.sigmoid(x) (TensorFlow 2.x and Keras 3 documentation, from memory).
_TORCH_SOFTMAX = Normaliser("softmax", ("input",), "dim", None)
_TORCH_SIGMOID = Normaliser("sigmoid", ("input",), None, None)
_TF_SOFTMAX = Normaliser("softmax", ("logits", "x"), "axis", -1)
_TF_SIGMOID = Normaliser("sigmoid", ("x",), None, None)
#: inline softmax/sigmoid functions: canonical name -> how they are called
INLINE_NORMALISERS: dict[str, Normaliser] = {
    "torch.softmax": _TORCH_SOFTMAX,
    "torch.nn.functional.softmax": _TORCH_SOFTMAX,
    "torch.special.softmax": _TORCH_SOFTMAX,
    "torch.sigmoid": _TORCH_SIGMOID,
    "torch.nn.functional.sigmoid": _TORCH_SIGMOID,
    "torch.special.expit": _TORCH_SIGMOID,
    "tensorflow.nn.softmax": _TF_SOFTMAX,
    "tensorflow.math.softmax": _TF_SOFTMAX,
    "tensorflow.keras.activations.softmax": _TF_SOFTMAX,
    "tensorflow.sigmoid": _TF_SIGMOID,
    "tensorflow.nn.sigmoid": _TF_SIGMOID,
    "tensorflow.math.sigmoid": _TF_SIGMOID,
    "tensorflow.keras.activations.sigmoid": _TF_SIGMOID,
}
#: torch.nn modules built inline and applied at once (`nn.Softmax(dim=1)(scores)`):
#: nn.Softmax(dim=None) and nn.Sigmoid() (inspect.signature, PyTorch 2.13)
INLINE_NORMALISER_MODULES: dict[str, Normaliser] = {
    "torch.nn.Softmax": _TORCH_SOFTMAX,
    "torch.nn.Sigmoid": _TORCH_SIGMOID,
}
#: tensor methods: Tensor.softmax(dim, dtype=None) and Tensor.sigmoid() (PyTorch 2.13)
INLINE_NORMALISER_METHODS: dict[str, Normaliser] = {
    "softmax": Normaliser("softmax", (), "dim", None),
    "sigmoid": _TORCH_SIGMOID,
}
#: the axis each logit loss normalises over, per framework: torch's cross-entropy takes the
#: classes on dim 1 for every input of rank >= 2 ("Input: (C), (N, C) or (N, C, d1, ...)",
#: torch.nn.CrossEntropyLoss docs), TensorFlow and Keras on the last axis unless `axis=`
#: says otherwise (tf.nn.softmax_cross_entropy_with_logits, keras.losses docs)
LOSS_CLASS_AXIS: dict[str, int] = {"torch": 1, "tensorflow": -1}
