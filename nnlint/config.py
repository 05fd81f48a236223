"""Settings: `[tool.nnlint]` in pyproject.toml, then command-line flags on top.

Read with a TOML parser only (tomllib, or tomli before Python 3.11); nothing is executed.
Select/ignore follow flake8's DecisionEngine: code prefixes, an explicit choice beats an
implicit one, and when both lists match the longest prefix wins.
"""
from __future__ import annotations

import os
import re
import sys
from dataclasses import dataclass, field, replace
from functools import lru_cache
from pathlib import Path
from typing import Any, Iterable

from nnlint.files import matches_any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

PRECISIONS = ("bfloat16", "float16", "float32", "float64")
KEYS = ("exclude", "ignore", "per-file-ignores", "precision", "select")
#: a code prefix as flake8 accepts it (flake8 defaults.VALID_CODE_PREFIX), restricted to ours
CODE_PREFIX = re.compile(r"^NNL[0-9]{0,3}$")
DEFAULT_SELECT = ("NNL",)


class ConfigError(Exception):
    """A configuration file or flag is wrong; the message names the place and the way out."""


@dataclass(frozen=True)
class Settings:
    """Effective configuration of a run (picklable: it crosses to worker processes)."""

    select: tuple[str, ...] = ()
    ignore: tuple[str, ...] = ()
    #: (glob, code prefixes) pairs; globs are relative to `root`
    per_file_ignores: tuple[tuple[str, tuple[str, ...]], ...] = ()
    exclude: tuple[str, ...] = ()
    #: float format the arithmetic runs in; None means "from the file, else float32"
    precision: str | None = None
    #: the folder globs are relative to (the config file's folder, else the working folder)
    root: str = "."
    config_file: str | None = None
    #: codes of rules that are off unless selected explicitly; None: the rule registry's
    #: (looked up when first needed, so a fully cached run never imports the rules)
    default_ignore: tuple[str, ...] | None = field(default=())

    def is_selected(self, code: str) -> bool:
        """flake8's decision for `code` given select and ignore."""
        explicit_select = code.startswith(self.select) if self.select else False
        implicit_select = code.startswith(DEFAULT_SELECT) if not self.select else False
        default_ignore = (self.default_ignore if self.default_ignore is not None
                          else registry_default_ignore())
        explicit_ignore = code.startswith(self.ignore) if self.ignore else False
        implicit_ignore = code.startswith(default_ignore) if default_ignore else False
        selected = explicit_select or implicit_select
        ignored = explicit_ignore or implicit_ignore
        if not ignored:
            return selected
        if not selected:
            return False
        if explicit_select and not explicit_ignore:
            return True
        if explicit_ignore and not explicit_select:
            return False
        select_list = self.select or DEFAULT_SELECT
        ignore_list = self.ignore if explicit_ignore else default_ignore
        longest_select = max(len(prefix) for prefix in select_list if code.startswith(prefix))
        longest_ignore = max(len(prefix) for prefix in ignore_list if code.startswith(prefix))
        return longest_select > longest_ignore

    def is_enabled(self, code: str, path: str) -> bool:
        """Selected, and not ignored for this file by per-file-ignores."""
        if not self.is_selected(code):
            return False
        for pattern, codes in self.per_file_ignores:
            if code.startswith(codes) and matches_any(os.path.abspath(path), [pattern],
                                                      os.path.abspath(self.root)):
                return False
        return True

    def cache_key(self) -> str:
        return repr((self.select, self.ignore, self.per_file_ignores, self.exclude,
                     self.precision, self.default_ignore))


def find_config(start: str | os.PathLike) -> Path | None:
    """The nearest pyproject.toml with a [tool.nnlint] table, walking up from `start`."""
    folder = Path(start).resolve()
    if not folder.is_dir():
        folder = folder.parent
    for candidate in (folder, *folder.parents):
        pyproject = candidate / "pyproject.toml"
        if pyproject.is_file():
            try:
                text = pyproject.read_text(encoding="utf-8", errors="replace")
            except OSError:
                text = ""
            if re.search(r"^\s*\[\s*tool\s*\.\s*nnlint\s*[\].]", text, re.M):
                return pyproject
        if (candidate / ".git").exists():
            return None
    return None


def _code_list(value: Any, key: str, where: str) -> tuple[str, ...]:
    if isinstance(value, str):
        items = [item.strip() for item in re.split(r"[,\s]+", value) if item.strip()]
    elif isinstance(value, list) and all(isinstance(item, str) for item in value):
        items = [item.strip() for item in value]
    else:
        raise ConfigError(f"nnlint: {where}: {key} must be a list of code prefixes such as "
                          f"[\"NNL3\", \"NNL401\"]")
    for item in items:
        if not CODE_PREFIX.match(item):
            raise ConfigError(f"nnlint: {where}: {key} entry {item!r} is not an nnlint code "
                              f"prefix; use NNL, NNL<digit>... up to a full code like NNL301")
    return tuple(items)


