"""Cost of the value facts and NNL30x rules: CPU time with them on versus off.

Usage: python benchmarks/numerics_cost.py FOLDER [REPEATS]
Prints lines checked and the ratio (all rules) / (all rules but NNL3xx). Summaries, which
values.py extends for every file, run in both configurations.
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import check_file


def cpu_seconds(paths: list[Path], settings: Settings) -> float:
    start = time.process_time()
    project = ProjectIndex(settings)
    for path in paths:
        check_file(str(path), settings, project)
    return time.process_time() - start


def main() -> None:
    folder = Path(sys.argv[1])
    repeats = int(sys.argv[2]) if len(sys.argv) > 2 else 3
    paths = sorted(folder.rglob("*.py"))
    lines = sum(len(path.read_bytes().splitlines()) for path in paths)
    with_numerics = with_default_ignores(Settings())
    without = with_default_ignores(Settings(ignore=("NNL3",)))
    cpu_seconds(paths[:5], with_numerics)  # warm imports
    best_on = min(cpu_seconds(paths, with_numerics) for _ in range(repeats))
    best_off = min(cpu_seconds(paths, without) for _ in range(repeats))
    print(f"{len(paths)} files, {lines} lines")
    print(f"all rules: {best_on:.2f} s CPU, without NNL3xx: {best_off:.2f} s CPU")
    print(f"ratio: {best_on / best_off:.3f}")


if __name__ == "__main__":
    main()
