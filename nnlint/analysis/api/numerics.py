"""Framework knowledge for value facts and the numerics rules (canonical names -> roles).

Names are canonical (names.py): `keras.*` is `tensorflow.keras.*`. Which functions produce
probabilities, log-probabilities, exact zeros or positive values comes from each library's
documentation of the function (PyTorch, NumPy, SciPy, JAX, TensorFlow, Flax).
"""
from __future__ import annotations


def _spell(prefixes: tuple[str, ...], names: tuple[str, ...]) -> frozenset[str]:
    return frozenset(f"{prefix}.{name}" for prefix in prefixes for name in names)


_TORCH = ("torch", "torch.nn.functional", "torch.special")
_NUMPY = ("numpy", "jax.numpy", "tensorflow.experimental.numpy", "cupy")
_TF = ("tensorflow", "tensorflow.math", "tensorflow.nn", "tensorflow.keras.activations",
       "tensorflow.keras.ops")
_JAX_NN = ("jax.nn", "flax.linen", "flax.nnx", "flax.linen.activation")
_SCIPY = ("scipy.special", "jax.scipy.special")

#: canonical function -> producer of a probability ("softmax" or "sigmoid")
PROB_FUNCTIONS: dict[str, str] = {
    **{name: "softmax" for name in _spell(_TORCH + _TF + _JAX_NN + _SCIPY, ("softmax",))},
    **{name: "softmax" for name in _spell(("torch.nn.functional",), ("gumbel_softmax",))},
    **{name: "sigmoid" for name in _spell(_TORCH + _TF + _JAX_NN, ("sigmoid",))},
    **{name: "sigmoid" for name in _spell(_SCIPY + ("torch.special",), ("expit",))},
}

#: functions returning log-probabilities (never exactly 0 as a probability would be)
LOGPROB_FUNCTIONS = _spell(_TORCH + _TF + _JAX_NN + _SCIPY,
                           ("log_softmax", "logsigmoid", "log_sigmoid", "log_expit"))

#: functions whose output is >= 0 and exactly 0 for a whole range of inputs
ZERO_PRODUCING_FUNCTIONS: dict[str, str] = {
    **{name: "ReLU" for name in _spell(_TORCH + _TF + _JAX_NN, ("relu", "relu6"))},
    **{name: "hard sigmoid" for name in _spell(_TORCH + _TF + _JAX_NN,
                                               ("hardsigmoid", "hard_sigmoid"))},
    **{name: "count" for name in _spell(("numpy", "jax.numpy", "torch"), ("bincount",))},
    **{name: "count" for name in _spell(("tensorflow", "tensorflow.math"), ("bincount",))},
}

#: functions whose output is > 0 (exp may underflow, but log(exp(x)) is x: not flagged)
POSITIVE_FUNCTIONS = _spell(_TORCH + _NUMPY + _TF + _JAX_NN + ("math",), ("exp", "cosh")) \
    | _spell(_TORCH + _TF + _JAX_NN, ("softplus",))

#: exp-family functions, for the softmax and log-sum-exp patterns
EXP_FUNCTIONS = _spell(_TORCH + _NUMPY + ("tensorflow", "tensorflow.math", "math"), ("exp",))

#: functions whose output is >= 0 but 0 only where the input is (not treated as zero-prone)
NONNEG_FUNCTIONS = _spell(_TORCH + _NUMPY + _TF, ("abs", "absolute", "square", "sqrt"))

#: log-family functions that are undefined at 0 (log1p and xlogy are the safe forms)
LOG_FUNCTIONS = _spell(("torch", "torch.special") + _NUMPY + ("math",),
                       ("log", "log2", "log10")) \
    | _spell(("tensorflow", "tensorflow.math"), ("log",))
LOG_METHODS = frozenset({"log", "log2", "log10", "log_", "log2_", "log10_"})

#: sum reductions (function forms take the tensor first; methods are `x.sum(...)`)
SUM_FUNCTIONS = _spell(("torch",) + _NUMPY, ("sum", "nansum")) \
    | _spell(("tensorflow", "tensorflow.math"), ("reduce_sum",))