def _precision(value: Any, where: str, key: str = "precision") -> str:
    if not isinstance(value, str) or value not in PRECISIONS:
        raise ConfigError(f"nnlint: {where}: {key} {value!r} unknown; choose "
                          + ", ".join(PRECISIONS))
    return value


def _globs(value: Any, key: str, where: str) -> tuple[str, ...]:
    if isinstance(value, str):
        return tuple(item.strip() for item in value.split(",") if item.strip())
    if isinstance(value, list) and all(isinstance(item, str) for item in value):
        return tuple(value)
    raise ConfigError(f"nnlint: {where}: {key} must be a list of glob patterns")


def _per_file(value: Any, where: str) -> tuple[tuple[str, tuple[str, ...]], ...]:
    if isinstance(value, str):  # flake8's form: "glob:codes glob:codes"
        pairs = []
        for chunk in re.split(r"\s+(?=[^\s:]+:)", value.strip()):
            pattern, sep, codes = chunk.partition(":")
            if not sep:
                raise ConfigError(f"nnlint: {where}: per-file-ignores entry {chunk!r} must look "
                                  f"like \"glob:NNL301,NNL4\"")
            pairs.append((pattern.strip(), _code_list(codes, "per-file-ignores", where)))
        return tuple(pairs)
    if isinstance(value, dict):
        return tuple((str(pattern), _code_list(codes, f"per-file-ignores.{pattern!r}", where))
                     for pattern, codes in value.items())
    raise ConfigError(f"nnlint: {where}: per-file-ignores must be a table of "
                      f"glob = [code prefixes]")


def settings_from_table(table: dict, where: str, root: str) -> Settings:
    """Validate a [tool.nnlint] table; `where` names the file in messages."""
    unknown = sorted(set(table) - set(KEYS))
    if unknown:
        raise ConfigError(f"nnlint: {where}: [tool.nnlint] unknown key {unknown[0]!r}; "
                          f"accepted keys: {', '.join(KEYS)}")
    values: dict[str, Any] = {"root": root}
    if "select" in table:
        values["select"] = _code_list(table["select"], "select", where)
    if "ignore" in table:
        values["ignore"] = _code_list(table["ignore"], "ignore", where)
    if "exclude" in table:
        values["exclude"] = _globs(table["exclude"], "exclude", where)
    if "per-file-ignores" in table:
        values["per_file_ignores"] = _per_file(table["per-file-ignores"], where)
    if "precision" in table:
        values["precision"] = _precision(table["precision"], where)
    return Settings(**values)


def load_file(pyproject: Path) -> Settings:
    where = str(pyproject)
    try:
        with open(pyproject, "rb") as handle:
            data = tomllib.load(handle)
    except OSError as error:
        raise ConfigError(f"nnlint: {where}: cannot read: {error.strerror}") from None
    except tomllib.TOMLDecodeError as error:
        raise ConfigError(f"nnlint: {where}: invalid TOML: {error}") from None
    table = data.get("tool", {}).get("nnlint", {})
    if not isinstance(table, dict):
        raise ConfigError(f"nnlint: {where}: [tool.nnlint] must be a table")
    settings = settings_from_table(table, where, str(pyproject.parent))
    return replace(settings, config_file=where)


def load(paths: Iterable[str], config_file: str | None = None) -> Settings:
    """Settings from an explicit config file, else the nearest one above the first path."""
    if config_file is not None:
        path = Path(config_file)
        if not path.is_file():
            raise ConfigError(f"nnlint: --config {config_file}: no such file")
        return with_default_ignores(load_file(path))
    first = next(iter(paths), ".")
    found = find_config(first)
    if found is None:
        return with_default_ignores(Settings(root=os.getcwd()))
    return with_default_ignores(load_file(found))


def override(settings: Settings, select: str | None = None, ignore: str | None = None,
             exclude: str | None = None, per_file_ignores: str | None = None,
             precision: str | None = None) -> Settings:
    """Command-line flags on top of the file's settings."""
    changes: dict[str, Any] = {}
    if select is not None:
        changes["select"] = _code_list(select, "--select", "command line")
    if ignore is not None:
        changes["ignore"] = _code_list(ignore, "--ignore", "command line")
    if exclude is not None:
        changes["exclude"] = _globs(exclude, "--exclude", "command line")
    if per_file_ignores is not None:
        changes["per_file_ignores"] = _per_file(per_file_ignores, "command line")
    if precision is not None:
        changes["precision"] = _precision(precision, "command line", "--precision")
    return replace(settings, **changes)


def with_default_ignores(settings: Settings) -> Settings:
    """`settings` with the rules that are off by default (or retired) ignored unless selected.

    The codes are looked up in the registry on first use; the cache key names them as
    "the registry's", which the cache's code fingerprint covers.
    """
    return replace(settings, default_ignore=None)


@lru_cache(maxsize=1)
def registry_default_ignore() -> tuple[str, ...]:
    from nnlint.rules.base import all_rules

    return tuple(rule.code for rule in all_rules() if not rule.enabled_by_default or rule.retired)
