"""A fix as text edits: what `nnlint fix` rewrites, in positions other tools can apply.

`nnlint fix` itself rewrites the libcst tree (nnlint/fix.py); SARIF output (its `fixes`,
§3.55 of SARIF 2.1.0) needs the same rewrite as replacements of text regions. Both use the
import placement defined here, so the two can never disagree on where an import goes.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Mapping

import libcst as cst

from nnlint.finding import Edit

if TYPE_CHECKING:
    from libcst.metadata import CodeRange

    from nnlint.rules.base import Fix


def is_import(statement: cst.CSTNode) -> bool:
    return isinstance(statement, cst.SimpleStatementLine) and any(
        isinstance(small, (cst.Import, cst.ImportFrom)) for small in statement.body)


def _is_docstring(statement: cst.CSTNode) -> bool:
    return (isinstance(statement, cst.SimpleStatementLine) and len(statement.body) == 1
            and isinstance(statement.body[0], cst.Expr)
            and isinstance(statement.body[0].value, (cst.SimpleString, cst.ConcatenatedString)))


def import_position(module: cst.Module) -> int:
    """Index in `module.body` where an added import goes: after the top import block.

    Only imports before the first function or class count as the module's import block, so
    an added import never lands between definitions; with none, it goes after the docstring
    (or first).
    """
    position = 0
    for index, statement in enumerate(module.body):
        if isinstance(statement, (cst.FunctionDef, cst.ClassDef)):
            break
        if is_import(statement) or (index == 0 and _is_docstring(statement)):
            position = index + 1
    return position


def missing_imports(module: cst.Module, imports: list[str] | tuple[str, ...]
                    ) -> list[cst.SimpleStatementLine]:
    """The import statements of `imports` the module has not got at top level, each once."""
    present = {module.code_for_node(statement.with_changes(leading_lines=())).strip()
               for statement in module.body if is_import(statement)}
    wanted = []
    for text in imports:
        statement = cst.parse_statement(text)
        code = module.code_for_node(statement).strip()
        if code not in present:
            present.add(code)
            wanted.append(statement)
    return wanted


def with_imports(module: cst.Module, imports: list[str]) -> cst.Module:
    """`module` with each import statement it lacks added at `import_position`."""
    wanted = missing_imports(module, imports)
    if not wanted:
        return module
    body = list(module.body)
    position = import_position(module)
    return module.with_changes(body=body[:position] + wanted + body[position:])


def fix_anchors(fix: "Fix", module: cst.Module) -> list[cst.CSTNode]:
    """The nodes whose positions `edits_of` reads: the target, and where imports go."""
    anchors: list[cst.CSTNode] = [fix.target]
    if fix.imports:
        position = import_position(module)
        if position:
            anchors.append(module.body[position - 1])
    return anchors


def edits_of(fix: "Fix", module: cst.Module, positions: Mapping[cst.CSTNode, "CodeRange"]
             ) -> tuple[Edit, ...]:
    """The fix as text edits of the module's source (replacement first, then imports)."""
    span = positions[fix.target]
    edits = [Edit(span.start.line, span.start.column + 1, span.end.line, span.end.column + 1,
                  module.code_for_node(fix.replacement))]
    wanted = missing_imports(module, fix.imports) if fix.imports else []
    if wanted:
        position = import_position(module)
        line = (positions[module.body[position - 1]].end.line + 1 if position
                else len(module.header) + 1)
        text = "".join(module.code_for_node(statement) for statement in wanted)
        edits.append(Edit(line, 1, line, 1, text))
    return tuple(edits)


def apply_edits(text: str, edits: tuple[Edit, ...] | list[Edit]) -> str:
    """`text` with non-overlapping `edits` applied (used to check SARIF fixes in tests)."""
    starts = [0]
    for line in text.splitlines(keepends=True):
        starts.append(starts[-1] + len(line))

    def offset(line: int, column: int) -> int:
        return starts[min(line, len(starts)) - 1] + column - 1

    for edit in sorted(edits, key=lambda edit: (edit.line, edit.column), reverse=True):
        start, end = offset(edit.line, edit.column), offset(edit.end_line, edit.end_column)
        text = text[:start] + edit.text + text[end:]
    return text
