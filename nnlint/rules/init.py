"""Initialization rules (NNL2xx): decided by simulating step 0 of the extracted layer stacks.

The rules read `analysis.stacks.simulated` once per file, in `leave_Module`, after the one
walk; the stacks come from the model's statement-level records, never from a second walk.
"""
from __future__ import annotations

import re

import libcst as cst

from nnlint.analysis.signal import SATURATING, Layer, Stack, glorot_bound, he_std
from nnlint.analysis.stacks import simulated, stacks_of
from nnlint.finding import Severity
from nnlint.rules.base import Rule, register

#: the factor of forward or backward change through depth that NNL203 reports (the issue's
#: threshold: three orders of magnitude; common practice)
DEPTH_CHANGE_LIMIT = 1000.0
#: more than this fraction of a tanh/sigmoid layer's units saturated is reported
SATURATED_LIMIT = 0.5
#: names a hand-written weight matrix goes by (W1, W_hidden, weights, kernel): the fallback,
#: which has no forward chain to prove an array is a weight, trusts only these
_WEIGHT_NAME = re.compile(
    r"^(?:self\.)?(?:w|weights?|kernel)(?:_?\d+|_(?:in|out|hidden|ih|hh|input|output))?$", re.I)


def _names(layers: list[Layer]) -> str:
    return ", ".join(f"`{layer.label}`" for layer in layers)


def _random_fix(layer: Layer, plural: bool = False) -> str:
    """A concrete replacement for a fill, with its computed scale."""
    which, where = ("them", f" for `{layer.label}`") if plural else ("it", "")
    if layer.fan_in and layer.fan_out:
        if layer.activation in ("relu", "relu6", "leaky_relu", "elu", "gelu", "silu"):
            return f"draw {which} at random (He std {he_std(layer.fan_in):.3g}{where})"
        bound = glorot_bound(layer.fan_in, layer.fan_out)
        return f"draw {which} at random (Glorot bound {bound:.3g}{where})"
    return f"draw {which} at random (Glorot or He)"


def _first_known(layers: list[Layer]) -> Layer:
    return next((layer for layer in layers if layer.fan_in and layer.fan_out), layers[0])


