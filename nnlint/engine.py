"""The engine: pre-filter, parse once, build the model, one walk for all rules, filter, sort.

Every file is guarded: decode failures, syntax errors and recursion limits become NNL001
(the CLI) and the run goes on; a bug in one rule is reported for that (file, rule) and the
other rules' findings are kept. NNLINT_STRICT=1 (set by the tests) makes such bugs raise.
"""
from __future__ import annotations

import os
import re
import traceback
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Iterable, Sequence

import libcst as cst
from libcst.metadata import MetadataWrapper, PositionProvider

from nnlint import noqa, notebooks
from nnlint.analysis.api import FRAMEWORK_PACKAGES
from nnlint.analysis.model import ModuleModel
from nnlint.analysis.project import ProjectIndex, package_of
from nnlint.analysis.walk import WalkContext
from nnlint.config import Settings, with_default_ignores
from nnlint.files import DecodeError, decode, discover
from nnlint.finding import Finding
from nnlint.parsing import ParseFailure, parse
from nnlint.rules.base import Report, Rule, all_rules, get_rule

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
    #: one-line notices on stderr that do not change the exit status (a notebook of
    #: another language, skipped as a folder's non-Python files are)
    notes: list[str] = field(default_factory=list)


class Dispatcher(cst.CSTVisitor):
    """One libcst walk that calls every enabled rule's visit_*/leave_* methods."""

    def __init__(self, rules: Sequence[Rule], context: WalkContext,
                 on_error: "callable") -> None:
        super().__init__()
        self.context = context
        self._on_error = on_error
        self._visits: dict[str, list] = {}
        self._leaves: dict[str, list] = {}
        for rule in rules:
            for type_name, method in _visit_methods(type(rule), "visit_"):
                self._visits.setdefault(type_name, []).append((rule, method))
            for type_name, method in _visit_methods(type(rule), "leave_"):
                self._leaves.setdefault(type_name, []).append((rule, method))
        self._broken: set[str] = set()

    def on_visit(self, node: cst.CSTNode) -> bool:
        self.context.enter(node)
        handlers = self._visits.get(type(node).__name__)
        if handlers:
            self._call(handlers, node)
        self.context.ancestors.append(node)
        return True

    def on_leave(self, original_node: cst.CSTNode) -> None:
        self.context.ancestors.pop()
        handlers = self._leaves.get(type(original_node).__name__)
        if handlers:
            self._call(handlers, original_node)
        self.context.leave(original_node)

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
    key = (rule_class, prefix)
    if key not in _METHOD_CACHE:
        found = []
        for attribute in dir(rule_class):
            if attribute.startswith(prefix):
                found.append((attribute[len(prefix):], getattr(rule_class, attribute)))
        _METHOD_CACHE[key] = found
    return _METHOD_CACHE[key]


def enabled_rules(settings: Settings, path: str) -> list[type[Rule]]:
    return [rule for rule in all_rules()
            if not rule.engine_only and not rule.retired and settings.is_enabled(rule.code, path)]


def analyse_module(module: cst.Module, text: str, path: str, settings: Settings,
                   project: ProjectIndex | None, package: str | None = None,
                   apply_noqa: bool = True) -> FileResult:
    """Run the model pass and the rule walk on a parsed module."""
    result = FileResult(path)
    model = ModuleModel(module, path, settings, project, package)
    if project is not None:
        project.remember(path, text.encode("utf-8", "surrogatepass"), model.summary())
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

    module.visit(Dispatcher(rules, context, on_error))
    if sink:
        result.findings = _place(sink, module, path)
        if apply_noqa:
            result.findings = _without_noqa(result.findings, text)
    return result


def _place(reports: list[Report], module: cst.Module, path: str) -> list[Finding]:
    """Turn reports into findings; positions are computed once, only when there are some."""
    positions = None
    if any(report.node is not None for report in reports):
        positions = MetadataWrapper(module, unsafe_skip_copy=True).resolve(PositionProvider)
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
        findings.append(Finding(path, None, line, column, report.rule.code, report.rule.name,
                                report.severity, report.message, end_line, end_column))
    return findings


def _without_noqa(findings: list[Finding], text: str) -> list[Finding]:
    mapping = noqa.noqa_lines(text)
    return [finding for finding in findings
            if not noqa.is_suppressed(finding.code, mapping.get(finding.line, ""))]


