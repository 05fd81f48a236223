"""A real (tiny) training run shows the symmetry NNL201/NNL202 report: units never differ.

Common practice, stated in many textbooks: with all-zero or one-constant weights the hidden
units of a layer get equal gradients and never differentiate. Here a 2-hidden-layer tanh MLP
is trained with plain SGD in numpy (fixed seed) for 100 steps, and the exact step-0 pass of
nnlint is asked the same question about the same network.
"""
import numpy as np

from nnlint.analysis import signal
from nnlint.analysis.signal import Init, Layer, Stack

INPUTS, HIDDEN, STEPS, LEARNING_RATE = 6, 8, 100, 0.1


def parcel_batch():
    """Invented regression data: a delay score from six route features."""
    rng = np.random.default_rng(11)
    features = rng.standard_normal((64, INPUTS))
    delay = np.tanh(features @ rng.standard_normal((INPUTS, 1)))
    return features, delay


def train(weights: list[np.ndarray]) -> list[np.ndarray]:
    """100 SGD steps on the mean squared error; biases start at 0."""
    weights = [weight.copy() for weight in weights]
    biases = [np.zeros(weight.shape[1]) for weight in weights]
    features, delay = parcel_batch()
    for _ in range(STEPS):
        hidden_1 = np.tanh(features @ weights[0] + biases[0])
        hidden_2 = np.tanh(hidden_1 @ weights[1] + biases[1])
        output = hidden_2 @ weights[2] + biases[2]
        grad_output = 2.0 * (output - delay) / len(features)
        grad_pre_2 = (grad_output @ weights[2].T) * (1.0 - hidden_2 ** 2)
        grad_pre_1 = (grad_pre_2 @ weights[1].T) * (1.0 - hidden_1 ** 2)
        gradients = [features.T @ grad_pre_1, hidden_1.T @ grad_pre_2, hidden_2.T @ grad_output]
        bias_gradients = [grad_pre_1.sum(0), grad_pre_2.sum(0), grad_output.sum(0)]
        for index in range(3):
            weights[index] -= LEARNING_RATE * gradients[index]
            biases[index] -= LEARNING_RATE * bias_gradients[index]
    return weights


def units_identical(weights: list[np.ndarray], layer: int) -> bool:
    """Hidden units of `layer` (0 or 1) have identical incoming and outgoing weights."""
    incoming, outgoing = weights[layer], weights[layer + 1]
    return bool(np.allclose(incoming, incoming[:, :1], atol=1e-12)
                and np.allclose(outgoing, outgoing[:1, :], atol=1e-12))


def shapes():
    return [(INPUTS, HIDDEN), (HIDDEN, HIDDEN), (HIDDEN, 1)]


def glorot(rng, fan_in, fan_out):
    bound = np.sqrt(6.0 / (fan_in + fan_out))  # Glorot & Bengio 2010, eq. 16
    return rng.uniform(-bound, bound, size=(fan_in, fan_out))


def test_zero_init_keeps_every_hidden_unit_identical_after_training():
    trained = train([np.zeros(shape) for shape in shapes()])
    assert units_identical(trained, 0) and units_identical(trained, 1)


def test_constant_init_learns_but_its_units_stay_copies():
    start = [np.full(shape, 0.3) for shape in shapes()]
    trained = train(start)
    assert not np.allclose(trained[2], start[2])  # the weights did move
    assert units_identical(trained, 0) and units_identical(trained, 1)


def test_glorot_init_differentiates_the_units():
    rng = np.random.default_rng(2)
    trained = train([glorot(rng, *shape) for shape in shapes()])
    assert not units_identical(trained, 0) and not units_identical(trained, 1)
    spread = np.ptp(trained[0], axis=1).max()
    assert spread > 0.1


def stack_of(inits: list[Init]) -> Stack:
    layers = [Layer(f"W{index + 1}", fan_in, fan_out, init, Init("zeros"), "tanh",
                    units=fan_out)
              for index, ((fan_in, fan_out), init) in enumerate(zip(shapes(), inits))]
    layers[-1].activation = "linear"
    return Stack("mlp", layers)


def test_step_zero_pass_predicts_the_training_outcome():
    zeros = signal.step_zero(stack_of([Init("zeros")] * 3))
    constant = signal.step_zero(stack_of([Init("constant", 0.3)] * 3))
    glorot_init = Init("random", variance_rule=("fan_avg", 1.0))
    random = signal.step_zero(stack_of([glorot_init] * 3))
    assert zeros.copied_units[:2] == [True, True]
    assert constant.copied_units[:2] == [True, True]
    assert random.copied_units[:2] == [False, False]
