"""Source positions of the few nodes a file reports, without tracking the whole file.

libcst's PositionProvider computes a position for every node by generating the code of the
whole module, which costs about as much as a third of the parse, and a file usually reports
a handful of nodes. Here only the top-level statements that hold reported nodes get
positions (PositionProvider on a one-statement module), and each is shifted to its line in
the file, which CPython's `ast` (a C parser, about ten times faster than libcst's) gives.
The result is the same as PositionProvider's on the whole module; where the two could
disagree (source `ast` rejects, statement counts that do not match, nodes outside the
statements) the whole module is tracked as before.
"""
from __future__ import annotations

import ast
import warnings
from typing import Iterable, Mapping

import libcst as cst
from libcst.metadata import CodeRange, MetadataWrapper, PositionProvider

from nnlint.analysis.walk import children


def whole_module(module: cst.Module) -> Mapping[cst.CSTNode, CodeRange]:
    return MetadataWrapper(module, unsafe_skip_copy=True).resolve(PositionProvider)


def positions_of(module: cst.Module, text: str, nodes: Iterable[cst.CSTNode]
                 ) -> Mapping[cst.CSTNode, CodeRange]:
    """CodeRange of each of `nodes` (all in `module`, parsed from `text`)."""
    wanted = {id(node): node for node in nodes}
    owners = _owning_statements(module, wanted)
    if owners is None:
        return whole_module(module)
    starts = _statement_lines(module, text, set(owners.values()))
    if starts is None:
        return whole_module(module)
    found: dict[cst.CSTNode, CodeRange] = {}
    by_statement: dict[int, list[cst.CSTNode]] = {}
    for key, index in owners.items():
        by_statement.setdefault(index, []).append(wanted[key])
    for index, members in by_statement.items():
        statement = module.body[index]
        alone = module.with_changes(header=(), body=(statement,), footer=())
        local = whole_module(alone)
        shift = starts[index] - local[statement].start.line
        for node in members:
            span = local[node]
            found[node] = CodeRange((span.start.line + shift, span.start.column),
                                    (span.end.line + shift, span.end.column))
    return found


def _owning_statements(module: cst.Module, wanted: dict[int, cst.CSTNode]
                       ) -> dict[int, int] | None:
    """id(node) -> index of the top-level statement holding it; None if one is elsewhere."""
    owners: dict[int, int] = {}
    for index, statement in enumerate(module.body):
        stack: list[cst.CSTNode] = [statement]
        while stack:
            node = stack.pop()
            if id(node) in wanted:
                owners[id(node)] = index
            stack.extend(children(node))
        if len(owners) == len(wanted):
            return owners
    return None


def _statement_lines(module: cst.Module, text: str, indexes: set[int]) -> dict[int, int] | None:
    """1-based first line of each top-level statement in `indexes`, from CPython's parse."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # SyntaxWarning for odd escapes is not our news
            tree = ast.parse(text)
    except (SyntaxError, ValueError, RecursionError, MemoryError):
        return None
    # libcst keeps `a = 1; b = 2` as one statement line, CPython as two statements
    first_of: list[int] = []
    count = 0
    for statement in module.body:
        first_of.append(count)
        count += len(statement.body) if isinstance(statement, cst.SimpleStatementLine) else 1
    if count != len(tree.body):
        return None
    # a decorated definition starts at `def`/`class` in both (CPython 3.8+ and libcst)
    return {index: tree.body[first_of[index]].lineno for index in indexes}
