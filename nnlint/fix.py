"""`nnlint fix`: apply the rewrites rules attach to findings, with libcst, safely.

Safety rules: only findings with one unambiguous rewrite are touched; everything outside the
rewritten nodes stays byte-identical (libcst round trip); the result must parse and lint
without that finding; fixing is repeated until nothing changes (so a second run changes
nothing); files are written atomically (temporary file + rename) keeping their permissions
and line endings; a file that changed on disk since it was read is not written.
"""
from __future__ import annotations

import difflib
from collections import Counter
import os
import stat
import tempfile
from dataclasses import dataclass, field

import libcst as cst

from nnlint import notebooks
from nnlint.analysis.project import ProjectIndex, content_hash, package_of
from nnlint.config import Settings
from nnlint.edits import with_imports
from nnlint.engine import analyse_module, lint_text
from nnlint.files import DecodeError, decode, read_source
from nnlint.finding import Finding
from nnlint.parsing import ParseFailure, parse
from nnlint.rules.base import Fix

#: rounds of fixing per file: a fix may expose another (common practice: a small bound)
MAX_ROUNDS = 4


@dataclass
class FixResult:
    path: str
    original: str = ""
    fixed: str = ""
    #: findings removed by the fixes
    applied: list[Finding] = field(default_factory=list)
    #: findings left after fixing (fixable or not)
    remaining: list[Finding] = field(default_factory=list)
    messages: list[str] = field(default_factory=list)

    @property
    def changed(self) -> bool:
        return self.fixed != self.original

    def diff(self) -> str:
        return "".join(difflib.unified_diff(
            self.original.splitlines(keepends=True), self.fixed.splitlines(keepends=True),
            fromfile=f"a/{self.path}", tofile=f"b/{self.path}"))


class _Replacer(cst.CSTTransformer):
    """Replace nodes by identity (the fixes point at nodes of the parsed module)."""

    def __init__(self, replacements: dict[int, cst.CSTNode]) -> None:
        super().__init__()
        self.replacements = replacements

    def on_leave(self, original_node, updated_node):
        replacement = self.replacements.get(id(original_node))
        if replacement is not None:
            return replacement
        return updated_node


def _non_overlapping(fixes: list[Fix]) -> list[Fix]:
    """Keep fixes whose targets are distinct; nested targets wait for the next round."""
    chosen: list[Fix] = []
    seen: set[int] = set()
    for fix in fixes:
        if id(fix.target) in seen:
            continue
        seen.add(id(fix.target))
        chosen.append(fix)
    return chosen


def fix_text(text: str, path: str, settings: Settings, project: ProjectIndex | None = None
             ) -> tuple[str, list[Finding], list[Finding]]:
    """(fixed text, findings fixed, findings remaining) for one file's text.

    Each round parses and analyses once: the check of the text before it (the first check,
    then the check of each rewrite) supplies the fixes the round applies.
    """
    first = lint_text(text, path, settings, project, keep_fixes=True)
    current, result = text, first
    package = package_of(path)[0] if os.path.isfile(path) else None
    for _ in range(MAX_ROUNDS):
        fixes = _non_overlapping([fix for _, fix in result.fixes])
        if not fixes or result.module is None:
            break
        fixed_module = result.module.visit(_Replacer({id(fix.target): fix.replacement
                                                      for fix in fixes}))
        imports = [text for fix in fixes for text in fix.imports]
        if imports:
            fixed_module = with_imports(fixed_module, imports)
        rewritten = fixed_module.code
        if rewritten == current:
            break
        try:
            module = parse(rewritten)
        except ParseFailure:
            break  # a fix that breaks the syntax is never written
        current = rewritten
        result = analyse_module(module, current, path, settings, project, package,
                                keep_fixes=True)
        result.findings.sort(key=Finding.sort_key)
    return current, _fixed_findings(first.findings, result.findings), result.findings


def _fixed_findings(before: list[Finding], after: list[Finding]) -> list[Finding]:
    """The fixable findings of `before` that `after` no longer has.

    Lines move when a fix adds an import, so findings are matched by (code, message), as a
    multiset: two findings with one message, one of them fixed, count as one fixed. The
    findings left are attributed to unfixable findings first.
    """
    left = Counter((finding.code, finding.message) for finding in after)
    fixed = []
    for finding in sorted(before, key=lambda finding: finding.fixable):
        key = (finding.code, finding.message)
        if left[key]:
            left[key] -= 1
        elif finding.fixable:
            fixed.append(finding)
    return sorted(fixed, key=Finding.sort_key)


