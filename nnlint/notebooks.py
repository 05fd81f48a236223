"""Jupyter notebooks (nbformat 4 JSON) as one Python program, with a map back to their cells.

The code cells of a Python notebook run in one namespace, in the order they appear (the
order a fresh "run all" uses), so they are joined into one program: a name defined in cell 2
is known in cell 5. IPython syntax that is not Python (line magics `%time`, cell magics
`%%bash`, shell escapes `!ls`, `files = !ls`, help `obj?`) is replaced line for line, so
every program line still maps to exactly one line of one cell and `# noqa` comments stay on
the lines they were written on. Nothing in a notebook is imported or run.

The format is the open nbformat 4 JSON (nbformat documentation, "The Notebook file format"):
a top-level object with `nbformat`, `metadata` and a `cells` array; each cell has
`cell_type` ("code", "markdown", "raw") and `source`, a string or a list of strings to join.
"""
from __future__ import annotations

import ast
import json
import re
import warnings
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

from nnlint.finding import Finding

if TYPE_CHECKING:
    from nnlint.analysis.project import ProjectIndex
    from nnlint.config import Settings
    from nnlint.finding import FileResult

NOTEBOOK_SUFFIX = ".ipynb"
#: a notebook carries its outputs (base64 plots, tables), so it may be far larger than a .py
#: file; its code is still bounded by the engine's per-file limit (common practice)
MAX_NOTEBOOK_BYTES = 64 << 20

#: cell magics whose body is Python that IPython runs as such (from memory: IPython's
#: built-in %%time, %%timeit, %%capture and %%prun execute their cell as Python code)
PYTHON_BODY_CELL_MAGICS = frozenset({"time", "timeit", "capture", "prun"})

#: what stands in for a line of IPython syntax: a statement valid wherever one is allowed
PLACEHOLDER = "pass"

#: `files = !ls`, `timing = %timeit -o step()` (IPython's assignment from a magic)
_ASSIGNED_MAGIC = re.compile(
    r"[ \t]*[A-Za-z_][\w.]*(?:[ \t]*,[ \t]*[A-Za-z_][\w.]*)*[ \t]*=[ \t]*[%!]")
_NEWLINE = re.compile(r"\r\n|\r|\n")
_NEWLINE_KEPT = re.compile(r"(\r\n|\r|\n)")
_CELL_MAGIC_NAME = re.compile(r"%%(\w*)")


class NotebookError(Exception):
    """The file is not a readable nbformat 4 notebook; `message` says why.

    `line` and `column` (1-based) are positions in the raw file, where the JSON is broken.
    """

    def __init__(self, message: str, line: int = 1, column: int = 1) -> None:
        super().__init__(message)
        self.message = message
        self.line = line
        self.column = column


class NotPythonNotebook(Exception):
    """The notebook's kernel runs another language, so there is nothing to check."""

    def __init__(self, language: str) -> None:
        super().__init__(language)
        self.language = language


@dataclass(frozen=True)
class NotebookProgram:
    """The code cells joined as one program, and where each of its lines came from."""

    text: str
    #: entry n-1 is program line n: (cell index among ALL cells, 0-based; line in cell, 1-based)
    line_map: tuple[tuple[int, int], ...]
    #: (cell index, its lines as checked) of every Python code cell, in order
    cells: tuple[tuple[int, tuple[str, ...]], ...] = ()
    #: True when some cell ends inside an open bracket, string or backslash continuation
    has_open_cell: bool = False

    def first_broken_cell(self) -> tuple[str, int, int, int] | None:
        """(message, cell index, line in cell, column) of the first cell CPython rejects."""
        for index, lines in self.cells:
            error = cell_syntax_error(list(lines))
            if error is not None:
                message, line, column = error
                return message, index, min(max(line, 1), max(len(lines), 1)), column
        return None

    def locate(self, line: int) -> tuple[int, int]:
        """(cell index, line in the cell) of a 1-based program line; past the end: the last."""
        if not self.line_map:
            return (0, 1)
        return self.line_map[max(0, min(line, len(self.line_map)) - 1)]

    def place(self, finding: Finding) -> Finding:
        """The finding with its cell, its line inside the cell, and an end in the same cell."""
        cell, line = self.locate(finding.line)
        end_line, end_column = finding.end_line, finding.end_column
        if end_line is not None:
            end_cell, end_line = self.locate(end_line)
            if end_cell != cell:
                end_line = end_column = None
        # the text edits count program lines; in a notebook they would point at the wrong
        # lines of the JSON file, so only `nnlint fix` (which rewrites cells) applies the fix
        return replace(finding, cell=cell, line=line, end_line=end_line, end_column=end_column,
                       edits=())


