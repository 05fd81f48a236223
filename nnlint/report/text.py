r"""`path:line:col: CODE message`, the line format editors and flake8 users parse.

A notebook finding reads `analysis.ipynb:cell 4:2:5: CODE message`: line 2, column 5 of the
fourth cell, counting cells from 1 as people do (markdown cells count too; the JSON and
SARIF outputs give the 0-based index, 3). The usual `(.+):(\d+):(\d+): ` pattern still
splits it, with `analysis.ipynb:cell 4` as the place.
"""
from __future__ import annotations

from typing import Iterable

from nnlint.finding import Finding


#: appended to findings `nnlint fix` can rewrite
FIXABLE_MARKER = " (fixable)"


def place(finding: Finding) -> str:
    """The path, and for a notebook the 1-based cell number."""
    if finding.cell is None:
        return finding.path
    return f"{finding.path}:cell {finding.cell + 1}"


def format_finding(finding: Finding) -> str:
    marker = FIXABLE_MARKER if finding.fixable else ""
    return (f"{place(finding)}:{finding.line}:{finding.column}: {finding.code} "
            f"{finding.message}{marker}")


def render(findings: Iterable[Finding]) -> str:
    return "".join(format_finding(finding) + "\n" for finding in findings)


def summary_line(findings: list[Finding], files_checked: int, seconds: float) -> str:
    """One line for stderr: findings by severity, files checked, seconds."""
    errors = sum(1 for finding in findings if finding.severity.value == "error")
    warnings = len(findings) - errors
    files = "file" if files_checked == 1 else "files"
    return (f"nnlint: {errors} error{'s' if errors != 1 else ''}, "
            f"{warnings} warning{'s' if warnings != 1 else ''} in {files_checked} {files} "
            f"checked ({seconds:.2f} s)")
