"""The engine: pre-filter, parse once, build the model, one walk for all rules, filter, sort.

Every file is guarded: decode failures, syntax errors and recursion limits become NNL001
(the CLI) and the run goes on; a bug in one rule is reported for that (file, rule) and the
other rules' findings are kept. NNLINT_STRICT=1 (set by the tests) makes such bugs raise.
"""
from __future__ import annotations

import contextlib
import gc
import os
import re
import stat
import traceback
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Callable, Iterable, Sequence

import libcst as cst

from nnlint import noqa, notebooks
from nnlint.cache import ResultCache
from nnlint.analysis.api import FRAMEWORK_PACKAGES
from nnlint.analysis.model import ModuleModel
from nnlint.analysis.project import ProjectIndex, package_of
from nnlint.analysis.walk import TRACKED_TYPES as _TRACKED_TYPES
from nnlint.analysis.walk import WalkContext, child_fields
from nnlint.config import Settings, with_default_ignores
from nnlint.edits import edits_of, fix_anchors
from nnlint.files import DecodeError, decode, discover, split_lines
from nnlint.finding import Finding
from nnlint.parsing import ParseFailure, parse
from nnlint.positions import positions_of
from nnlint.rules.base import Fix, Report, Rule, all_rules, get_rule

PARSE_ERROR = "NNL001"

#: a framework import, or training-loop calls in a file that gets its framework elsewhere
_PREFILTER = re.compile(
    r"^[ \t]*(?:import[ \t]+(?:[\w.]+[ \t]*(?:as[ \t]+\w+)?[ \t]*,[ \t]*)*|from[ \t]+)(?:"
    + "|".join(re.escape(package) for package in FRAMEWORK_PACKAGES)
    + r")\b|\.zero_grad\b|\.backward\b",
    re.M,
)


def wants_analysis(text: str) -> bool:
    """Cheap text test: does the file import a supported framework (or train something)?"""
    return _PREFILTER.search(text) is not None


def is_strict() -> bool:
    return os.environ.get("NNLINT_STRICT", "") not in ("", "0")


@dataclass
class InternalError:
    """A bug of ours, caught while checking one file with one rule."""

    path: str
    code: str
    detail: str

    def describe(self) -> str:
        return f"nnlint: internal error in {self.code} on {self.path}: {self.detail}"


@dataclass
class FileResult:
    path: str
    findings: list[Finding] = field(default_factory=list)
    errors: list[InternalError] = field(default_factory=list)
    #: one-line messages for the user (unreadable file, ...), shown on stderr
    messages: list[str] = field(default_factory=list)
    #: (finding, rewrite) pairs; only filled for `nnlint fix` (CST nodes stay in-process)
    fixes: list[tuple[Finding, Fix]] = field(default_factory=list)
    #: one-line notices on stderr that do not change the exit status (a notebook of
    #: another language, skipped as a folder's non-Python files are)
    notes: list[str] = field(default_factory=list)


class Dispatcher:
    """One walk of the tree that calls every enabled rule's visit_*/leave_* methods.

    The walk is ours, not libcst's `visit`: libcst rebuilds every node on the way back up
    even for read-only visitors, and visits every whitespace and bracket. This one is
    iterative (no recursion limit), skips layout-only fields, and reaches every other node
    in source order, calling `visit_<Node>` before its children and `leave_<Node>` after.
    """

    def __init__(self, rules: Sequence[Rule], context: WalkContext,
                 on_error: Callable[[str, Exception], None]) -> None:
        self.context = context
        self._on_error = on_error
        self._visits: dict[type, list] = {}
        self._leaves: dict[type, list] = {}
        for rule in rules:
            for node_type, method in _visit_methods(type(rule), "visit_"):
                self._visits.setdefault(node_type, []).append((rule, method))
            for node_type, method in _visit_methods(type(rule), "leave_"):
                self._leaves.setdefault(node_type, []).append((rule, method))
        self._broken: set[str] = set()

    def walk(self, module: cst.Module) -> None:
        context = self.context
        ancestors = context.ancestors
        visits, leaves = self._visits, self._leaves
        tracked = _TRACKED_TYPES
        node_base = cst.CSTNode
        #: (node, leaving) pairs; a node is pushed again as "leaving" before its children
        stack: list[tuple[cst.CSTNode, bool]] = [(module, False)]
        while stack:
            node, leaving = stack.pop()
            node_type = type(node)
            if leaving:
                ancestors.pop()
                handlers = leaves.get(node_type)
                if handlers:
                    self._call(handlers, node)
                if node_type in tracked:
                    context.leave(node)
                continue
            if node_type in tracked:
                context.enter(node)
            handlers = visits.get(node_type)
            if handlers:
                self._call(handlers, node)
            ancestors.append(node)
            stack.append((node, True))
            children: list[cst.CSTNode] = []
            for name in child_fields(node_type):
                value = getattr(node, name)
                if isinstance(value, node_base):
                    children.append(value)
                elif type(value) in (tuple, list):
                    children.extend(item for item in value if isinstance(item, node_base))
            stack.extend((child, False) for child in reversed(children))

    def _call(self, handlers: list, node: cst.CSTNode) -> None:
        for rule, method in handlers:
            if rule.code in self._broken:
                continue
            try:
                method(rule, node)
            except Exception as error:  # noqa: BLE001 - one rule's bug must not end the file
                if is_strict():
                    raise
                self._broken.add(rule.code)
                self._on_error(rule.code, error)


