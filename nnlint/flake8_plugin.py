"""The flake8 entry point `NNL`: the same findings as `nnlint check`, in flake8's pipeline.

flake8 applies its own select/ignore and `# noqa`; this plugin applies the `[tool.nnlint]`
table found above the file (so both front ends agree) and never raises: flake8 turns a plugin
exception into PluginExecutionFailed and stops the whole run. Syntax errors are left to
flake8's E999.
"""
from __future__ import annotations

import ast
import logging
import os
from dataclasses import replace
from functools import lru_cache
from typing import Iterator

from nnlint import __version__
from nnlint.config import PRECISIONS, ConfigError, Settings, find_config, load_file
from nnlint.config import with_default_ignores

LOG = logging.getLogger("nnlint")
_PROJECT = None


@lru_cache(maxsize=256)
def _settings_for_folder(folder: str) -> Settings:
    found = find_config(folder)
    if found is None:
        return with_default_ignores(Settings(root=folder))
    return with_default_ignores(load_file(found))


def _project():
    global _PROJECT
    if _PROJECT is None:
        from nnlint.analysis.project import ProjectIndex

        _PROJECT = ProjectIndex()
    return _PROJECT


class Plugin:
    """flake8 tree plugin (asking for `tree` makes flake8 run it once per file)."""

    name = "nnlint"
    version = __version__
    #: --nnlint-precision / `nnlint-precision =` in a flake8 config; None defers to [tool.nnlint]
    precision: str | None = None

    def __init__(self, tree: ast.AST, lines: list[str], filename: str) -> None:
        self._lines = lines
        self._filename = filename

    @classmethod
    def add_options(cls, option_manager) -> None:
        option_manager.add_option(
            "--nnlint-precision", default=None, choices=PRECISIONS, parse_from_config=True,
            help="float format the checked arithmetic runs in (nnlint); default: from the "
                 "code, else [tool.nnlint] precision, else float32",
        )

    @classmethod
    def parse_options(cls, options) -> None:
        cls.precision = getattr(options, "nnlint_precision", None)

    def run(self) -> Iterator[tuple[int, int, str, type]]:
        try:
            findings = self._findings()
        except ConfigError as error:
            LOG.warning("%s", error)
            return
        except Exception as error:  # noqa: BLE001 - the plugin must never stop flake8
            if os.environ.get("NNLINT_STRICT", "") not in ("", "0"):
                raise
            LOG.warning("nnlint: internal error on %s: %s: %s", self._filename,
                        type(error).__name__, error)
            return
        for finding in findings:
            # flake8 adds 1 to the column it is given; ours are 1-based already
            yield finding.line, finding.column - 1, f"{finding.code} {finding.message}", type(self)

    def _findings(self):
        from nnlint.engine import PARSE_ERROR, lint_text
        from nnlint.runner import collector_tuned_for_trees

        if self._filename.endswith(".ipynb"):
            return []  # notebook JSON is not Python; `nnlint check` reads notebooks itself

        folder = os.path.dirname(os.path.abspath(self._filename))
        settings = _settings_for_folder(folder)
        if self.precision is not None:
            settings = replace(settings, precision=self.precision)
        text = "".join(self._lines)
        with collector_tuned_for_trees():  # restored before flake8 goes on
            result = lint_text(text, self._filename, settings, _project(), apply_noqa=False)
        for error in result.errors:
            LOG.warning("%s", error.describe())
        return [finding for finding in result.findings if finding.code != PARSE_ERROR]
