"""Framework knowledge for the init rules: layers, their default inits, initializers, fills.

Keyed by canonical dotted names (names.py). Variance rules are those of signal.Init:
("fan_in", c) means variance c / fan_in, ("fan_avg", c) means c / ((fan_in + fan_out) / 2).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from nnlint.analysis.signal import Init

# PyTorch nn.Linear/ConvNd reset_parameters: kaiming_uniform_(a=sqrt(5)) gives the uniform
# bound gain * sqrt(3 / fan_in) with gain sqrt(2 / (1 + 5)), i.e. 1 / sqrt(fan_in), variance
# 1 / (3 fan_in); the bias is uniform with the same bound (PyTorch source, from memory;
# tests/test_signal.py checks the variance against torch when it is installed)
TORCH_DEFAULT = Init("random", variance_rule=("fan_in", 1.0 / 3.0),
                     spelling="the default uniform init (bound 1/sqrt(fan_in))",
                     is_default=True)
# Keras Dense/Conv: kernel glorot_uniform, bias zeros (Keras documentation)
GLOROT_UNIFORM = Init("random", variance_rule=("fan_avg", 1.0), spelling="glorot_uniform",
                      is_default=True)
# Flax linen Dense/Conv: kernel lecun_normal (variance 1 / fan_in), bias zeros (Flax docs)
LECUN_NORMAL = Init("random", variance_rule=("fan_in", 1.0), spelling="lecun_normal",
                    is_default=True)
ZEROS = Init("zeros", spelling="zeros", is_default=True)

#: gains of torch.nn.init.calculate_gain (PyTorch documentation; checked in the tests)
TORCH_GAINS = {
    "linear": 1.0, "conv1d": 1.0, "conv2d": 1.0, "conv3d": 1.0, "sigmoid": 1.0,
    "tanh": 5.0 / 3.0, "relu": math.sqrt(2.0), "selu": 3.0 / 4.0,
}


def torch_gain(nonlinearity: str, negative_slope: float = 0.01) -> float | None:
    """torch.nn.init.calculate_gain; leaky_relu uses sqrt(2 / (1 + slope^2))."""
    if nonlinearity == "leaky_relu":
        return math.sqrt(2.0 / (1.0 + negative_slope ** 2))
    return TORCH_GAINS.get(nonlinearity)


@dataclass(frozen=True)
class LayerSpec:
    """A weight-layer constructor: where its widths are and what it does by default."""

    framework: str  # "torch", "keras", "flax"
    #: (position, keyword) of the input width (torch only); None: inferred from the input
    fan_in_argument: tuple[int, str] | None
    #: (position, keyword) of the output width
    units_argument: tuple[int, str]
    #: (position, keyword) of the kernel size, for convolutions
    kernel_argument: tuple[int, str] | None
    #: spatial dimensions of a convolution (0 for dense)
    dimensions: int
    default_weight: Init
    default_bias: Init


def _torch(dimensions: int = 0) -> LayerSpec:
    kernel = (2, "kernel_size") if dimensions else None
    units = (1, "out_features") if not dimensions else (1, "out_channels")
    fan_in = (0, "in_features") if not dimensions else (0, "in_channels")
    return LayerSpec("torch", fan_in, units, kernel, dimensions, TORCH_DEFAULT, TORCH_DEFAULT)


def _keras(dimensions: int = 0) -> LayerSpec:
    units = (0, "filters") if dimensions else (0, "units")
    kernel = (1, "kernel_size") if dimensions else None
    return LayerSpec("keras", None, units, kernel, dimensions, GLOROT_UNIFORM, ZEROS)


def _flax(dimensions: int = 0) -> LayerSpec:
    kernel = (1, "kernel_size") if dimensions else None
    return LayerSpec("flax", None, (0, "features"), kernel, dimensions, LECUN_NORMAL, ZEROS)


WEIGHT_LAYERS: dict[str, LayerSpec] = {
    "torch.nn.Linear": _torch(),
    "torch.nn.Conv1d": _torch(1), "torch.nn.Conv2d": _torch(2), "torch.nn.Conv3d": _torch(3),
    "tensorflow.keras.layers.Dense": _keras(),
    "tensorflow.keras.layers.Conv1D": _keras(1), "tensorflow.keras.layers.Conv2D": _keras(2),
    "tensorflow.keras.layers.Conv3D": _keras(3),
    "flax.linen.Dense": _flax(), "flax.linen.Conv": _flax(2),
}

#: activation modules and functions -> the activation's name in signal.py
ACTIVATIONS: dict[str, str] = {
    "torch.nn.ReLU": "relu", "torch.nn.ReLU6": "relu6", "torch.nn.Tanh": "tanh",
    "torch.nn.Sigmoid": "sigmoid", "torch.nn.LeakyReLU": "leaky_relu", "torch.nn.ELU": "elu",
    "torch.nn.GELU": "gelu", "torch.nn.SiLU": "silu",
    "torch.relu": "relu", "torch.tanh": "tanh", "torch.sigmoid": "sigmoid",
    "torch.nn.functional.relu": "relu", "torch.nn.functional.relu6": "relu6",
    "torch.nn.functional.tanh": "tanh", "torch.nn.functional.sigmoid": "sigmoid",
    "torch.nn.functional.leaky_relu": "leaky_relu", "torch.nn.functional.elu": "elu",
    "torch.nn.functional.gelu": "gelu", "torch.nn.functional.silu": "silu",
    "numpy.tanh": "tanh", "jax.numpy.tanh": "tanh", "scipy.special.expit": "sigmoid",
    "jax.nn.relu": "relu", "jax.nn.tanh": "tanh", "jax.nn.sigmoid": "sigmoid",
    "jax.nn.gelu": "gelu", "jax.nn.silu": "silu", "jax.nn.elu": "elu",
    "jax.nn.leaky_relu": "leaky_relu", "jax.nn.relu6": "relu6",
    "flax.linen.relu": "relu", "flax.linen.tanh": "tanh", "flax.linen.sigmoid": "sigmoid",
    "flax.linen.gelu": "gelu", "flax.linen.silu": "silu", "flax.linen.elu": "elu",
    "flax.linen.leaky_relu": "leaky_relu",
    "tensorflow.nn.relu": "relu", "tensorflow.nn.tanh": "tanh", "tensorflow.tanh": "tanh",
    "tensorflow.nn.sigmoid": "sigmoid", "tensorflow.sigmoid": "sigmoid",
    "tensorflow.keras.layers.ReLU": "relu",
}

#: Keras `activation=` strings (Keras documentation, keras.activations)
KERAS_ACTIVATION_NAMES: dict[str, str] = {
    "linear": "linear", "relu": "relu", "relu6": "relu6", "tanh": "tanh",
    "sigmoid": "sigmoid", "elu": "elu", "gelu": "gelu", "silu": "silu", "swish": "silu",
    "leaky_relu": "leaky_relu", "softmax": "softmax",
}

#: method forms on a tensor (`x.relu()`)
ACTIVATION_METHODS: dict[str, str] = {"relu": "relu", "tanh": "tanh", "sigmoid": "sigmoid"}

#: modules and functions that pass the signal through unchanged for these checks
PASS_THROUGH: frozenset[str] = frozenset({
    "torch.nn.Dropout", "torch.nn.Identity", "torch.nn.Flatten", "torch.flatten",
    "torch.nn.functional.dropout", "tensorflow.keras.layers.Dropout",
    "tensorflow.keras.layers.Flatten", "flax.linen.Dropout", "numpy.reshape",
})
PASS_THROUGH_METHODS = frozenset({"flatten", "view", "reshape", "squeeze", "unsqueeze",
                                  "contiguous", "float", "to"})

#: layers that reshape statistics (pooling, normalisation): structure checks still hold for
#: identical units, the infinite-width scale model does not
RESCALING: frozenset[str] = frozenset({
    "torch.nn.BatchNorm1d", "torch.nn.BatchNorm2d", "torch.nn.LayerNorm",
    "tensorflow.keras.layers.BatchNormalization", "tensorflow.keras.layers.LayerNormalization",
    "flax.linen.BatchNorm", "flax.linen.LayerNorm",
    "torch.nn.MaxPool1d", "torch.nn.MaxPool2d", "torch.nn.AvgPool2d",
    "torch.nn.AdaptiveAvgPool2d", "torch.nn.AdaptiveAvgPool1d",
    "torch.nn.functional.max_pool2d", "torch.nn.functional.avg_pool2d",
    "torch.nn.functional.adaptive_avg_pool2d",
    "tensorflow.keras.layers.MaxPooling2D", "tensorflow.keras.layers.AveragePooling2D",
    "tensorflow.keras.layers.GlobalAveragePooling2D", "flax.linen.max_pool",
    "flax.linen.avg_pool",
})

SEQUENTIALS = frozenset({"torch.nn.Sequential", "tensorflow.keras.Sequential",
                         "tensorflow.keras.models.Sequential", "flax.linen.Sequential"})

#: base classes whose subclasses define a forward method (and its name)
MODULE_BASES: dict[str, str] = {
    "torch.nn.Module": "forward", "torch.nn.modules.module.Module": "forward",
    "lightning.pytorch.LightningModule": "forward", "flax.linen.Module": "__call__",
    "tensorflow.keras.Model": "call", "tensorflow.keras.layers.Layer": "call",
}
#: method names a plain (NumPy/JAX) model class uses for its forward pass
PLAIN_FORWARD_NAMES = ("forward", "__call__", "predict_proba", "predict", "call")

KERAS_INPUTS = frozenset({"tensorflow.keras.Input", "tensorflow.keras.layers.Input"})

# -- initializers -----------------------------------------------------------------------------
#: torch.nn.init functions: name -> kind ("zeros", "ones", "constant", or a random family)
TORCH_INIT_FUNCTIONS: dict[str, str] = {
    "torch.nn.init.zeros_": "zeros", "torch.nn.init.ones_": "ones",
    "torch.nn.init.constant_": "constant", "torch.nn.init.normal_": "normal",
    "torch.nn.init.uniform_": "uniform", "torch.nn.init.trunc_normal_": "normal",
    "torch.nn.init.xavier_uniform_": "xavier", "torch.nn.init.xavier_normal_": "xavier",
    "torch.nn.init.kaiming_uniform_": "kaiming", "torch.nn.init.kaiming_normal_": "kaiming",
    "torch.nn.init.orthogonal_": "random", "torch.nn.init.sparse_": "random",
    "torch.nn.init.eye_": "unknown", "torch.nn.init.dirac_": "unknown",
}
#: in-place tensor methods that fill a tensor
TENSOR_FILL_METHODS: dict[str, str] = {
    "zero_": "zeros", "fill_": "constant", "normal_": "normal", "uniform_": "uniform",
}

#: Keras initializer strings and classes (Keras documentation, keras.initializers)
KERAS_INITIALIZERS: dict[str, Init] = {
    "zeros": ZEROS, "ones": Init("constant", 1.0, spelling="ones"),
    "glorot_uniform": GLOROT_UNIFORM,
    "glorot_normal": Init("random", variance_rule=("fan_avg", 1.0), spelling="glorot_normal"),
    "he_normal": Init("random", variance_rule=("fan_in", 2.0), spelling="he_normal"),
    "he_uniform": Init("random", variance_rule=("fan_in", 2.0), spelling="he_uniform"),
    "lecun_normal": LECUN_NORMAL,
    "lecun_uniform": Init("random", variance_rule=("fan_in", 1.0), spelling="lecun_uniform"),
    # RandomNormal/TruncatedNormal default stddev 0.05, RandomUniform (-0.05, 0.05)
    "random_normal": Init("random", variance_rule=("fixed", 0.05 ** 2), spelling="random_normal"),
    "truncated_normal": Init("random", variance_rule=None, spelling="truncated_normal"),
    "random_uniform": Init("random", variance_rule=("fixed", 0.1 ** 2 / 12),
                           spelling="random_uniform"),
    "orthogonal": Init("random", spelling="orthogonal"),
    "identity": Init("unknown", spelling="identity"),
}
KERAS_INITIALIZER_CLASSES: dict[str, str] = {
    "Zeros": "zeros", "Ones": "ones", "Constant": "constant", "GlorotUniform": "glorot_uniform",
    "GlorotNormal": "glorot_normal", "HeNormal": "he_normal", "HeUniform": "he_uniform",
    "LecunNormal": "lecun_normal", "LecunUniform": "lecun_uniform",
    "RandomNormal": "random_normal", "RandomUniform": "random_uniform",
    "TruncatedNormal": "truncated_normal", "Orthogonal": "orthogonal",
    "Identity": "identity",
}
KERAS_INITIALIZER_MODULES = ("tensorflow.keras.initializers.",)

#: Flax/JAX initializers (flax.linen.initializers re-exports jax.nn.initializers)
FLAX_INITIALIZER_MODULES = ("flax.linen.initializers.", "jax.nn.initializers.",
                            "flax.linen.")
FLAX_INITIALIZERS: dict[str, str] = {
    "zeros": "zeros", "zeros_init": "zeros", "ones": "ones", "ones_init": "ones",
    "constant": "constant", "normal": "normal", "lecun_normal": "lecun_normal",
    "glorot_uniform": "glorot_uniform", "xavier_uniform": "glorot_uniform",
    "glorot_normal": "glorot_normal", "xavier_normal": "glorot_normal",
    "he_normal": "he_normal", "kaiming_normal": "he_normal", "he_uniform": "he_uniform",
    "kaiming_uniform": "he_uniform", "lecun_uniform": "lecun_uniform",
    "orthogonal": "orthogonal", "uniform": "uniform",
}
#: of those, the ones used without a call (`kernel_init=nn.initializers.zeros`)
FLAX_UNCALLED = frozenset({"zeros", "ones"})

# -- array constructors (NumPy, JAX, torch tensors) ----------------------------------------
ZERO_ARRAYS = frozenset({"numpy.zeros", "jax.numpy.zeros", "torch.zeros"})
ONE_ARRAYS = frozenset({"numpy.ones", "jax.numpy.ones", "torch.ones"})
FULL_ARRAYS = frozenset({"numpy.full", "jax.numpy.full", "torch.full"})
#: standard normal draws: name -> whether the shape is given as separate arguments
STANDARD_NORMAL = {"numpy.random.randn": True, "torch.randn": True,
                   "numpy.random.standard_normal": False}
NORMAL_DRAWS = frozenset({"numpy.random.normal"})
UNIFORM_DRAWS = frozenset({"numpy.random.uniform"})
JAX_NORMAL = frozenset({"jax.random.normal"})
JAX_UNIFORM = frozenset({"jax.random.uniform"})
#: numpy Generator methods (`rng = np.random.default_rng(); rng.normal(...)`)
GENERATORS = frozenset({"numpy.random.default_rng", "numpy.random.RandomState"})
GENERATOR_METHODS = frozenset({"normal", "standard_normal", "uniform", "randn"})
PARAMETER_WRAPPERS = frozenset({"torch.nn.Parameter", "torch.nn.parameter.Parameter",
                                "jax.numpy.asarray", "numpy.asarray"})
MATMUL_FUNCTIONS = frozenset({"numpy.dot", "numpy.matmul", "jax.numpy.dot",
                              "jax.numpy.matmul", "torch.matmul", "torch.mm"})
EXP_FUNCTIONS = frozenset({"numpy.exp", "jax.numpy.exp", "torch.exp"})
MAXIMUM_FUNCTIONS = frozenset({"numpy.maximum", "jax.numpy.maximum", "torch.maximum"})
SQRT_FUNCTIONS = frozenset({"numpy.sqrt", "math.sqrt", "jax.numpy.sqrt"})
KERAS_MODELS = frozenset({"tensorflow.keras.Model", "tensorflow.keras.models.Model"})
KERAS_ACTIVATION_LAYERS = frozenset({"tensorflow.keras.layers.Activation"})
MODULE_LISTS = frozenset({"torch.nn.ModuleList"})
#: keyword names of (weight init, bias init, bias switch) per framework ("" : none)
INIT_KEYWORDS: dict[str, tuple[str, str, str]] = {
    "torch": ("", "", "bias"),
    "keras": ("kernel_initializer", "bias_initializer", "use_bias"),
    "flax": ("kernel_init", "bias_init", "use_bias"),
}