@register
class ZeroFilledWeights(Rule):
    code = "NNL201"
    name = "zero-filled-weights"
    severity = Severity.ERROR
    summary = ("a weight matrix or kernel filled with zeros where the step-0 simulation shows "
               "learning stops")
    message = "{subject}: {evidence}; {fix}"
    rationale = (
        "nnlint extracts the layer stack and runs one exact forward/backward pass at step 0 "
        "(numpy, capped width, fixed seed). With every weight layer zero the output ignores "
        "the input and the weight gradients are exactly 0. With two consecutive zero layers "
        "and equal biases, the units between them have equal incoming and outgoing weights, "
        "so every gradient step changes them equally and they stay copies of one unit "
        "(common practice, shown by tests/test_symmetry_training.py: 100 SGD steps). A zero "
        "layer with a zero bias before ReLU is dead: relu'(0) = 0 in PyTorch and TensorFlow, "
        "so its gradient is 0 forever. A single zero layer (a head, the last layer of a "
        "residual branch, an adapter's up-projection) is deliberate practice and not "
        "flagged; neither are zero biases or normalisation scales."
    )
    bad = ("class Risk:\n    def __init__(self):\n        self.W1 = np.zeros((24, 32))\n"
           "        self.W2 = np.zeros((32, 1))\n\n    def forward(self, x):\n"
           "        return np.tanh(x @ self.W1) @ self.W2")
    good = ("class Risk:\n    def __init__(self, rng):\n"
            "        self.W1 = rng.normal(0.0, 0.2, size=(24, 32))\n"
            "        self.W2 = np.zeros((32, 1))  # a zero read-out layer is fine\n\n"
            "    def forward(self, x):\n        return np.tanh(x @ self.W1) @ self.W2")
    references = (
        "Glorot & Bengio 2010, Understanding the difficulty of training deep feedforward "
        "neural networks (uniform bound sqrt(6 / (fan_in + fan_out)))",
        "He et al. 2015, Delving deep into rectifiers (std sqrt(2 / fan_in))",
        "Goyal et al. 2017, Accurate, large minibatch SGD (zero-init of the last BN scale "
        "of residual blocks, deliberate)",
        "Hu et al. 2021, LoRA (zero-init up-projection, deliberate)",
    )

    def leave_Module(self, node: cst.Module) -> None:
        for result in simulated(self.model):
            exact = result.step_zero
            if exact is not None:
                self._check(result.stack, exact)
        for group in stacks_of(self.model).groups:
            weights = [weight for weight in group.weights
                       if weight[3] or _WEIGHT_NAME.search(weight[0])]
            if len(group.weights) >= 2 and len(weights) == len(group.weights) and all(
                    init.kind == "zeros" for _, init, _, _ in weights):
                labels = ", ".join(f"`{label}`" for label, _, _, _ in weights)
                self.report(weights[0][2], subject=f"every weight of `{group.label}` is zero "
                            f"({labels})", evidence="no weight gradient at step 0 can tell "
                            "the units apart", fix="draw them at random (Glorot or He)")

    def _check(self, stack: Stack, exact) -> bool:
        layers = stack.layers
        zero = [layer.weight.kind == "zeros" for layer in layers]
        if len(layers) >= 2 and all(zero):
            if not exact.output_ignores_input:
                return False
            stuck = sum(exact.zero_gradient)
            self.report(layers[0].node, subject=f"every weight layer of `{stack.label}` is "
                        f"zero ({_names(layers)})", evidence=f"at step 0 the output ignores "
                        f"the input and {stuck} of {len(layers)} weight gradients are 0",
                        fix=_random_fix(_first_known(layers), plural=True))
            return True
        for index in range(len(layers) - 1):
            if zero[index] and zero[index + 1] and exact.copied_units[index]:
                units = layers[index].units
                count = f"{units} " if units else ""
                self.report(layers[index].node, subject=f"{_names(layers[index:index + 2])} "
                            "are both zero", evidence=f"the {count}units between them are "
                            "exact copies at step 0 and stay so", fix=_random_fix(layers[index]))
                return True
        for index, layer in enumerate(layers):
            if zero[index] and exact.dead_units[index]:
                self.report(layer.node, subject=f"`{layer.label}` is zero with a zero bias "
                            f"before {layer.activation}", evidence=f"its gradient is exactly 0 "
                            f"at step 0 ({layer.activation}'(0) = 0) and stays 0",
                            fix=_random_fix(layer))
                return True
        return False


@register
class ConstantWeightsSymmetry(Rule):
    code = "NNL202"
    name = "constant-weights-symmetry"
    severity = Severity.ERROR
    summary = ("weights set to one shared non-zero constant in consecutive layers, so hidden "
               "units stay identical")
    message = "{subject}: {evidence}; {fix}"
    rationale = (
        "When consecutive layers are filled with one shared value (ones, full, constant_, "
        "fill_) and the biases between them are equal, every hidden unit between them has "
        "the same incoming and outgoing weights: the units compute the same value, receive "
        "the same gradient, and remain copies after any number of steps, so the layer acts "
        "as one unit. nnlint confirms the copies by an exact step-0 pass in numpy; "
        "tests/test_symmetry_training.py shows them still equal after 100 SGD steps."
    )
    bad = ("net = nn.Sequential(nn.Linear(16, 64), nn.Tanh(), nn.Linear(64, 4))\n"
           "for layer in (net[0], net[2]):\n"
           "    nn.init.constant_(layer.weight, 0.5)\n    nn.init.zeros_(layer.bias)")
    good = ("net = nn.Sequential(nn.Linear(16, 64), nn.Tanh(), nn.Linear(64, 4))\n"
            "nn.init.constant_(net[2].weight, 0.5)  # one constant layer: units still differ")
    references = (
        "Goodfellow, Bengio & Courville 2016, Deep Learning, section 8.4 (breaking symmetry)",
    )

    def leave_Module(self, node: cst.Module) -> None:
        for result in simulated(self.model):
            exact = result.step_zero
            if exact is None:
                continue
            layers = result.stack.layers
            for index in range(len(layers) - 1):
                pair = layers[index:index + 2]
                if not all(layer.weight.is_fill for layer in pair):
                    continue
                if all(layer.weight.kind == "zeros" for layer in pair):
                    continue  # NNL201's case
                if not exact.copied_units[index]:
                    continue
                values = ", ".join(f"{layer.weight.value:g}" for layer in pair)
                units = pair[0].units
                self.report(pair[0].node, subject=f"{_names(pair)} are filled with one "
                            f"constant each ({values})", evidence=f"the {units or ''} units "
                            "between them are exact copies at step 0 and stay so".replace(
                                "  ", " "), fix=_random_fix(pair[0]))
                break


