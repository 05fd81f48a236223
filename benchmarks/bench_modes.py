"""Cost of the train/eval mode analysis: nnlint with it over nnlint without it (a ratio).

Run from the repository root: `python benchmarks/bench_modes.py`. The corpus is every
fixture of the NNL4xx family plus the demo's PyTorch files that have no finding (so both
runs skip the position pass, which only files with findings pay), each linted on its own,
repeated; the baseline is the same run with the mode analysis switched off.
"""
from __future__ import annotations

import time
from pathlib import Path

from nnlint.analysis import modes
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text

ROOT = Path(__file__).resolve().parent.parent
REPEATS = 20


def corpus() -> list[str]:
    files = sorted((ROOT / "fixtures" / "rules").glob("NNL40*/*.py"))
    files += [ROOT / "fixtures" / "demo" / "train_damage.py",
              ROOT / "fixtures" / "demo" / "kestrel" / "models.py",
              ROOT / "fixtures" / "demo" / "kestrel" / "helpers.py"]
    settings = with_default_ignores(Settings())
    texts = [path.read_text() for path in files]
    return [text for text in texts if not lint_text(text, "bench.py", settings).findings]


def run(texts: list[str]) -> float:
    settings = with_default_ignores(Settings())
    start = time.perf_counter()
    for _ in range(REPEATS):
        for text in texts:
            lint_text(text, "bench.py", settings)
    return time.perf_counter() - start


def main() -> None:
    texts = corpus()
    lines = sum(text.count("\n") for text in texts) * REPEATS
    run(texts)  # warm caches and imports
    with_analysis = min(run(texts) for _ in range(3))
    original = modes.ModeAnalysis._run_all
    modes.ModeAnalysis._run_all = lambda self: None
    try:
        without = min(run(texts) for _ in range(3))
    finally:
        modes.ModeAnalysis._run_all = original
    print(f"{len(texts)} files, {lines} lines; "
          f"with mode analysis {lines / with_analysis:,.0f} lines/s, "
          f"without {lines / without:,.0f} lines/s; ratio {with_analysis / without:.2f}")


if __name__ == "__main__":
    main()