def rewrite_cells(data: bytes, program: NotebookProgram, fixed: str) -> str:
    """The notebook's JSON text with `fixed` (program.text, rewritten) put back into its cells.

    Only the `source` of cells whose lines changed is replaced, and the JSON is written with
    the layout the file already has (indent, escaping, final newline, line endings), so
    every other byte stays as it was. Raises NotebookError when that cannot be guaranteed:
    the layout is not one json.dumps reproduces, a change spans two cells or touches a line
    of IPython syntax, or the result does not read back as the fixed program.
    """
    text = data.decode("utf-8-sig")  # read_program has already accepted these bytes
    document = json.loads(text)
    layout = _layout_of(document, text)
    cells = document["cells"]
    checked = dict(program.cells)
    for index, changes in _cell_changes(program, fixed).items():
        cell = cells[index]
        source = _source_of(cell, index)
        lines, endings = _lines_and_endings(source)
        for first, end, _ in changes:
            if any(checked[index][number - 1] != lines[number - 1]
                   for number in range(first, end)):
                raise NotebookError(f"cell {index}: a fix touches IPython syntax")
        usual = next((ending for ending in endings if ending), "\n")
        for first, end, new_lines in sorted(changes, reverse=True):
            new_endings = [usual] * len(new_lines)
            if end > first and new_endings:
                new_endings[-1] = endings[end - 2]  # the block's last line keeps its ending
            elif first > len(lines) and new_endings and lines and not endings[-1]:
                # appended after a last line without a newline: the new last line has none
                endings[-1], new_endings[-1] = usual, ""
            lines[first - 1:end - 1] = new_lines
            endings[first - 1:end - 1] = new_endings
        # nbformat's list form holds one line per string, each with its line ending
        pieces = [line + ending for line, ending in zip(lines, endings) if line + ending]
        cell["source"] = pieces if isinstance(cell["source"], list) else "".join(pieces)
    indent, ensure_ascii, final_newline, crlf = layout
    written = json.dumps(document, indent=indent, ensure_ascii=ensure_ascii)
    written += "\n" if final_newline else ""
    if crlf:
        written = written.replace("\n", "\r\n")
    if read_program(written.encode("utf-8")).text != fixed:
        raise NotebookError("the rewritten cells do not read back as the fixed code")
    return written


def _layout_of(document: object, text: str) -> tuple[int | None, bool, bool, bool]:
    """(indent, ensure_ascii, final newline, CRLF) with which json.dumps gives back `text`."""
    crlf = "\r\n" in text
    plain = text.replace("\r\n", "\n") if crlf else text
    # Jupyter writes indent=1 without ASCII escaping (nbformat's JSON writer, from memory);
    # other tools use 2 or 4, some escape non-ASCII
    for indent in (1, 2, 4, None):
        for ensure_ascii in (False, True):
            written = json.dumps(document, indent=indent, ensure_ascii=ensure_ascii)
            if plain in (written, written + "\n"):
                return indent, ensure_ascii, plain != written, crlf
    raise NotebookError("its JSON layout is not one nnlint can write back unchanged")


def _cell_changes(program: NotebookProgram, fixed: str
                  ) -> dict[int, list[tuple[int, int, list[str]]]]:
    """Per cell: (first line, end line exclusive, new lines) replacing lines of that cell."""
    import difflib

    old, new = program.text.splitlines(), fixed.splitlines()
    changes: dict[int, list[tuple[int, int, list[str]]]] = {}
    matcher = difflib.SequenceMatcher(None, old, new, autojunk=False)
    for tag, start, stop, new_start, new_stop in matcher.get_opcodes():
        if tag == "equal":
            continue
        if start < stop:
            owners = {program.line_map[number][0] for number in range(start, stop)}
            if len(owners) != 1:
                raise NotebookError("a fix spans two cells")
            cell, first = program.line_map[start]
            end = program.line_map[stop - 1][1] + 1
        elif start > 0:  # an insertion goes after the line before it, in that line's cell
            cell, line = program.line_map[start - 1]
            first = end = line + 1
        else:
            cell, first = program.line_map[0]
            end = first
        changes.setdefault(cell, []).append((first, end, new[new_start:new_stop]))
    return changes


def _lines_and_endings(source: str) -> tuple[list[str], list[str]]:
    """The cell's lines as python_lines splits them, and the line ending after each."""
    parts = _NEWLINE_KEPT.split(source)
    lines, endings = parts[0::2], parts[1::2] + [""]
    if len(lines) > 1 and lines[-1] == "":
        lines.pop()
        endings.pop()
    return lines, endings


def is_notebook(path: str) -> bool:
    return path.lower().endswith(NOTEBOOK_SUFFIX)


