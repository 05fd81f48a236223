"""Time the step-0 simulation of a 10-layer, 1024-wide tanh MLP (target: well under 50 ms).

Run from the repository root: `PYTHONPATH=$PWD python benchmarks/bench_signal.py`. Prints
the best of several runs for each pass and for both together, and checks that repeated runs
give identical results. Not a test: tests never time anything.
"""
from __future__ import annotations

import time

from nnlint.analysis import signal
from nnlint.analysis.signal import Init, Layer, Stack

RUNS = 20
DEPTH, WIDTH = 10, 1024


def deep_stack() -> Stack:
    glorot = Init("random", variance_rule=("fan_avg", 1.0))
    layers = [Layer(f"fc{index}", WIDTH, WIDTH, glorot, Init("zeros"), "tanh", units=WIDTH)
              for index in range(1, DEPTH + 1)]
    layers[-1].activation = "linear"
    return Stack("bench", layers)


def best_of(function, runs: int = RUNS) -> tuple[float, object]:
    best, result = float("inf"), None
    for _ in range(runs):
        stack = deep_stack()
        start = time.perf_counter()
        result = function(stack)
        best = min(best, time.perf_counter() - start)
    return best, result


def main() -> None:
    signal.mean_field(deep_stack())  # first call imports numpy and builds the rules
    mean_field_time, first = best_of(signal.mean_field)
    step_zero_time, exact = best_of(signal.step_zero)
    both_time, _ = best_of(lambda stack: (signal.mean_field(stack), signal.step_zero(stack)))
    identical = first == signal.mean_field(deep_stack()) and exact == signal.step_zero(
        deep_stack())
    print(f"{DEPTH}-layer {WIDTH}-wide tanh MLP, best of {RUNS} runs:")
    print(f"  mean-field pass   {mean_field_time * 1e3:7.3f} ms")
    print(f"  exact step-0 pass {step_zero_time * 1e3:7.3f} ms")
    print(f"  both              {both_time * 1e3:7.3f} ms  (target < 50 ms: "
          f"{both_time * 1e3 / 50:.3f} of it)")
    print(f"  identical across runs: {identical}")


if __name__ == "__main__":
    main()
