"""The engine: pre-filter, parse once, build the model, one walk for all rules, filter, sort.

Every file is guarded: decode failures, syntax errors and recursion limits become NNL001
(the CLI) and the run goes on; a bug in one rule is reported for that (file, rule) and the
other rules' findings are kept. NNLINT_STRICT=1 (set by the tests) makes such bugs raise.
"""
from __future__ import annotations

import os
import re
import traceback
from typing import Callable, Sequence

import libcst as cst

from nnlint import noqa, notebooks
from nnlint.analysis.api import FRAMEWORK_PACKAGES
from nnlint.analysis.model import ModuleModel
from nnlint.analysis.project import ProjectIndex, package_of
from nnlint.analysis.walk import TRACKED_TYPES as _TRACKED_TYPES
from nnlint.analysis.walk import NODE_KINDS, WalkContext, child_fields, is_node_kind
from nnlint.config import Settings, with_default_ignores
from nnlint.edits import edits_of, fix_anchors
from nnlint.files import MAX_FILE_BYTES, DecodeError, decode, read_source, split_lines
from nnlint.finding import FileResult, Finding, InternalError
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
        # type(x) lookups in a per-type table: isinstance against libcst's CSTNode, an ABC,
        # was 1.4 million ABC checks on benchmarks/bench.py's tree (cProfile)
        known_kinds = NODE_KINDS
        #: (node, leaving) pairs; a node is pushed again as "leaving" before its children
        stack: list[tuple[cst.CSTNode, bool]] = [(module, False)]
        push, pop = stack.append, stack.pop
        while stack:
            node, leaving = pop()
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
            push((node, True))
            children: list[cst.CSTNode] = []
            for name in child_fields(node_type):
                value = getattr(node, name)
                kind = type(value)
                if kind is tuple or kind is list:
                    for item in value:
                        item_kind = type(item)
                        is_node = known_kinds.get(item_kind)
                        if is_node is None:
                            is_node = is_node_kind(item_kind)
                        if is_node:
                            children.append(item)
                    continue
                is_node = known_kinds.get(kind)
                if is_node is None:
                    is_node = is_node_kind(kind)
                if is_node:
                    children.append(value)
            for child in reversed(children):
                push((child, False))

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
            result.module = module
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
