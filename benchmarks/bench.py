"""Speed of nnlint beside the parse floor and flake8, on real code nobody here wrote.

Prints lines/second and the ratios the project tracks (issue 9), measured in ONE run,
single process unless stated, best of --repeat runs of each command:

  a  floor: libcst parse + one empty visitor walk of every file
  a' floor restricted to the files nnlint's pre-filter lets through (what it really parses)
  b  nnlint check --no-cache -j 1
  c  flake8 with only its default checks (plugin disabled), -j 1
  d  flake8 --select NNL (the plugin alone), -j 1
  e  nnlint check with a warm cache, -j 1
  f  nnlint check --no-cache -j 2

Targets: b/a <= 1.3, b/c <= 1.0, e/b <= 0.05, f/b <= 0.6 on 2 cores; peak memory under
300 MB on a 10,000-line file. Every command runs as a subprocess, so each time includes one
interpreter start (about 0.1-0.3 s); trees of 100k+ lines make that negligible.

Usage: python benchmarks/bench.py [--tree PATH ...] [--repeat N]
Default tree: the installed sources of numpy, libcst and flake8 (without their tests), and
torch/nn + torch/optim where torch is installed.
"""
from __future__ import annotations

import argparse
import importlib.util
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

#: flake8 without the NNL plugin: drop our entry point before flake8 loads its plugins
FLAKE8_WITHOUT_NNL = textwrap.dedent("""
    import sys
    from flake8.plugins import finder

    original = finder.find_plugins

    def without_nnlint(cfg, opts):
        return [plugin for plugin in original(cfg, opts) if plugin.package != "nnlint"]

    finder.find_plugins = without_nnlint
    from flake8.main.cli import main
    sys.exit(main())
""")

FLOOR_SCRIPT = textwrap.dedent("""
    import sys
    import libcst as cst

    class Empty(cst.CSTVisitor):
        pass

    for path in sys.argv[1:]:
        try:
            module = cst.parse_module(open(path, "rb").read())
        except Exception:
            continue
        module.visit(Empty())
""")


def default_tree() -> list[Path]:
    roots = []
    for package in ("numpy", "libcst", "flake8"):
        spec = importlib.util.find_spec(package)
        if spec and spec.submodule_search_locations:
            roots.append(Path(list(spec.submodule_search_locations)[0]))
    spec = importlib.util.find_spec("torch")
    if spec and spec.submodule_search_locations:
        torch_root = Path(list(spec.submodule_search_locations)[0])
        roots += [torch_root / "nn", torch_root / "optim"]
    return roots


def python_files(roots: list[Path]) -> list[Path]:
    """Every .py file under the roots, without test suites (they dwarf the library code)."""
    files = []
    for root in roots:
        files += sorted(path for path in root.rglob("*.py")
                        if path.is_file() and "tests" not in path.relative_to(root).parts)
    return files


def copy_tree(files: list[Path], destination: Path) -> list[Path]:
    """Copy into one folder so that every tool sees the same files and no config."""
    copied = []
    for index, source in enumerate(files):
        target = destination / f"{index:05d}_{source.name}"
        shutil.copyfile(source, target)
        copied.append(target)
    return copied


def timed(command: list[str], cwd: Path, repeat: int) -> tuple[float, int]:
    """Best wall time over `repeat` runs and the peak resident memory (bytes) seen."""
    best, peak = float("inf"), 0
    env = {key: value for key, value in os.environ.items() if key != "NNLINT_STRICT"}
    for _ in range(repeat):
        started = time.perf_counter()
        process = subprocess.Popen(command, cwd=cwd, stdout=subprocess.DEVNULL,
                                   stderr=subprocess.DEVNULL, env=env)
        _, _, usage = os.wait4(process.pid, 0)
        elapsed = time.perf_counter() - started
        best = min(best, elapsed)
        peak = max(peak, usage.ru_maxrss * 1024)  # ru_maxrss is in KiB on Linux
    return best, peak