@register
class InitScaleUnstable(Rule):
    code = "NNL203"
    name = "init-scale-unstable"
    severity = Severity.WARNING
    summary = ("an init scale that saturates tanh/sigmoid units or makes the signal explode or "
               "vanish through depth at step 0")
    message = "{subject}: {evidence}; {fix}"
    rationale = (
        "nnlint propagates the pre-activation variance through the stack at infinite width "
        "(q -> sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2, Poole et al. 2016, by Gauss-Hermite "
        "quadrature), with inputs of unit variance. A tanh unit is counted saturated when "
        "|x| > 2.99 (its derivative is below 1% of its maximum: atanh(sqrt(0.99))), a sigmoid "
        "unit when |x| > 5.99; more than half saturated, or a forward or backward scale "
        "changing by more than 1000x between the first and last layer, is reported. Only "
        "inits written in the code are judged, never a framework default."
    )
    bad = ("net = nn.Sequential(nn.Linear(512, 512), nn.Tanh(), nn.Linear(512, 512), nn.Tanh(),\n"
           "                    nn.Linear(512, 10))\n"
           "for layer in (net[0], net[2], net[4]):\n"
           "    nn.init.normal_(layer.weight, std=1.0)")
    good = ("net = nn.Sequential(nn.Linear(512, 512), nn.Tanh(), nn.Linear(512, 512), nn.Tanh(),\n"
            "                    nn.Linear(512, 10))\n"
            "for layer in (net[0], net[2], net[4]):\n"
            "    nn.init.xavier_uniform_(layer.weight)")
    references = (
        "Poole et al. 2016, Exponential expressivity in deep neural networks through "
        "transient chaos",
        "Schoenholz et al. 2017, Deep information propagation",
        "Glorot & Bengio 2010 (uniform bound sqrt(6 / (fan_in + fan_out)))",
    )

    def leave_Module(self, node: cst.Module) -> None:
        for result in simulated(self.model):
            statistics = result.mean_field
            if statistics is None:
                continue
            layers = result.stack.layers
            if self._saturation(layers, statistics):
                continue
            self._depth(layers, statistics)

    def _saturation(self, layers: list[Layer], statistics) -> bool:
        for index, layer in enumerate(layers[:-1]):
            fraction = statistics.saturated_fraction[index]
            if fraction is None or fraction <= SATURATED_LIMIT or layer.weight.is_default:
                continue
            if layer.activation not in SATURATING:
                continue
            bound = glorot_bound(layer.fan_in, layer.fan_out)
            self.report(layer.node, subject=f"`{layer.label}` gives pre-activation std "
                        f"{statistics.pre_activation_std[index]:.3g} at layer {index + 1}",
                        evidence=f"{fraction:.0%} of {layer.activation} units saturated at "
                        "step 0", fix=f"a Glorot bound of {bound:.2g} keeps it near 1")
            return True
        return False

    def _depth(self, layers: list[Layer], statistics) -> None:
        if len(layers) < 3 or any(layer.weight.is_default for layer in layers):
            return
        forward = statistics.pre_activation_std
        backward = statistics.weight_gradient_std
        for kind, series in (("pre-activation std", forward), ("weight-gradient std", backward)):
            first, last = series[0], series[-1]
            if first <= 0.0 or last <= 0.0:
                continue
            ratio = last / first
            if 1.0 / DEPTH_CHANGE_LIMIT <= ratio <= DEPTH_CHANGE_LIMIT:
                continue
            verb = "grows" if ratio > 1.0 else "shrinks"
            first_layer = layers[0]
            self.report(first_layer.node, subject=f"{kind} {verb} from {first:.3g} at layer 1 "
                        f"to {last:.3g} at layer {len(layers)}", evidence=f"a factor of "
                        f"{max(ratio, 1.0 / ratio):.3g} at step 0",
                        fix=self._scale_fix(first_layer))
            return

    @staticmethod
    def _scale_fix(layer: Layer) -> str:
        if layer.activation in SATURATING or layer.activation == "linear":
            return f"use Glorot (bound {glorot_bound(layer.fan_in, layer.fan_out):.2g} here)"
        return f"use He (std {he_std(layer.fan_in):.2g} here)"