SUM_METHODS = frozenset({"sum", "nansum"})

#: reductions that, subtracted before exp, make softmax/log-sum-exp safe (by final name)
SHIFT_NAMES = frozenset({"max", "amax", "nanmax", "reduce_max", "logsumexp",
                         "reduce_logsumexp", "max_pool", "cummax"})

#: clamp-style functions: canonical name -> (lower-bound keyword names, upper-bound keywords)
CLAMP_FUNCTIONS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    **{name: (("min",), ("max",)) for name in _spell(("torch",), ("clamp", "clip"))},
    **{name: (("a_min", "min"), ("a_max", "max")) for name in _spell(_NUMPY, ("clip",))},
    **{name: (("clip_value_min",), ("clip_value_max",))
       for name in _spell(("tensorflow",), ("clip_by_value",))},
}
CLAMP_METHODS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "clamp": (("min",), ("max",)), "clip": (("min", "a_min"), ("max", "a_max")),
    "clamp_": (("min",), ("max",)), "clip_": (("min",), ("max",)),
    "clamp_min": (("min",), ()), "clamp_min_": (("min",), ()),
}
#: elementwise maximum: either argument is the floor of the other
MAXIMUM_FUNCTIONS = _spell(("torch",) + _NUMPY + ("tensorflow", "tensorflow.math"),
                           ("maximum", "fmax"))
#: the final names of every clamp-style function and method (a cheap first test)
CLAMP_FINAL_NAMES = frozenset(name.rpartition(".")[2] for name in (
    *CLAMP_FUNCTIONS, *MAXIMUM_FUNCTIONS)) | frozenset(CLAMP_METHODS)

#: `where(condition, a, b)`: the masking guard of a log
WHERE_FUNCTIONS = _spell(("torch",) + _NUMPY + ("tensorflow",), ("where",))

#: functions that keep the values of their first argument (shape changes, indexing)
PASS_THROUGH_FUNCTIONS = _spell(("torch",) + _NUMPY + ("tensorflow",),
                                ("squeeze", "unsqueeze", "reshape", "flatten", "gather",
                                 "index_select", "take_along_dim", "take_along_axis",
                                 "expand_dims", "transpose", "permute", "asarray", "array",
                                 "convert_to_tensor", "stop_gradient")) \
    | frozenset({"jax.lax.stop_gradient"})
PASS_THROUGH_METHODS = frozenset({
    "squeeze", "unsqueeze", "view", "view_as", "reshape", "flatten", "permute", "transpose",
    "contiguous", "float", "double", "half", "bfloat16", "to", "cpu", "cuda", "detach",
    "clone", "numpy", "type", "type_as", "expand", "expand_as", "gather", "index_select",
    "take", "astype", "copy", "squeeze_", "unsqueeze_", "detach_", "item", "tolist",
})

#: methods of a module object that return the module itself (`model.to(device)`)
MODULE_PRESERVING_METHODS = frozenset({
    "to", "cuda", "cpu", "eval", "train", "half", "float", "double", "bfloat16",
    "requires_grad_", "share_memory", "apply", "to_empty", "xpu", "mps",
})
#: methods that run a model like a call does
MODEL_RUN_METHODS = frozenset({"forward", "predict", "predict_on_batch", "__call__", "call"})
#: methods of a module class whose return is what calling an instance returns
FORWARD_METHODS = ("forward", "call", "__call__")

