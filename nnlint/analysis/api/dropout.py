"""Framework knowledge for the dropout rules (canonical names -> roles).

Signatures are those of the frameworks' documentation (PyTorch 2.x `torch.nn`,
`torch.nn.functional`; TensorFlow 2.x `tf.nn.dropout`, `tf.compat.v1.nn.dropout`,
`tf.keras.layers`; Keras 3; Flax `linen` and `nnx`; Haiku), read from memory of those pages.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class DropoutApi:
    """How one dropout entry point takes its rate and its on/off switch."""

    #: "torch", "tensorflow", "keras", "flax" or "haiku"
    framework: str
    #: a layer class (constructed with the rate, then called on inputs) vs a function
    is_layer: bool
    #: keyword of the drop rate (None when the entry point takes only a keep probability)
    rate_keyword: str | None
    #: keyword of the keep probability (TF1's `keep_prob`), None elsewhere
    keep_keyword: str | None
    #: 0-based position of the rate or keep argument in the constructor / function call
    position: int | None
    #: True when the positional argument at `position` is a keep probability (TF1)
    position_is_keep: bool
    #: keyword that switches dropping on or off at call time (None: always on)
    switch_keyword: str | None
    #: 0-based position of that switch in a functional call (None: keyword only)
    switch_position: int | None
    #: the switch value that turns dropping ON (`training=True`, `deterministic=False`)
    switch_on_value: bool
    #: True when omitting the switch leaves dropping on (torch's functional default)
    is_on_by_default: bool
    #: True for inverted dropout (kept units divided by 1 - rate during training)
    is_inverted: bool


def _torch_layer(inverted: bool = True) -> DropoutApi:
    # torch.nn.Dropout(p=0.5, inplace=False): the module reads self.training (PyTorch docs)
    return DropoutApi("torch", True, "p", None, 0, False, None, None, True, False, inverted)


def _torch_functional(on_by_default: bool, inverted: bool = True) -> DropoutApi:
    # torch.nn.functional.dropout(input, p=0.5, training=True, inplace=False) (PyTorch docs);
    # alpha_dropout and feature_alpha_dropout default to training=False.
    return DropoutApi("torch", False, "p", None, 1, False, "training", 2, True, on_by_default,
                      inverted)


def _torch_native(inverted: bool = True) -> DropoutApi:
    # torch.dropout(input, p, train): all three arguments are required (PyTorch native API)
    return DropoutApi("torch", False, "p", None, 1, False, "train", 2, True, False, inverted)


def _keras_layer(inverted: bool = True) -> DropoutApi:
    # keras.layers.Dropout(rate, noise_shape=None, seed=None); call(inputs, training=None)
    return DropoutApi("keras", True, "rate", None, 0, False, "training", None, True, False,
                      inverted)


def _flax_layer() -> DropoutApi:
    # flax.linen.Dropout(rate, broadcast_dims=(), deterministic=None, ...) and
    # flax.nnx.Dropout(rate, *, deterministic=False, ...): deterministic=True turns it off
    return DropoutApi("flax", True, "rate", None, 0, False, "deterministic", None, False,
                      False, True)


#: canonical name -> how that dropout entry point is called
DROPOUT_APIS: dict[str, DropoutApi] = {
    "torch.nn.Dropout": _torch_layer(),
    "torch.nn.Dropout1d": _torch_layer(),
    "torch.nn.Dropout2d": _torch_layer(),
    "torch.nn.Dropout3d": _torch_layer(),
    # alpha dropout keeps mean and variance for SELU networks instead of dividing by 1 - p
    # (Klambauer et al. 2017, "Self-Normalizing Neural Networks", NeurIPS)
    "torch.nn.AlphaDropout": _torch_layer(inverted=False),
    "torch.nn.FeatureAlphaDropout": _torch_layer(inverted=False),
    "torch.nn.functional.dropout": _torch_functional(True),
    "torch.nn.functional.dropout1d": _torch_functional(True),
    "torch.nn.functional.dropout2d": _torch_functional(True),
    "torch.nn.functional.dropout3d": _torch_functional(True),
    "torch.nn.functional.alpha_dropout": _torch_functional(False, inverted=False),
    "torch.nn.functional.feature_alpha_dropout": _torch_functional(False, inverted=False),
    "torch.dropout": _torch_native(),
    "torch.feature_dropout": _torch_native(),
    "torch.alpha_dropout": _torch_native(inverted=False),
    "torch.feature_alpha_dropout": _torch_native(inverted=False),
    # tf.nn.dropout(x, rate, noise_shape=None, seed=None, name=None) in TF2: always on
    "tensorflow.nn.dropout": DropoutApi("tensorflow", False, "rate", None, 1, False, None,
                                        None, True, True, True),
    # tf.compat.v1.nn.dropout(x, keep_prob=None, noise_shape=None, seed=None, name=None,
    # rate=None): the second position is the keep probability, `rate=` the drop rate
    "tensorflow.compat.v1.nn.dropout": DropoutApi("tensorflow", False, "rate", "keep_prob", 1,
                                                  True, None, None, True, True, True),
    "tensorflow.keras.layers.Dropout": _keras_layer(),
    "tensorflow.keras.layers.SpatialDropout1D": _keras_layer(),
    "tensorflow.keras.layers.SpatialDropout2D": _keras_layer(),
    "tensorflow.keras.layers.SpatialDropout3D": _keras_layer(),
    "tensorflow.keras.layers.AlphaDropout": _keras_layer(inverted=False),
    # multiplicative Gaussian noise of mean 1: nothing to rescale (Keras docs)
    "tensorflow.keras.layers.GaussianDropout": _keras_layer(inverted=False),
    # keras.random.dropout(inputs, rate, noise_shape=None, seed=None) (Keras 3): always on
    "tensorflow.keras.random.dropout": DropoutApi("keras", False, "rate", None, 1, False, None,
                                                  None, True, True, True),
    "flax.linen.Dropout": _flax_layer(),
    "flax.nnx.Dropout": _flax_layer(),
    "flax.experimental.nnx.Dropout": _flax_layer(),
    # hk.dropout(rng, rate, x): always on; Haiku code passes rate 0 at evaluation
    "haiku.dropout": DropoutApi("haiku", False, "rate", None, 1, False, None, None, True, True,
                                True),
}

#: functional dropout that takes its on/off switch as this keyword, so `nnlint fix` may pass
#: `training=self.training`: inspect.signature of each under PyTorch 2.13 shows
#: (input, p=0.5, training=True, inplace=False); alpha_dropout and feature_alpha_dropout
#: take the same keyword with default False. torch.dropout(input, p, train) is not here:
#: its switch `train` is required (a call without it raises TypeError), so never missing.
MODE_KEYWORD_FUNCTIONS: dict[str, str] = {
    f"torch.nn.functional.{name}": "training"
    for name in ("dropout", "dropout1d", "dropout2d", "dropout3d", "alpha_dropout",
                 "feature_alpha_dropout")
}

#: uniform random draws a hand-written mask compares with the keep probability
UNIFORM_RANDOM_FUNCTIONS = frozenset({
    "numpy.random.rand", "numpy.random.random", "numpy.random.random_sample",
    "numpy.random.uniform", "torch.rand", "torch.rand_like", "jax.random.uniform",
    "tensorflow.random.uniform",
})
#: method names of generator objects and tensors that draw uniforms (`rng.random(shape)`)
UNIFORM_RANDOM_METHODS = frozenset({"random", "rand", "uniform", "random_sample", "uniform_",
                                    "rand_like"})
#: functions that draw a Bernoulli mask directly
BERNOULLI_FUNCTIONS = frozenset({
    "jax.random.bernoulli", "torch.bernoulli", "numpy.random.binomial",
    "tensorflow.random.stateless_binomial",
})
BERNOULLI_METHODS = frozenset({"binomial", "bernoulli", "bernoulli_"})

#: context managers under which code only evaluates (no autograd graph is built)
NO_GRAD_CONTEXTS = frozenset({
    "torch.no_grad", "torch.inference_mode", "torch.autograd.no_grad",
    "torch.autograd.grad_mode.no_grad", "torch.autograd.grad_mode.inference_mode",
})
#: `torch.set_grad_enabled(False)` is a no-grad block as well
GRAD_SWITCH_CONTEXTS = frozenset({"torch.set_grad_enabled"})

#: base classes (canonical prefixes) whose subclasses are PyTorch modules with `self.training`
TORCH_MODULE_BASES = (
    "torch.nn.",
    "lightning.pytorch.LightningModule", "lightning.pytorch.core.LightningModule",
    "lightning.LightningModule",
    "transformers.PreTrainedModel", "transformers.modeling_utils.PreTrainedModel",
)

#: packages whose model calls take a training switch by keyword (Keras `training=`, Flax
#: `deterministic=` / `train=`, Haiku `is_training=`)
SWITCHED_CALL_PACKAGES = ("tensorflow", "flax", "haiku", "jax")

#: keyword of a model/layer call -> the value that forces training behaviour
TRAINING_SWITCH_KEYWORDS = {
    "training": True,      # Keras Layer.__call__ (Keras docs)
    "train": True,         # common Flax module argument (Flax examples)
    "is_training": True,   # common Haiku convention (Haiku examples)
    "deterministic": False,  # Flax Dropout (Flax docs)
}

#: TensorFlow 1 graph-mode APIs (removed from the TF2 namespace): a file using them is TF1
#: code, where tf.nn.dropout's second position was `keep_prob` (TensorFlow 1.x docs)
TF1_ONLY_APIS = frozenset({
    "tensorflow.placeholder", "tensorflow.placeholder_with_default", "tensorflow.Session",
    "tensorflow.InteractiveSession", "tensorflow.get_variable", "tensorflow.variable_scope",
    "tensorflow.global_variables_initializer", "tensorflow.train.AdamOptimizer",
    "tensorflow.train.GradientDescentOptimizer", "tensorflow.train.MomentumOptimizer",
    "tensorflow.train.RMSPropOptimizer", "tensorflow.app.flags", "tensorflow.flags",
})
TF1_ONLY_PREFIXES = ("tensorflow.contrib.",)
#: last components of those names: the rule resolves an attribute only when it matches one
TF1_ONLY_NAMES = frozenset(name.rsplit(".", 1)[1] for name in TF1_ONLY_APIS) | {"contrib"}
