"""`path:line:col: CODE message`, the line format editors and flake8 users parse."""
from __future__ import annotations

from typing import Iterable

from nnlint.finding import Finding


#: appended to findings `nnlint fix` can rewrite
FIXABLE_MARKER = " (fixable)"


def format_finding(finding: Finding) -> str:
    marker = FIXABLE_MARKER if finding.fixable else ""
    return (f"{finding.path}:{finding.line}:{finding.column}: {finding.code} "
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