def fix_file(path: str, settings: Settings, project: ProjectIndex | None = None,
             write: bool = True) -> FixResult:
    """Fix one file; write it back (atomically) unless `write` is False."""
    result = FixResult(path)
    data = read_source(path)
    if isinstance(data, str):
        result.messages.append(data)
        return result
    if isinstance(data, int):
        result.messages.append(f"nnlint: {path}: too large to fix; skipped")
        return result
    if notebooks.is_notebook(path):
        return _fix_notebook(result, data, settings, project, write)
    try:
        text = decode(data)
    except DecodeError as error:
        result.messages.append(f"nnlint: {path}: {error.message}; not fixed")
        return result
    result.original = text
    fixed, result.applied, result.remaining = fix_text(text, path, settings, project)
    result.fixed = fixed
    if write and result.changed:
        _write_back(result, data)
    return result


def _write_back(result: FixResult, data: bytes) -> None:
    """Write the fixed text over `data`; on refusal, record why and that nothing changed."""
    message = write_atomically(result.path, data, result.fixed)
    if message is not None:
        result.messages.append(message)
        result.fixed = result.original
        result.applied = []


def _fix_notebook(result: FixResult, data: bytes, settings: Settings,
                  project: ProjectIndex | None, write: bool) -> FixResult:
    """Fix a notebook's code cells as one program and put the changed lines back in them."""
    path = result.path
    try:
        program = notebooks.read_program(data)
    except notebooks.NotebookError as error:
        result.messages.append(f"nnlint: {path}: {error.message}; not fixed")
        return result
    except notebooks.NotPythonNotebook:
        return result  # nothing nnlint checks, so nothing to fix
    if program.has_open_cell and program.first_broken_cell() is not None:
        # a cell that does not compile on its own: check reports it; nothing is rewritten
        result.remaining = notebooks.check_notebook(path, data, settings, project).findings
        return result
    fixed, applied, remaining = fix_text(program.text, path, settings, project)
    result.applied = [program.place(finding) for finding in applied]
    result.remaining = [program.place(finding) for finding in remaining]
    result.original = result.fixed = data.decode("utf-8-sig")
    if fixed == program.text:
        return result
    try:
        result.fixed = notebooks.rewrite_cells(data, program, fixed)
    except notebooks.NotebookError as error:
        result.messages.append(f"nnlint: {path}: {error.message}; not fixed")
        result.remaining = notebooks.check_notebook(path, data, settings, project).findings
        result.applied = []
        return result
    if write:
        _write_back(result, data)
    return result


def _encoding_of(data: bytes) -> str:
    import io
    import tokenize

    try:
        return tokenize.detect_encoding(io.BytesIO(data).readline)[0]
    except SyntaxError:
        return "utf-8"


def write_atomically(path: str, original: bytes, text: str) -> str | None:
    """Replace the file's contents; None on success, else a one-line message."""
    try:
        with open(path, "rb") as handle:
            current = handle.read()
    except OSError as error:
        return f"nnlint: {path}: cannot re-read before writing: {error.strerror}; not fixed"
    if content_hash(current) != content_hash(original):
        return f"nnlint: {path}: changed on disk while being fixed; not written"
    encoding = _encoding_of(original)  # "utf-8-sig" writes the BOM back
    try:
        payload = text.encode(encoding)
    except UnicodeEncodeError:
        return f"nnlint: {path}: the fix cannot be encoded as {encoding}; not fixed"
    folder = os.path.dirname(os.path.abspath(path))
    mode = stat.S_IMODE(os.stat(path).st_mode)
    descriptor, temporary = tempfile.mkstemp(prefix=".nnlint-fix-", dir=folder)
    try:
        with os.fdopen(descriptor, "wb") as handle:
            handle.write(payload)
        os.chmod(temporary, mode)
        os.replace(temporary, path)
    except OSError as error:
        try:
            os.unlink(temporary)
        except OSError:
            pass
        return f"nnlint: {path}: cannot write: {error.strerror}; not fixed"
    return None
