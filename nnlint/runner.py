"""A run over many files: discovery, the result cache, worker processes, progress.

Nothing here parses: a warm run whose files are all cached never imports libcst, numpy or
the rules (the engine is imported the first time a file must really be checked), which is
what keeps an unchanged tree's re-run fast (README "Speed").
"""
from __future__ import annotations

import contextlib
import gc
import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Callable, Iterable

from nnlint.analysis.project import ProjectIndex
from nnlint.cache import ResultCache
from nnlint.config import Settings, with_default_ignores
from nnlint.files import discover, read_source
from nnlint.finding import FileResult, Finding, InternalError


@dataclass
class RunReport:
    findings: list[Finding]
    files_checked: int
    errors: list[InternalError]
    messages: list[str]
    notes: list[str] = field(default_factory=list)


def _engine():
    from nnlint import engine  # libcst, numpy and the rules: only once a file needs them

    return engine


class _Checker:
    """Checks files for one run, in this process or a worker, with the result cache."""

    def __init__(self, settings: Settings, use_cache: bool) -> None:
        self.settings = settings
        self.project = ProjectIndex(settings)
        self.cache = ResultCache(settings.root, settings.cache_key()) if use_cache else None

    def cached(self, path: str) -> FileResult | None:
        if self.cache is None:
            return None
        data = read_source(path)
        if not isinstance(data, bytes):
            return None
        findings = self.cache.get(path, data)
        return None if findings is None else FileResult(path, findings)

    def check(self, path: str) -> FileResult:
        data = read_source(path)
        if isinstance(data, str):
            return FileResult(path, messages=[data])
        if self.cache is None or isinstance(data, int):
            return _engine().check_data(path, data, self.settings, self.project)
        self.project.track()
        try:
            result = _engine().check_data(path, data, self.settings, self.project)
        finally:
            dependencies = self.project.untrack()
        if not result.errors and not result.messages and not result.notes:
            dependencies.pop(os.path.abspath(path), None)
            self.cache.put(path, data, result.findings, dependencies)
        return result


_WORKER: _Checker | None = None


#: first-generation threshold of the cyclic garbage collector during a run. A parsed file is
#: tens of thousands of libcst nodes, and the default threshold (700 allocations, Python
#: documentation of gc.set_threshold) starts a collection every few hundred of them; the
#: trees hold no reference cycles, so those collections free nothing. 50,000 cut the CPU
#: time of `nnlint check -j 1` on benchmarks/bench.py's tree by 19% (4.92 s to 3.98 s,
#: measured here 2026-12-02) with no change in peak memory
RUN_GC_THRESHOLD = 50_000


@contextlib.contextmanager
def collector_tuned_for_trees():
    """Collect cyclic garbage less often while files are checked; restore it afterwards."""
    before = gc.get_threshold()
    gc.set_threshold(RUN_GC_THRESHOLD, *before[1:])
    try:
        yield
    finally:
        gc.set_threshold(*before)


def _start_worker(settings: Settings, use_cache: bool) -> None:
    global _WORKER
    # a worker process only checks files, so the tuned collector stays for its lifetime
    gc.set_threshold(RUN_GC_THRESHOLD, *gc.get_threshold()[1:])
    _WORKER = _Checker(settings, use_cache)


def _check_in_worker(path: str) -> FileResult:
    assert _WORKER is not None
    return _WORKER.check(path)


#: below this many files a process pool costs more than it saves: each worker imports
#: libcst, numpy and the rules, 0.34 s of CPU measured here (`python -c 'import
#: nnlint.engine'`, 2026-12-02), about what checking eight small files costs
PARALLEL_THRESHOLD = 8

Progress = Callable[[int, int], None]


def run_paths(paths: Iterable[str], settings: Settings | None = None,
              jobs: int | None = None, use_cache: bool = False,
              progress: Progress | None = None) -> RunReport:
    """Discover and check files; the result does not depend on `jobs` or the cache.

    `progress(done, total)` is called after each file.
    """
    settings = settings if settings is not None else with_default_ignores(Settings())
    paths = list(paths)
    messages: list[str] = []
    for given in paths:
        if not os.path.lexists(given):
            messages.append(f"nnlint: {given}: no such file or folder")
    files = list(discover([p for p in paths if os.path.lexists(p)], settings.exclude,
                          settings.root))
    checker = _Checker(settings, use_cache)
    done: dict[str, FileResult] = {}
    for path in files:
        hit = checker.cached(path)
        if hit is not None:
            done[path] = hit
    pending = [path for path in files if path not in done]
    report_progress = progress or (lambda finished, total: None)
    jobs = jobs if jobs is not None else (os.cpu_count() or 1)
    if jobs <= 1 or len(pending) < PARALLEL_THRESHOLD:
        with collector_tuned_for_trees():
            for path in pending:
                done[path] = checker.check(path)
                report_progress(len(done), len(files))
    else:
        with ProcessPoolExecutor(max_workers=jobs, initializer=_start_worker,
                                 initargs=(settings, use_cache)) as pool:
            chunk = max(1, min(16, len(pending) // (jobs * 4)))
            for path, result in zip(pending, pool.map(_check_in_worker, pending,
                                                      chunksize=chunk)):
                done[path] = result
                report_progress(len(done), len(files))
    findings: list[Finding] = []
    errors: list[InternalError] = []
    for path in files:
        result = done[path]
        findings.extend(result.findings)
        errors.extend(result.errors)
        messages.extend(result.messages)
    findings.sort(key=Finding.sort_key)
    notes = [note for path in files for note in done[path].notes]
    return RunReport(findings, len(files), errors, messages, notes)