def parse_error_finding(path: str, failure: ParseFailure | DecodeError,
                        line: int = 1, column: int = 1) -> Finding:
    rule = get_rule(PARSE_ERROR)
    assert rule is not None
    message = getattr(failure, "message", None) or str(failure)
    if isinstance(failure, ParseFailure):
        line, column = failure.line, failure.column
    return Finding(path, None, line, column, rule.code, rule.name, rule.severity,
                   rule.message.format(detail=message))


def lint_text(text: str, path: str = "<string>", settings: Settings | None = None,
              project: ProjectIndex | None = None, apply_noqa: bool = True) -> FileResult:
    """Lint source text (already decoded) and return the file's result."""
    settings = settings if settings is not None else with_default_ignores(Settings())
    result = FileResult(path)
    if text.startswith("\ufeff"):
        text = text[1:]
    lines = text.splitlines(keepends=True)
    if noqa.file_is_skipped(lines) or not wants_analysis(text):
        return result
    try:
        module = parse(text)
    except ParseFailure as failure:
        if settings.is_enabled(PARSE_ERROR, path):
            finding = parse_error_finding(path, failure)
            result.findings = _without_noqa([finding], text) if apply_noqa else [finding]
        return result
    package = package_of(path)[0] if os.path.isfile(path) else None
    try:
        analysed = analyse_module(module, text, path, settings, project, package, apply_noqa)
    except RecursionError:
        if is_strict():
            raise
        result.messages.append(f"nnlint: {path}: nested too deeply to analyse; file skipped")
        return result
    except Exception as error:  # noqa: BLE001 - the model pass failing must not end the run
        if is_strict():
            raise
        result.errors.append(InternalError(path, "model", f"{type(error).__name__}: {error}"))
        return result
    analysed.findings.sort(key=Finding.sort_key)
    return analysed


def check_file(path: str, settings: Settings, project: ProjectIndex | None = None) -> FileResult:
    """Read, decode and lint one file; never raises for bad input."""
    try:
        with open(path, "rb") as handle:
            data = handle.read()
    except IsADirectoryError:
        return FileResult(path, messages=[f"nnlint: {path}: is a folder, not a file; skipped"])
    except OSError as error:
        reason = error.strerror or type(error).__name__
        return FileResult(path, messages=[f"nnlint: {path}: cannot read: {reason}"])
    if notebooks.is_notebook(path):
        return notebooks.check_notebook(path, data, settings, project)
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


_WORKER_PROJECT: ProjectIndex | None = None


def _check_in_worker(path: str, settings: Settings) -> FileResult:
    global _WORKER_PROJECT
    if _WORKER_PROJECT is None:
        _WORKER_PROJECT = ProjectIndex(settings)
    return check_file(path, settings, _WORKER_PROJECT)


#: below this many files a process pool costs more than it saves (measured: ~0.15 s start-up)
PARALLEL_THRESHOLD = 8


def run_paths(paths: Iterable[str], settings: Settings | None = None,
              jobs: int | None = None) -> RunReport:
    """Discover and check files; the result does not depend on `jobs`."""
    settings = settings if settings is not None else with_default_ignores(Settings())
    paths = list(paths)
    messages: list[str] = []
    for given in paths:
        if not os.path.exists(given) and not os.path.islink(given):
            messages.append(f"nnlint: {given}: no such file or folder")
    files = list(discover([p for p in paths if os.path.lexists(p)], settings.exclude,
                          settings.root))
    jobs = jobs if jobs is not None else (os.cpu_count() or 1)
    results: list[FileResult]
    if jobs <= 1 or len(files) < PARALLEL_THRESHOLD:
        project = ProjectIndex(settings)
        results = [check_file(path, settings, project) for path in files]
    else:
        with ProcessPoolExecutor(max_workers=jobs) as pool:
            results = list(pool.map(_check_in_worker, files, [settings] * len(files),
                                    chunksize=max(1, len(files) // (jobs * 4))))
    findings: list[Finding] = []
    errors: list[InternalError] = []
    for result in results:
        findings.extend(result.findings)
        errors.extend(result.errors)
        messages.extend(result.messages)
    findings.sort(key=Finding.sort_key)
    notes = [note for result in results for note in result.notes]
    return RunReport(findings, len(files), errors, messages, notes)
