"""The step-0 simulation reproduces published signal-propagation facts and reference libraries."""
import math

import numpy as np
import pytest

from nnlint.analysis import signal
from nnlint.analysis.api import init as api
from nnlint.analysis.signal import Init, Layer, Stack, glorot_bound, he_std

GLOROT = Init("random", variance_rule=("fan_avg", 1.0))


def iterate_tanh(weight_variance_scaled: float, steps: int, start: float = 1.0) -> list[float]:
    history = [start]
    for _ in range(steps):
        history.append(signal.variance_map("tanh", history[-1], weight_variance_scaled, 0.0))
    return history


def test_tanh_variance_decays_to_zero_below_sigma_w_squared_one():
    # Poole et al. 2016 / Schoenholz et al. 2017: with sigma_b = 0 the only fixed point of
    # q -> sigma_w^2 E[tanh(sqrt(q) z)^2] for sigma_w^2 < 1 is q* = 0
    history = iterate_tanh(0.9, 300)
    assert history[-1] < 1e-8
    assert all(later < earlier for earlier, later in zip(history, history[1:]))


def test_tanh_variance_settles_at_a_non_zero_fixed_point_above_one():
    history = iterate_tanh(1.5, 300)
    assert history[-1] > 0.1
    assert abs(history[-1] - history[-2]) < 1e-10
    # the same fixed point from a large start: it is an attractor
    assert abs(iterate_tanh(1.5, 300, start=25.0)[-1] - history[-1]) < 1e-8


def test_order_to_chaos_boundary_at_zero_bias_is_sigma_w_squared_one():
    # chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2]; at q* = 0, tanh'(0) = 1 gives chi_1 = sigma_w^2,
    # so chi_1 = 1 exactly at sigma_w^2 = 1 (Schoenholz et al. 2017, eq. 5)
    assert signal.derivative_second_moment("tanh", 0.0) == pytest.approx(1.0, abs=1e-12)
    fixed_point = iterate_tanh(1.5, 300)[-1]
    chi = 1.5 * signal.derivative_second_moment("tanh", fixed_point)
    assert chi > 1.0  # sigma_w^2 = 1.5, sigma_b = 0 lies in the chaotic phase
    assert 0.9 * signal.derivative_second_moment("tanh", 0.0) < 1.0


def test_relu_and_linear_variance_maps_match_their_closed_forms():
    # E[relu(sqrt(q) z)^2] = q / 2 (half of a Gaussian's second moment)
    assert signal.variance_map("relu", 3.0, 2.0) == pytest.approx(3.0, rel=1e-12)
    assert signal.variance_map("linear", 3.0, 0.5, 0.25) == pytest.approx(1.75, rel=1e-12)


@pytest.mark.parametrize("variance", [0.05, 0.5, 1.0, 4.0, 50.0, 500.0, 1e4])
@pytest.mark.parametrize("activation", ["tanh", "sigmoid", "gelu"])
def test_quadrature_agrees_with_adaptive_integration(activation, variance):
    integrate = pytest.importorskip("scipy.integrate")
    forward, derivative = signal._activation(activation)
    scale = math.sqrt(variance)

    def expectation(function):
        def integrand(z):
            value = float(function(np.array(scale * z)))
            return value * value * math.exp(-z * z / 2) / math.sqrt(2 * math.pi)

        return integrate.quad(integrand, -12, 12, points=[0.0], limit=400)[0]

    # absolute tolerance: the factors enter ratios of 1000x, a 1e-4 error cannot flip them
    assert signal.second_moment(activation, variance) == pytest.approx(
        expectation(forward), abs=1e-4, rel=0)
    assert signal.derivative_second_moment(activation, variance) == pytest.approx(
        expectation(derivative), abs=1e-4, rel=0)


def test_saturation_thresholds_are_where_the_derivative_is_one_percent_of_its_maximum():
    tanh_point = signal.saturation_threshold("tanh")
    sigmoid_point = signal.saturation_threshold("sigmoid")
    assert 1 - math.tanh(tanh_point) ** 2 == pytest.approx(0.01, rel=1e-9)
    sigmoid = 1 / (1 + math.exp(-sigmoid_point))
    assert sigmoid * (1 - sigmoid) == pytest.approx(0.25 * 0.01, rel=1e-9)
    assert tanh_point == pytest.approx(2.993, abs=1e-3)


def test_saturated_fraction_matches_a_seeded_sample():
    stack = Stack("wide", [Layer("fc1", 512, 512, Init("random", variance_rule=("fixed", 1.0)),
                                 None, "tanh", units=512),
                           Layer("out", 512, 1, GLOROT, None, "linear", units=1)])
    statistics = signal.mean_field(stack)
    assert statistics.pre_activation_std[0] == pytest.approx(math.sqrt(512), rel=1e-12)
    sample = np.random.default_rng(5).standard_normal(200_000) * math.sqrt(512)
    observed = np.mean(np.abs(sample) > signal.saturation_threshold("tanh"))
    assert statistics.saturated_fraction[0] == pytest.approx(observed, abs=0.005)