def ten_thousand_line_file(folder: Path) -> Path:
    """A generated 10,000-line PyTorch module (repeated realistic blocks)."""
    block = textwrap.dedent("""
        class Block{n}(nn.Module):
            def __init__(self, width=64, drop_rate=0.1):
                super().__init__()
                self.proj = nn.Linear(width, width)
                self.norm = nn.LayerNorm(width)
                self.drop_rate = drop_rate

            def forward(self, x):
                h = F.gelu(self.proj(self.norm(x)))
                h = F.dropout(h, p=self.drop_rate, training=self.training)
                return x + h


        def train_block{n}(model, loader, optimizer):
            model.train()
            for batch, target in loader:
                optimizer.zero_grad()
                loss = F.cross_entropy(model(batch), target)
                loss.backward()
                optimizer.step()
    """)
    lines = ["import torch", "import torch.nn.functional as F", "from torch import nn", ""]
    count = 0
    while len(lines) < 10_000:
        lines += block.format(n=count).splitlines()
        count += 1
    path = folder / "ten_thousand_lines.py"
    path.write_text("\n".join(lines[:10_000]) + "\n")
    return path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--tree", action="append", type=Path, help="folder of Python code")
    parser.add_argument("--repeat", type=int, default=3)
    arguments = parser.parse_args(argv)
    roots = arguments.tree or default_tree()
    files = python_files(roots)
    from nnlint.engine import wants_analysis

    with tempfile.TemporaryDirectory(prefix="nnlint-bench-") as scratch:
        work = Path(scratch) / "tree"
        work.mkdir()
        copied = copy_tree(files, work)
        lines = sum(path.read_bytes().count(b"\n") for path in copied)
        analysed = [path for path in copied
                    if wants_analysis(path.read_bytes().decode("utf-8", "replace"))]
        analysed_lines = sum(path.read_bytes().count(b"\n") for path in analysed)
        floor_script = Path(scratch) / "floor.py"
        floor_script.write_text(FLOOR_SCRIPT)
        flake8_plain = Path(scratch) / "flake8_plain.py"
        flake8_plain.write_text(FLAKE8_WITHOUT_NNL)
        python = sys.executable
        names = [path.name for path in copied]
        repeat = arguments.repeat
        print(f"machine: {platform.machine()}, {os.cpu_count()} CPUs, "
              f"Python {platform.python_version()}, {platform.platform()}")
        print(f"tree: {len(copied)} files, {lines} lines ({len(analysed)} files, "
              f"{analysed_lines} lines pass nnlint's pre-filter); best of {repeat}")
        results = {}
        results["a"] = timed([python, str(floor_script), *names], work, repeat)
        results["a'"] = timed([python, str(floor_script), *[p.name for p in analysed]], work,
                              repeat)
        results["b"] = timed([python, "-m", "nnlint", "check", "--no-cache", "-j", "1", "."],
                             work, repeat)
        results["c"] = timed([python, str(flake8_plain), "--isolated", "-j", "1", "."], work,
                             repeat)
        results["d"] = timed([python, "-m", "flake8", "--isolated", "-j", "1", "--select",
                              "NNL", "."], work, repeat)
        subprocess.run([python, "-m", "nnlint", "check", "-j", "1", "."], cwd=work,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        results["e"] = timed([python, "-m", "nnlint", "check", "-j", "1", "."], work, repeat)
        results["f"] = timed([python, "-m", "nnlint", "check", "--no-cache", "-j", "2", "."],
                             work, repeat)
        big = ten_thousand_line_file(Path(scratch))
        _, big_peak = timed([python, "-m", "nnlint", "check", "--no-cache", "-j", "1",
                             big.name], big.parent, 1)
    labels = {"a": "floor (parse + empty walk, all files)",
              "a'": "floor (files past the pre-filter)",
              "b": "nnlint check --no-cache -j 1", "c": "flake8 default checks -j 1",
              "d": "flake8 --select NNL -j 1", "e": "nnlint check, warm cache",
              "f": "nnlint check --no-cache -j 2"}
    for key, label in labels.items():
        seconds, peak = results[key]
        print(f"  {key:2} {label:40} {seconds:7.2f} s  {lines / seconds:9.0f} lines/s  "
              f"peak {peak / 2**20:6.0f} MB")

    def ratio(top: str, bottom: str) -> float:
        return results[top][0] / results[bottom][0]

    print("ratios (target):")
    print(f"  b/a  {ratio('b', 'a'):.2f}  (<= 1.3)")
    print(f"  b/a' {ratio('b', 'a' + chr(39)):.2f}  (same, against what nnlint parses)")
    print(f"  b/c  {ratio('b', 'c'):.2f}  (<= 1.0)")
    print(f"  d/c  {ratio('d', 'c'):.2f}")
    print(f"  e/b  {ratio('e', 'b'):.3f} (<= 0.05)")
    print(f"  f/b  {ratio('f', 'b'):.2f}  (<= 0.6 on 2 cores)")
    print(f"peak memory, 10,000-line file: {big_peak / 2**20:.0f} MB (< 300 MB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
