"""Finding and Severity: what a rule reports, as plain picklable data."""
from __future__ import annotations

import enum
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, NamedTuple

if TYPE_CHECKING:
    import libcst as cst

    from nnlint.rules.base import Fix


class Severity(str, enum.Enum):
    """How sure a rule is that the code is wrong."""

    #: the code is wrong
    ERROR = "error"
    #: likely wrong; context may justify it
    WARNING = "warning"


class Edit(NamedTuple):
    """Replace the text from (line, column) up to, not including, (end_line, end_column).

    Lines and columns are 1-based; an empty region (start == end) is an insertion.
    """

    line: int
    column: int
    end_line: int
    end_column: int
    text: str


@dataclass(frozen=True, order=True)
class Finding:
    """One reported hazard. Lines and columns are 1-based."""

    path: str
    #: 0-based index of the notebook cell among all cells, None for .py files
    cell: int | None
    line: int
    column: int
    code: str
    name: str
    severity: Severity
    message: str
    end_line: int | None = None
    end_column: int | None = None
    #: True when `nnlint fix` has a rewrite for this finding
    fixable: bool = False
    #: the fix as text edits of the file (of the cell, in a notebook); () when there is none
    #: or it cannot be expressed there (SARIF `fixes`)
    edits: tuple[Edit, ...] = field(default=(), compare=False)

    def sort_key(self) -> tuple:
        cell = -1 if self.cell is None else self.cell
        return (self.path, cell, self.line, self.column, self.code, self.message)

    def to_json(self) -> dict:
        """The DESIGN §5 JSON object plus `fix` (a contract: do not rename fields)."""
        return {
            "path": self.path,
            "line": self.line,
            "column": self.column,
            "end_line": self.end_line,
            "end_column": self.end_column,
            "code": self.code,
            "name": self.name,
            "severity": self.severity.value,
            "message": self.message,
            "cell": self.cell,
            "fix": self.fixable,
        }


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
    fixes: list[tuple[Finding, "Fix"]] = field(default_factory=list)
    #: one-line notices on stderr that do not change the exit status (a notebook of
    #: another language, skipped as a folder's non-Python files are)
    notes: list[str] = field(default_factory=list)
    #: the parsed module the fixes point into; only with `fixes` (in-process, never pickled
    #: to a worker's caller: `nnlint fix` runs in one process)
    module: "cst.Module | None" = None