_METHOD_CACHE: dict[tuple[type, str], list] = {}


def _visit_methods(rule_class: type, prefix: str) -> list:
    """(node type, unbound method) pairs for a rule's visit_*/leave_* methods."""
    key = (rule_class, prefix)
    if key not in _METHOD_CACHE:
        found = []
        for attribute in dir(rule_class):
            if attribute.startswith(prefix):
                node_type = getattr(cst, attribute[len(prefix):], None)
                if not isinstance(node_type, type):
                    raise TypeError(f"{rule_class.__name__}.{attribute}: libcst has no node "
                                    f"type {attribute[len(prefix):]!r}")
                found.append((node_type, getattr(rule_class, attribute)))
        _METHOD_CACHE[key] = found
    return _METHOD_CACHE[key]


def enabled_rules(settings: Settings, path: str) -> list[type[Rule]]:
    return [rule for rule in all_rules()
            if not rule.engine_only and not rule.retired and settings.is_enabled(rule.code, path)]


def analyse_module(module: cst.Module, text: str, path: str, settings: Settings,
                   project: ProjectIndex | None, package: str | None = None,
                   apply_noqa: bool = True, keep_fixes: bool = False) -> FileResult:
    """Run the model pass and the rule walk on a parsed module."""
    result = FileResult(path)
    model = ModuleModel(module, path, settings, project, package, source=text)
    if project is not None:
        project.remember(path, text.encode("utf-8", "surrogatepass"), model.summary)
    rule_classes = enabled_rules(settings, path)
    if not rule_classes:
        return result
    context = WalkContext()
    sink: list[Report] = []
    rules = [rule_class(model, context, sink) for rule_class in rule_classes]

    def on_error(code: str, error: Exception) -> None:
        frame = traceback.extract_tb(error.__traceback__)[-1]
        where = f"{os.path.basename(frame.filename)}:{frame.lineno}"
        result.errors.append(InternalError(path, code, f"{type(error).__name__}: {error} "
                                                       f"({where})"))

    Dispatcher(rules, context, on_error).walk(module)
    if sink:
        placed = _place(sink, module, text, path)
        if apply_noqa:
            placed = _without_noqa(placed, text)
        result.findings = [finding for finding, _ in placed]
        if keep_fixes:
            result.fixes = [(finding, fix) for finding, fix in placed if fix is not None]
    return result


def _place(reports: list[Report], module: cst.Module, text: str, path: str
           ) -> list[tuple[Finding, Fix | None]]:
    """Turn reports into findings; positions are computed once, only when there are some."""
    positions = None
    nodes = [report.node for report in reports if report.node is not None]
    if nodes:
        for report in reports:
            if report.fix is not None:
                nodes += fix_anchors(report.fix, module)
        positions = positions_of(module, text, nodes)
    findings = []
    seen: set[tuple] = set()
    for report in reports:
        if report.node is not None and positions is not None:
            span = positions[report.node]
            line, column = span.start.line, span.start.column + 1  # libcst columns are 0-based
            end_line, end_column = span.end.line, span.end.column + 1
        else:
            line, column = report.line or 1, report.column or 1
            end_line = end_column = None
        key = (line, column, report.rule.code, report.message)
        if key in seen:
            continue
        seen.add(key)
        edits = (edits_of(report.fix, module, positions)
                 if report.fix is not None and positions is not None else ())
        findings.append((Finding(path, None, line, column, report.rule.code, report.rule.name,
                                 report.severity, report.message, end_line, end_column,
                                 fixable=report.fix is not None, edits=edits), report.fix))
    return findings


def _without_noqa(placed: list[tuple[Finding, Fix | None]], text: str
                  ) -> list[tuple[Finding, Fix | None]]:
    """Drop the findings a `# noqa` comment suppresses."""
    mapping = noqa.noqa_lines(text)
    return [(finding, fix) for finding, fix in placed
            if not noqa.is_suppressed(finding.code, mapping.get(finding.line, ""))]