#: layer classes and what calling an instance returns
PROB_LAYERS: dict[str, str] = {
    "torch.nn.Softmax": "softmax", "torch.nn.Softmax2d": "softmax",
    "torch.nn.Sigmoid": "sigmoid", "tensorflow.keras.layers.Softmax": "softmax",
}
LOGPROB_LAYERS = frozenset({"torch.nn.LogSoftmax", "torch.nn.LogSigmoid"})
ZERO_PRODUCING_LAYERS: dict[str, str] = {
    "torch.nn.ReLU": "ReLU", "torch.nn.ReLU6": "ReLU", "torch.nn.Hardsigmoid": "hard sigmoid",
    "tensorflow.keras.layers.ReLU": "ReLU",
}
#: affine layers whose output, with no activation, is raw scores (logits)
LOGITS_LAYERS = frozenset({
    "torch.nn.Linear", "torch.nn.LazyLinear", "torch.nn.Bilinear",
    "torch.nn.Conv1d", "torch.nn.Conv2d", "torch.nn.Conv3d",
    "torch.nn.LazyConv1d", "torch.nn.LazyConv2d", "torch.nn.LazyConv3d",
    "torch.nn.ConvTranspose1d", "torch.nn.ConvTranspose2d", "torch.nn.ConvTranspose3d",
    "tensorflow.keras.layers.Dense", "tensorflow.keras.layers.Conv1D",
    "tensorflow.keras.layers.Conv2D", "tensorflow.keras.layers.Conv3D",
    "flax.linen.Dense", "flax.linen.Conv", "flax.nnx.Linear", "haiku.Linear",
    "equinox.nn.Linear",
})
LOGITS_FUNCTIONS = frozenset({"torch.nn.functional.linear", "torch.nn.functional.conv1d",
                              "torch.nn.functional.conv2d", "torch.nn.functional.conv3d"})
#: Keras layers that accept `activation=`
KERAS_ACTIVATION_LAYERS_PREFIX = "tensorflow.keras.layers."
KERAS_ACTIVATION_LAYER = "tensorflow.keras.layers.Activation"
#: layers that leave values as they are (so a stack's output is that of the layer before)
TRANSPARENT_LAYERS = frozenset({
    "torch.nn.Flatten", "torch.nn.Unflatten", "torch.nn.Identity",
    "tensorflow.keras.layers.Flatten", "tensorflow.keras.layers.Reshape",
})
SEQUENTIAL_CLASSES = frozenset({"torch.nn.Sequential", "tensorflow.keras.Sequential",
                                "tensorflow.keras.models.Sequential", "flax.linen.Sequential"})
#: Keras functional models: Model(inputs, outputs)
KERAS_MODEL_CLASSES = frozenset({"tensorflow.keras.Model", "tensorflow.keras.models.Model"})

#: Keras activation strings (keras.activations docs) -> (kind name, producer)
KERAS_ACTIVATIONS: dict[str, tuple[str, str]] = {
    "softmax": ("PROB", "softmax"), "sigmoid": ("PROB", "sigmoid"),
    "log_softmax": ("LOGPROB", "log_softmax"), "relu": ("NONNEG", "ReLU"),
    "relu6": ("NONNEG", "ReLU"), "hard_sigmoid": ("NONNEG", "hard sigmoid"),
    "exponential": ("POSITIVE", "exp"), "softplus": ("POSITIVE", "softplus"),
    "linear": ("LOGITS", "linear layer"),
}

#: sparse probability maps: exact zeros by design (Martins & Astudillo 2016, sparsemax;
#: Peters et al. 2019, entmax), matched by the function's final name
SPARSE_PROB_NAMES = frozenset({"sparsemax", "entmax15", "entmax_bisect", "sparsemax_bisect",
                               "entmax"})

#: tensor methods that produce facts
PROB_METHODS = {"softmax": "softmax", "sigmoid": "sigmoid", "sigmoid_": "sigmoid"}
LOGPROB_METHODS = frozenset({"log_softmax"})
POSITIVE_METHODS = frozenset({"exp", "exp_", "cosh"})
ZERO_PRODUCING_METHODS = {"relu": "ReLU", "relu_": "ReLU"}
NONNEG_METHODS = frozenset({"abs", "square", "sqrt", "abs_"})

#: functions that, wrapping a log, show the author handles -inf/NaN (np.errstate, nan_to_num)
ERRSTATE_CONTEXTS = frozenset({"numpy.errstate", "jax.numpy.errstate"})

#: producers CUDA autocast runs in float32 even inside a float16/bfloat16 region
#: (PyTorch "Automatic Mixed Precision" docs: CUDA ops that can autocast to float32)
AUTOCAST_FLOAT32_PRODUCERS = frozenset({"softmax", "log_softmax", "exp", "1 - softmax"})
