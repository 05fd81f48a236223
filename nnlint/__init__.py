"""nnlint: a static analyzer for neural-network training code."""
from __future__ import annotations

__version__ = "0.1.0"

from nnlint.finding import Finding, Severity  # noqa: E402

__all__ = ["Finding", "Severity", "__version__", "lint_source", "lint_paths"]


def lint_source(source: str, path: str = "<string>", settings=None):
    """Lint one file's text and return its findings, sorted."""
    from nnlint.engine import lint_text

    return lint_text(source, path, settings)


def lint_paths(paths, settings=None):
    """Lint files and folders; return (findings, files_checked)."""
    from nnlint.runner import run_paths

    report = run_paths(list(paths), settings)
    return report.findings