def read_program(data: bytes) -> NotebookProgram:
    """Parse notebook bytes into one program; raises NotebookError or NotPythonNotebook."""
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]  # a UTF-8 byte order mark, which some editors write (RFC 8259 §8.1)
    try:
        # json.loads on bytes detects UTF-8/16/32 as RFC 8259 allows
        document = json.loads(data)
    except RecursionError:
        raise NotebookError("notebook JSON is nested too deeply to read") from None
    except UnicodeDecodeError as error:
        raise NotebookError(f"notebook is not UTF-8 text (byte {error.start})") from None
    except json.JSONDecodeError as error:
        # JSONDecodeError.lineno and .colno are 1-based (Python documentation, json)
        raise NotebookError(f"notebook is not valid JSON: {error.msg}", error.lineno,
                            error.colno) from None
    cells = _cells_of(document)
    language = _kernel_language(document)
    if language is not None and "python" not in language.lower():
        raise NotPythonNotebook(language)
    lines: list[str] = []
    line_map: list[tuple[int, int]] = []
    code_cells: list[tuple[int, tuple[str, ...]]] = []
    has_open_cell = False
    for index, cell in enumerate(cells):
        if cell.get("cell_type") != "code" or not _cell_is_python(cell):
            continue
        cell_lines, is_complete = _neutralised(_source_of(cell, index))
        has_open_cell = has_open_cell or not is_complete
        code_cells.append((index, tuple(cell_lines)))
        for number, line in enumerate(cell_lines, start=1):
            lines.append(line + "\n")
            line_map.append((index, number))
    return NotebookProgram("".join(lines), tuple(line_map), tuple(code_cells), has_open_cell)


def _cells_of(document: object) -> list[dict]:
    if not isinstance(document, dict):
        raise NotebookError("notebook JSON is not an object")
    version = document.get("nbformat")
    if version != 4:
        shown = "missing" if version is None else repr(version)
        raise NotebookError(f"nbformat {shown} is not supported (only nbformat 4); "
                            f"open and save the notebook in a current Jupyter to upgrade it")
    cells = document.get("cells")
    if not isinstance(cells, list):
        raise NotebookError("notebook has no `cells` array")
    for index, cell in enumerate(cells):
        if not isinstance(cell, dict):
            raise NotebookError(f"cell {index} is not an object")
    return cells


def _kernel_language(document: dict) -> str | None:
    """The kernel's language from the metadata; None when the notebook does not say."""
    metadata = document.get("metadata")
    if not isinstance(metadata, dict):
        return None
    for section, key in (("kernelspec", "language"), ("language_info", "name")):
        table = metadata.get(section)
        if isinstance(table, dict) and isinstance(table.get(key), str) and table[key].strip():
            return table[key].strip()
    return None


def _cell_is_python(cell: dict) -> bool:
    """False for a code cell an editor marked as another language (VS Code's `languageId`)."""
    metadata = cell.get("metadata")
    editor = metadata.get("vscode") if isinstance(metadata, dict) else None
    language = editor.get("languageId") if isinstance(editor, dict) else None
    return not isinstance(language, str) or language.lower() == "python"


def _source_of(cell: dict, index: int) -> str:
    source = cell.get("source", "")
    if isinstance(source, list) and all(isinstance(part, str) for part in source):
        return "".join(source)
    if isinstance(source, str):
        return source
    raise NotebookError(f"cell {index}: `source` is neither a string nor a list of strings")


def python_lines(source: str) -> list[str]:
    """The cell's lines with IPython-only syntax replaced, one output line per input line."""
    return _neutralised(source)[0]


def _neutralised(source: str) -> tuple[list[str], bool]:
    """python_lines, and whether the cell ends where a statement may start (nothing open)."""
    lines = _NEWLINE.split(source)
    if lines and lines[-1] == "":
        lines.pop()  # the newline ending the last line starts no new line
    first = next((number for number, line in enumerate(lines) if line.strip()), None)
    if first is not None and lines[first].lstrip().startswith("%%"):
        magic = _CELL_MAGIC_NAME.match(lines[first].lstrip())
        if magic is None or magic.group(1) not in PYTHON_BODY_CELL_MAGICS:
            return ["" for _ in lines], True  # %%bash, %%writefile...: the body is not Python
        lines = list(lines)
        lines[first] = ""
    scanner = _StatementScanner()
    result = []
    for line in lines:
        if scanner.at_statement_start and _is_ipython_syntax(line):
            indent = line[:len(line) - len(line.lstrip())]
            result.append(indent + PLACEHOLDER)
            continue
        scanner.feed(line)
        result.append(line)
    return result, scanner.at_statement_start


