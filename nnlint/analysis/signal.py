"""Layer stacks and what training does with them at step 0, simulated with numpy.

A `Stack` is a chain of weight layers (dense or convolutional) with the init of each weight,
its bias and the activation after it, as extracted by stacks.py. Two simulations read it:

- `mean_field`: the infinite-width signal propagation of Poole et al. 2016 and Schoenholz et
  al. 2017 (variance map q -> sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2, and its backward
  twin), by Gauss-Hermite quadrature: pre-activation scale and saturated fraction per layer,
  gradient scale per layer. Cost: layers x quadrature nodes, independent of widths.
- `step_zero`: one exact forward/backward pass of a capped-width copy of the network on a
  small seeded batch: which weight gradients are exactly 0, which hidden layers consist of
  exact copies of one unit, which ReLU layers are dead, whether the output ignores the input.
  Zeros and constants are the same at any width, so capping loses nothing for those checks.

numpy is imported inside the functions: a file with no stack never pays for it.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

#: Gauss-Hermite nodes for E[f(z)], z ~ N(0, 1), used where the integrand is smooth on the
#: Gaussian's scale (see GAUSS_HERMITE_MAX_VARIANCE)
QUADRATURE_NODES = 61
#: width and batch of the exact step-0 pass (structure, not scale, is what it checks)
CAPPED_WIDTH = 8
CAPPED_BATCH = 8
SEED = 20260  # any fixed value: results must not change between runs
#: a unit counts as saturated when its derivative is below this fraction of its maximum
SATURATION_DERIVATIVE_FRACTION = 0.01
#: relu-family activations whose derivative at exactly 0 is 0 (PyTorch and TensorFlow take
#: relu'(0) = 0, from memory; tests/test_signal.py confirms it with torch when installed)
DEAD_AT_ZERO = frozenset({"relu", "relu6"})
SATURATING = frozenset({"tanh", "sigmoid"})


@dataclass(frozen=True)
class Init:
    """How a weight or bias tensor is filled before training."""

    #: "zeros", "constant" (one shared non-zero value), "random" or "unknown"
    kind: str
    #: the shared value of a "constant" fill
    value: float = 0.0
    #: mean of a "random" fill
    mean: float = 0.0
    #: how the variance of a "random" fill depends on the fans: ("fixed", variance),
    #: ("fan_in", c) for c / fan_in, ("fan_out", c), ("fan_avg", c) for c / ((in + out) / 2);
    #: None when the variance is not known statically
    variance_rule: tuple[str, float] | None = None
    #: how the code spells it, for messages ("np.zeros", "nn.init.constant_(…, 0.5)")
    spelling: str = ""
    #: a framework's default (not written by the user)
    is_default: bool = False

    def variance(self, fan_in: int | None, fan_out: int | None) -> float | None:
        """Per-entry variance of a random fill, None when unknown."""
        if self.kind in ("zeros", "constant"):
            return 0.0
        if self.kind != "random" or self.variance_rule is None:
            return None
        rule, factor = self.variance_rule
        if rule == "fixed":
            return factor
        fans = {"fan_in": fan_in, "fan_out": fan_out,
                "fan_avg": None if fan_in is None or fan_out is None else (fan_in + fan_out) / 2}
        fan = fans.get(rule)
        return None if not fan else factor / fan

    @property
    def is_fill(self) -> bool:
        """Zeros or one shared constant: every entry equal."""
        return self.kind in ("zeros", "constant")


ZEROS = Init("zeros", spelling="zeros")
UNKNOWN = Init("unknown")


@dataclass
class Layer:
    """One weight layer of a stack."""

    #: how the code names it (`self.W1`, `fc2`, `Dense #3`)
    label: str
    #: fan-in and fan-out as torch counts them (conv: channels x kernel elements); None: unknown
    fan_in: int | None
    fan_out: int | None
    weight: Init
    #: None: the layer has no bias
    bias: Init | None
    #: the activation applied to this layer's output ("linear", "tanh", "relu", ... "unknown")
    activation: str = "linear"
    #: where the weight's init is written (a CST node; opaque here)
    node: object = None
    #: units as the network sees them (out features / channels); None: unknown
    units: int | None = None


@dataclass
class Stack:
    """A chain of weight layers, input to output."""

    label: str
    layers: list[Layer]
    #: where the stack is defined (a CST node; opaque here)
    node: object = None
    #: False when something between layers (pooling, normalisation) changes the statistics
    #: the mean-field pass assumes, so only the exact structural pass is meaningful
    scale_is_modelled: bool = True


@dataclass
class MeanField:
    """Infinite-width step-0 statistics; every list has one entry per layer."""

    pre_activation_std: list[float]
    #: fraction of units past the saturation point (None for non-saturating activations)
    saturated_fraction: list[float | None]
    #: std of the loss gradient w.r.t. each layer's weights, for a unit output gradient
    weight_gradient_std: list[float]


@dataclass
class StepZero:
    """Exact structural facts of the first gradient step."""

    #: the weight gradient of each layer is exactly 0 on the whole batch
    zero_gradient: list[bool]
    #: the units after layer l (l < last) are exact copies: same incoming column, same bias,
    #: same outgoing row, so every gradient step keeps them equal
    copied_units: list[bool]
    #: every unit of layer l has derivative 0 on every example and its weight gradient is 0
    dead_units: list[bool]
    #: the network output is the same for every example of the batch
    output_ignores_input: bool
    layer_count: int = field(default=0)


# -- activations -----------------------------------------------------------------------------
def _activation(name: str) -> tuple[Callable, Callable] | None:
    """(function, derivative) on numpy arrays, or None for an activation we do not model."""
    import numpy as np

    def sigmoid(x):
        return 0.5 * (1.0 + np.tanh(0.5 * x))  # the tanh form never overflows

    # GELU by its tanh approximation (Hendrycks & Gimpel 2016, eq. for the fast form)
    gelu_c = math.sqrt(2.0 / math.pi)

    def gelu(x):
        return 0.5 * x * (1.0 + np.tanh(gelu_c * (x + 0.044715 * x ** 3)))

    def gelu_derivative(x):
        inner = gelu_c * (x + 0.044715 * x ** 3)
        sech2 = 1.0 - np.tanh(inner) ** 2
        return 0.5 * (1.0 + np.tanh(inner)) + 0.5 * x * sech2 * gelu_c * (1 + 3 * 0.044715 * x ** 2)

    table = {
        "linear": (lambda x: x, lambda x: np.ones_like(x)),
        "tanh": (np.tanh, lambda x: 1.0 - np.tanh(x) ** 2),
        "sigmoid": (sigmoid, lambda x: sigmoid(x) * (1.0 - sigmoid(x))),
        # derivative at exactly 0 is 0, as PyTorch/TensorFlow compute it (x > 0)
        "relu": (lambda x: np.maximum(x, 0.0), lambda x: (x > 0).astype(float)),
        "relu6": (lambda x: np.clip(x, 0.0, 6.0), lambda x: ((x > 0) & (x < 6)).astype(float)),
        # negative slope 0.01: torch.nn.LeakyReLU's default (PyTorch documentation)
        "leaky_relu": (lambda x: np.where(x > 0, x, 0.01 * x),
                       lambda x: np.where(x > 0, 1.0, 0.01)),
        "elu": (lambda x: np.where(x > 0, x, np.expm1(np.minimum(x, 0.0))),
                lambda x: np.where(x > 0, 1.0, np.exp(np.minimum(x, 0.0)))),
        "silu": (lambda x: x * sigmoid(x),
                 lambda x: sigmoid(x) * (1.0 + x * (1.0 - sigmoid(x)))),
        "gelu": (gelu, gelu_derivative),
    }
    return table.get(name)


def is_modelled(activation: str) -> bool:
    return activation in ("linear", "tanh", "sigmoid", "relu", "relu6", "leaky_relu", "elu",
                          "silu", "gelu")


def saturation_threshold(activation: str) -> float | None:
    """|x| beyond which the derivative is below SATURATION_DERIVATIVE_FRACTION of its max.

    tanh' = 1 - tanh^2 (max 1 at 0): 1 - tanh(x)^2 = f gives x = atanh(sqrt(1 - f)) = 2.993
    for f = 1%. sigmoid' = s(1 - s) (max 1/4 at 0): s(1 - s) = f/4 gives
    s = (1 + sqrt(1 - f)) / 2 and x = log(s / (1 - s)) = 5.990.
    """
    fraction = SATURATION_DERIVATIVE_FRACTION
    if activation == "tanh":
        return math.atanh(math.sqrt(1.0 - fraction))
    if activation == "sigmoid":
        upper = (1.0 + math.sqrt(1.0 - fraction)) / 2.0
        return math.log(upper / (1.0 - upper))
    return None


def glorot_bound(fan_in: int, fan_out: int) -> float:
    """Uniform bound sqrt(6 / (fan_in + fan_out)) of Glorot & Bengio 2010, eq. 16."""
    return math.sqrt(6.0 / (fan_in + fan_out))


def he_std(fan_in: int) -> float:
    """Normal std sqrt(2 / fan_in) of He et al. 2015 (gain sqrt(2) for ReLU)."""
    return math.sqrt(2.0 / fan_in)


# -- mean field ------------------------------------------------------------------------------
#: E[f(sqrt(q) z)] for piecewise-linear activations in closed form: E[relu(x)^2] = q / 2 and
#: E[relu'(x)^2] = 1 / 2 for x ~ N(0, q) (half of a symmetric Gaussian's mass); a leaky ReLU
#: with slope s gives (1 + s^2) / 2 for both factors (q times it for the forward one)
_LEAKY = (1.0 + 0.01 ** 2) / 2.0  # slope 0.01, torch.nn.LeakyReLU's default
_CLOSED_FORMS = {"linear": (1.0, 1.0), "relu": (0.5, 0.5), "leaky_relu": (_LEAKY, _LEAKY)}
#: Gauss-Hermite is used up to this variance: tanh^2 with 61 nodes is within 5e-9 of adaptive
#: quadrature at q = 1 but off by 1e-4 at q = 4 and 0.12 at q = 500 (measured against
#: scipy.integrate.quad), because tanh(sqrt(q) z) varies on a scale much finer than the
#: Gaussian; past it, the trapezoid rule on z in [-8, 8] (2001 points) is used, within
#: 1e-12 at q = 500 and 2e-5 at q = 1e4 (same comparison, tests/test_signal.py)
GAUSS_HERMITE_MAX_VARIANCE = 1.0
_GRID_POINTS = 2001
_GRID_HALF_WIDTH = 8.0


def _gaussian_expectation(function: Callable, variance: float) -> float:
    """E[function(sqrt(variance) z)] for z ~ N(0, 1)."""
    import numpy as np

    nodes, weights = _quadrature(variance <= GAUSS_HERMITE_MAX_VARIANCE)
    values = function(math.sqrt(max(variance, 0.0)) * nodes)
    return float(np.dot(weights, values))


_RULES: dict[bool, tuple] = {}


def _quadrature(gauss_hermite: bool):
    if gauss_hermite not in _RULES:
        import numpy as np
        from numpy.polynomial.hermite_e import hermegauss

        if gauss_hermite:
            nodes, weights = hermegauss(QUADRATURE_NODES)
            # hermegauss integrates against exp(-x^2 / 2); divide by sqrt(2 pi) for N(0, 1)
            _RULES[True] = (nodes, weights / np.sqrt(2.0 * np.pi))
        else:
            nodes = np.linspace(-_GRID_HALF_WIDTH, _GRID_HALF_WIDTH, _GRID_POINTS)
            step = nodes[1] - nodes[0]
            weights = np.full(_GRID_POINTS, step)
            weights[0] = weights[-1] = step / 2.0
            _RULES[False] = (nodes, weights * np.exp(-nodes * nodes / 2.0) / np.sqrt(2 * np.pi))
    return _RULES[gauss_hermite]


def second_moment(activation: str, variance: float) -> float:
    """E[phi(sqrt(q) z)^2] for z ~ N(0, 1)."""
    if activation in _CLOSED_FORMS:
        return _CLOSED_FORMS[activation][0] * variance
    functions = _activation(activation)
    if functions is None:
        raise ValueError(f"activation {activation!r} is not modelled")
    forward = functions[0]
    return _gaussian_expectation(lambda x: forward(x) ** 2, variance)


def variance_map(activation: str, variance: float, weight_variance_scaled: float,
                 bias_variance: float = 0.0) -> float:
    """One step of q_{l+1} = sigma_w^2 E[phi(sqrt(q_l) z)^2] + sigma_b^2 (Poole et al. 2016).

    `weight_variance_scaled` is sigma_w^2: the per-entry variance times fan_in.
    """
    return weight_variance_scaled * second_moment(activation, variance) + bias_variance


def derivative_second_moment(activation: str, variance: float) -> float:
    """E[phi'(sqrt(q) z)^2]: the per-layer factor of the backward variance (chi_1)."""
    if activation in _CLOSED_FORMS:
        return _CLOSED_FORMS[activation][1]
    functions = _activation(activation)
    if functions is None:
        raise ValueError(f"activation {activation!r} is not modelled")
    derivative = functions[1]
    return _gaussian_expectation(lambda x: derivative(x) ** 2, variance)


def mean_field(stack: Stack) -> MeanField | None:
    """Step-0 statistics at infinite width, inputs of unit variance; None when not modelled.

    Needs every width, every init's variance (zero-mean), every activation between layers.
    """
    layers = stack.layers
    if not stack.scale_is_modelled or not layers:
        return None
    weight_variances, bias_variances = [], []
    for layer in layers:
        if layer.fan_in is None or layer.fan_out is None:
            return None
        if layer.weight.kind != "random" or layer.weight.mean != 0.0:
            return None
        weight_variance = layer.weight.variance(layer.fan_in, layer.fan_out)
        bias = layer.bias
        bias_variance = 0.0
        if bias is not None:
            if bias.kind == "constant" or (bias.kind == "random" and bias.mean != 0.0):
                return None
            bias_variance = bias.variance(layer.fan_in, layer.fan_out)
        if weight_variance is None or bias_variance is None:
            return None
        if not is_modelled(layer.activation):
            return None
        weight_variances.append(weight_variance)
        bias_variances.append(bias_variance)
    # forward: the input has unit variance per feature (standardised inputs, common practice)
    pre_variances = []
    previous_second_moment = 1.0
    for index, layer in enumerate(layers):
        variance = (weight_variances[index] * layer.fan_in * previous_second_moment
                    + bias_variances[index])
        pre_variances.append(variance)
        previous_second_moment = second_moment(layer.activation, variance)
    saturated = []
    for layer, variance in zip(layers, pre_variances):
        threshold = saturation_threshold(layer.activation)
        if threshold is None:
            saturated.append(None)
        elif variance <= 0.0:
            saturated.append(0.0)
        else:
            # P(|h| > t) for h ~ N(0, q): erfc(t / sqrt(2 q))
            saturated.append(math.erfc(threshold / math.sqrt(2.0 * variance)))
    # backward: unit gradient variance at the last layer's pre-activations
    delta_variances = [0.0] * len(layers)
    delta_variances[-1] = 1.0
    for index in range(len(layers) - 2, -1, -1):
        following = layers[index + 1]
        chi = derivative_second_moment(layers[index].activation, pre_variances[index])
        delta_variances[index] = (delta_variances[index + 1] * weight_variances[index + 1]
                                  * following.fan_out * chi)
    gradient_std = []
    input_second_moment = 1.0
    for index, layer in enumerate(layers):
        gradient_std.append(math.sqrt(max(input_second_moment * delta_variances[index], 0.0)))
        input_second_moment = second_moment(layer.activation, pre_variances[index])
    return MeanField([math.sqrt(v) for v in pre_variances], saturated, gradient_std)


# -- the exact capped pass -------------------------------------------------------------------
def _fill(init: Init, shape: tuple[int, ...], fan_in: int | None, fan_out: int | None,
          rng) -> "object":
    import numpy as np

    if init.kind == "zeros":
        return np.zeros(shape)
    if init.kind == "constant":
        return np.full(shape, float(init.value))
    # random or unknown: distinct entries; the scale does not matter for structure
    variance = init.variance(fan_in, fan_out) if init.kind == "random" else None
    std = math.sqrt(variance) if variance else 1.0 / math.sqrt(shape[0])
    return init.mean + std * rng.standard_normal(shape)


def step_zero(stack: Stack) -> StepZero | None:
    """The exact first forward/backward pass at capped width; None when not modelled."""
    import numpy as np

    layers = stack.layers
    if not layers or any(_activation(layer.activation) is None for layer in layers[:-1]):
        return None
    rng = np.random.default_rng(SEED)
    widths = [min(layers[0].fan_in or CAPPED_WIDTH, CAPPED_WIDTH)]
    widths += [min(layer.units or CAPPED_WIDTH, CAPPED_WIDTH) for layer in layers]
    weights, biases = [], []
    for index, layer in enumerate(layers):
        shape = (widths[index], widths[index + 1])
        weights.append(_fill(layer.weight, shape, layer.fan_in, layer.fan_out, rng))
        if layer.bias is None:
            biases.append(np.zeros(shape[1]))
        else:
            biases.append(_fill(layer.bias, (shape[1],), layer.fan_in, layer.fan_out, rng))
    inputs = rng.standard_normal((CAPPED_BATCH, widths[0]))
    activations, pre_activations = [inputs], []
    last = len(layers) - 1
    for index, layer in enumerate(layers):
        pre = activations[-1] @ weights[index] + biases[index]
        pre_activations.append(pre)
        functions = _activation(layer.activation) if index < last else None
        activations.append(functions[0](pre) if functions else pre)
    # the gradient of a seeded random linear read-out of the output
    delta = rng.standard_normal(pre_activations[-1].shape)
    gradients = [None] * len(layers)
    derivative_zero = [False] * len(layers)
    for index in range(last, -1, -1):
        gradients[index] = activations[index].T @ delta
        if index > 0:
            derivative = _activation(layers[index - 1].activation)[1](pre_activations[index - 1])
            derivative_zero[index - 1] = not np.any(derivative)
            delta = (delta @ weights[index].T) * derivative
    zero_gradient = [not np.any(gradient) for gradient in gradients]
    copied = []
    for index in range(len(layers)):
        if index == last or widths[index + 1] < 2:
            copied.append(False)
            continue
        incoming, outgoing = weights[index], weights[index + 1]
        copied.append(bool(np.all(incoming == incoming[:, :1])
                           and np.all(biases[index] == biases[index][0])
                           and np.all(outgoing == outgoing[:1, :])))
    dead = [derivative_zero[index] and zero_gradient[index] and
            layers[index].activation in DEAD_AT_ZERO for index in range(len(layers))]
    output = activations[-1]
    ignores_input = bool(np.all(output == output[:1, :]))
    return StepZero(zero_gradient, copied, dead, ignores_input, len(layers))