def parse_error_finding(path: str, failure: ParseFailure | DecodeError,
                        line: int = 1, column: int = 1) -> Finding:
    rule = get_rule(PARSE_ERROR)
    assert rule is not None
    message = getattr(failure, "message", None) or str(failure)
    if isinstance(failure, ParseFailure):
        line, column = failure.line, failure.column
    elif isinstance(failure, DecodeError):
        line = failure.line
    return Finding(path, None, line, column, rule.code, rule.name, rule.severity,
                   rule.message.format(detail=message))


def lint_text(text: str, path: str = "<string>", settings: Settings | None = None,
              project: ProjectIndex | None = None, apply_noqa: bool = True,
              keep_fixes: bool = False) -> FileResult:
    """Lint source text (already decoded) and return the file's result."""
    settings = settings if settings is not None else with_default_ignores(Settings())
    result = FileResult(path)
    if text.startswith("\ufeff"):
        text = text[1:]
    if not wants_analysis(text) or ("flake8" in text and noqa.file_is_skipped(split_lines(text))):
        return result
    try:
        module = parse(text)
    except ParseFailure as failure:
        if settings.is_enabled(PARSE_ERROR, path):
            finding = parse_error_finding(path, failure)
            kept = _without_noqa([(finding, None)], text) if apply_noqa else [(finding, None)]
            result.findings = [finding for finding, _ in kept]
        return result
    package = package_of(path)[0] if os.path.isfile(path) else None
    try:
        analysed = analyse_module(module, text, path, settings, project, package, apply_noqa,
                                  keep_fixes)
    except RecursionError:
        # Deeper than Python's recursion limit allows a tree walk (about 1,000 nested
        # expressions); raising the limit risks overflowing the C stack, so report instead.
        if settings.is_enabled(PARSE_ERROR, path):
            result.findings = [parse_error_finding(
                path, ParseFailure("expressions nested too deeply to analyse"))]
        return result
    except Exception as error:  # noqa: BLE001 - the model pass failing must not end the run
        if is_strict():
            raise
        result.errors.append(InternalError(path, "model", f"{type(error).__name__}: {error}"))
        return result
    analysed.findings.sort(key=Finding.sort_key)
    return analysed


#: larger files are reported as NNL001 instead of parsed: libcst parses about 10k lines/s
#: (DESIGN §6), so 1 MiB (~25k lines) already costs seconds; real training scripts are far
#: smaller, and files this big are generated (common practice)
MAX_FILE_BYTES = 1 << 20


def read_source(path: str) -> bytes | str:
    """The file's bytes, or a one-line message saying why it cannot be read."""
    try:
        status = os.stat(path)
    except OSError as error:
        return f"nnlint: {path}: cannot read: {error.strerror or type(error).__name__}"
    if stat.S_ISDIR(status.st_mode):
        return f"nnlint: {path}: is a folder, not a file; skipped"
    if not stat.S_ISREG(status.st_mode):
        # FIFOs and devices would block or never end; never open them
        return f"nnlint: {path}: not a regular file; skipped"
    limit = notebooks.MAX_NOTEBOOK_BYTES if notebooks.is_notebook(path) else MAX_FILE_BYTES
    if status.st_size > limit:
        return status.st_size
    try:
        with open(path, "rb") as handle:
            return handle.read(limit + 1)
    except OSError as error:
        return f"nnlint: {path}: cannot read: {error.strerror or type(error).__name__}"


def check_file(path: str, settings: Settings, project: ProjectIndex | None = None) -> FileResult:
    """Read, decode and lint one file; never raises for bad input."""
    data = read_source(path)
    if isinstance(data, str):
        return FileResult(path, messages=[data])
    return check_data(path, data, settings, project)


def check_data(path: str, data: bytes | int, settings: Settings,
               project: ProjectIndex | None = None) -> FileResult:
    """Lint a file's bytes (or, for an oversized file, its size)."""
    if notebooks.is_notebook(path):
        return notebooks.check_notebook(path, data, settings, project)
    if isinstance(data, int) or len(data) > MAX_FILE_BYTES:
        size = data if isinstance(data, int) else len(data)
        result = FileResult(path)
        if settings.is_enabled(PARSE_ERROR, path):
            result.findings = [parse_error_finding(path, ParseFailure(
                f"file is {size / (1 << 20):.1f} MiB, over the "
                f"{MAX_FILE_BYTES >> 20} MiB limit for one file"))]
        return result
    try:
        text = decode(data)
    except DecodeError as error:
        result = FileResult(path)
        if settings.is_enabled(PARSE_ERROR, path):
            result.findings = [parse_error_finding(path, error)]
        return result
    return lint_text(text, path, settings, project)


@dataclass
class RunReport:
    findings: list[Finding]
    files_checked: int
    errors: list[InternalError]
    messages: list[str]
    notes: list[str] = field(default_factory=list)


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
            return check_data(path, data, self.settings, self.project)
        self.project.track()
        try:
            result = check_data(path, data, self.settings, self.project)
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