def test_glorot_bound_and_he_std_are_the_published_formulas():
    # Glorot & Bengio 2010, eq. 16; He et al. 2015, eq. 10
    assert glorot_bound(300, 100) == pytest.approx(math.sqrt(6 / 400))
    assert he_std(512) == pytest.approx(math.sqrt(2) / math.sqrt(512))
    # a uniform on [-b, b] has variance b^2 / 3 = 2 / (fan_in + fan_out)
    bound = glorot_bound(300, 100)
    assert api.GLOROT_UNIFORM.variance(300, 100) == pytest.approx(bound ** 2 / 3)


def test_gain_table_matches_torch_calculate_gain():
    torch = pytest.importorskip("torch")
    for name in ("tanh", "relu", "sigmoid", "linear", "conv2d", "selu"):
        assert api.torch_gain(name) == pytest.approx(torch.nn.init.calculate_gain(name))
    assert api.torch_gain("tanh") == pytest.approx(5 / 3)
    assert api.torch_gain("relu") == pytest.approx(math.sqrt(2))
    assert api.torch_gain("leaky_relu", 0.2) == pytest.approx(
        torch.nn.init.calculate_gain("leaky_relu", 0.2))


def test_torch_default_and_xavier_inits_have_the_variances_we_assume():
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    layer = torch.nn.Linear(400, 300)
    assert layer.weight.var().item() == pytest.approx(api.TORCH_DEFAULT.variance(400, 300),
                                                      rel=0.02)
    assert layer.weight.abs().max().item() <= 1 / math.sqrt(400)
    weight = torch.empty(300, 400)
    torch.nn.init.xavier_uniform_(weight)
    assert weight.abs().max().item() <= glorot_bound(400, 300)
    assert weight.abs().max().item() > 0.99 * glorot_bound(400, 300)


def test_relu_derivative_at_zero_is_zero_in_torch_and_in_our_model():
    torch = pytest.importorskip("torch")
    point = torch.zeros(4, requires_grad=True)
    torch.relu(point).sum().backward()
    assert point.grad.tolist() == [0.0, 0.0, 0.0, 0.0]
    point = torch.zeros(4, requires_grad=True)
    torch.nn.functional.relu6(point).sum().backward()
    assert point.grad.tolist() == [0.0, 0.0, 0.0, 0.0]
    derivative = signal._activation("relu")[1]
    assert derivative(np.zeros(3)).tolist() == [0.0, 0.0, 0.0]


def mlp(weights: list[Init], biases: list[Init | None], activation: str = "tanh",
        width: int = 16) -> Stack:
    layers = [Layer(f"fc{index}", width, width, weight, bias, activation, units=width)
              for index, (weight, bias) in enumerate(zip(weights, biases), start=1)]
    layers[-1].activation = "linear"
    return Stack("mlp", layers)


ZERO = Init("zeros")
HALF = Init("constant", 0.5)


def test_step_zero_finds_what_each_fill_does():
    all_zero = signal.step_zero(mlp([ZERO, ZERO, ZERO], [ZERO, ZERO, ZERO]))
    assert all_zero.output_ignores_input and all(all_zero.zero_gradient)
    pair = signal.step_zero(mlp([GLOROT, ZERO, ZERO], [ZERO, ZERO, ZERO]))
    assert pair.copied_units == [False, True, False]
    random_bias = signal.step_zero(mlp([GLOROT, ZERO, ZERO], [ZERO, GLOROT, ZERO]))
    assert random_bias.copied_units == [False, False, False]
    head = signal.step_zero(mlp([GLOROT, GLOROT, ZERO], [ZERO, ZERO, ZERO]))
    assert head.copied_units == [False, False, False] and not head.zero_gradient[2]
    dead = signal.step_zero(mlp([ZERO, GLOROT], [ZERO, ZERO], activation="relu"))
    assert dead.dead_units == [True, False] and dead.zero_gradient == [True, True]
    alive = signal.step_zero(mlp([ZERO, GLOROT], [ZERO, ZERO], activation="tanh"))
    assert alive.dead_units == [False, False] and not alive.zero_gradient[0]
    constant = signal.step_zero(mlp([HALF, HALF], [ZERO, ZERO]))
    assert constant.copied_units == [True, False] and not any(constant.zero_gradient)


def deep_stack() -> Stack:
    return mlp([GLOROT] * 10, [ZERO] * 10, width=1024)


def test_simulation_is_deterministic():
    first = (signal.mean_field(deep_stack()), signal.step_zero(deep_stack()))
    second = (signal.mean_field(deep_stack()), signal.step_zero(deep_stack()))
    assert first == second
    assert len(first[0].pre_activation_std) == 10


def test_glorot_tanh_stack_is_stable_through_ten_layers():
    statistics = signal.mean_field(deep_stack())
    ratio = statistics.pre_activation_std[-1] / statistics.pre_activation_std[0]
    assert 0.1 < ratio < 1.0  # tanh with sigma_w^2 = 1 decays slowly (critical line)
    assert max(fraction for fraction in statistics.saturated_fraction if fraction) < 0.01