def cell_syntax_error(lines: list[str]) -> tuple[str, int, int] | None:
    """CPython's (message, line, column) for a cell that does not compile on its own.

    IPython compiles each cell by itself, so a cell left inside an open bracket, string or
    backslash continuation is a syntax error there; joined with the next cell it would
    silently swallow that cell instead. None when CPython parses the cell (or cannot say).
    """
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # SyntaxWarning for odd escapes is not our news
            ast.parse("\n".join(lines) + "\n")
    except SyntaxError as error:
        # SyntaxError.lineno and .offset are 1-based (Python documentation, SyntaxError)
        return f"syntax error: {error.msg}", error.lineno or 1, error.offset or 1
    except (RecursionError, MemoryError, ValueError):
        return None
    return None


def _is_ipython_syntax(line: str) -> bool:
    stripped = line.strip()
    if not stripped:
        return False
    if stripped[0] in "%!?" or _ASSIGNED_MAGIC.match(line):
        return True
    # help: `model.eval?`, `optimizer??`; `?` is never Python outside strings and comments
    scanner = _StatementScanner()
    code = stripped[:scanner.feed(stripped)].rstrip()
    return scanner.quote is None and code.endswith("?")


class _StatementScanner:
    """Tracks strings, brackets and backslash continuations across the lines of a cell.

    Only a line that starts a new statement can be IPython syntax: `% rate` continuing a
    bracketed expression is Python's modulo, and a `!` inside a triple-quoted string is text.
    """

    def __init__(self) -> None:
        #: the open string's quote (`'''`, `"""`, or one quote continued by a backslash)
        self.quote: str | None = None
        self.depth = 0
        self.continued = False

    @property
    def at_statement_start(self) -> bool:
        return self.quote is None and self.depth == 0 and not self.continued

    def feed(self, line: str) -> int:
        """Advance over one line; return where its comment starts (its length if none)."""
        position, length = 0, len(line)
        comment_start = length
        while position < length:
            char = line[position]
            if self.quote is not None:
                if char == "\\":
                    position += 2
                elif line.startswith(self.quote, position):
                    position += len(self.quote)
                    self.quote = None
                else:
                    position += 1
                continue
            if char == "#":
                comment_start = position
                break
            if char in "\"'":
                triple = line[position:position + 3]
                self.quote = triple if triple in ('"""', "'''") else char
                position += len(self.quote)
                continue
            if char in "([{":
                self.depth += 1
            elif char in ")]}":
                self.depth = max(0, self.depth - 1)
            position += 1
        ends_with_backslash = comment_start == length and line.endswith("\\")
        if self.quote is not None and len(self.quote) == 1 and not ends_with_backslash:
            self.quote = None  # an unterminated one-line string: Python stops it here too
        self.continued = self.quote is None and ends_with_backslash
        return comment_start


def check_notebook(path: str, data: bytes | int, settings: "Settings",
                   project: "ProjectIndex | None" = None) -> "FileResult":
    """Lint a notebook's bytes (or, when too large to read, its size).

    Findings carry their cell index and their line inside the cell.
    """
    from nnlint.engine import PARSE_ERROR, lint_text, parse_error_finding
    from nnlint.files import MAX_FILE_BYTES
    from nnlint.finding import FileResult
    from nnlint.parsing import ParseFailure

    def parse_error(error: NotebookError | ParseFailure, cell: int | None = None):
        result = FileResult(path)
        if settings.is_enabled(PARSE_ERROR, path):
            finding = parse_error_finding(path, error, error.line, error.column)
            result.findings = [replace(finding, cell=cell)]
        return result

    size = data if isinstance(data, int) else len(data)
    if size > MAX_NOTEBOOK_BYTES:
        return parse_error(NotebookError(f"notebook is {size / (1 << 20):.1f} MiB, over the "
                                         f"{MAX_NOTEBOOK_BYTES >> 20} MiB limit"))
    try:
        program = read_program(data)
    except NotebookError as error:
        return parse_error(error)
    except NotPythonNotebook as other:
        return FileResult(path, notes=[f"nnlint: {path}: kernel language {other.language!r} "
                                       f"is not Python; notebook skipped"])
    if len(program.text) > MAX_FILE_BYTES:  # characters: at least as many bytes
        return parse_error(NotebookError(
            f"code cells hold {len(program.text) / (1 << 20):.1f} MiB of code, over the "
            f"{MAX_FILE_BYTES >> 20} MiB limit for one file"))
    # IPython compiles each cell by itself: a broken cell is reported where CPython would
    # report it, not where the joined program happens to fail (possibly a later cell)
    broken = program.first_broken_cell() if program.has_open_cell else None
    if broken is None:
        result = lint_text(program.text, path, settings, project)
        if not any(finding.code == PARSE_ERROR for finding in result.findings):
            result.findings = sorted((program.place(finding) for finding in result.findings),
                                     key=Finding.sort_key)
            return result
        broken = program.first_broken_cell()
        if broken is None:  # only the joined program fails: report it where it fails
            result.findings = [program.place(finding) for finding in result.findings]
            return result
    message, cell, line, column = broken
    return parse_error(ParseFailure(message, line, column), cell)
