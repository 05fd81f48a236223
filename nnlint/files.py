"""Finding files to check, reading them, and decoding their bytes to text."""
from __future__ import annotations

import fnmatch
import io
import os
import re
import stat
import tokenize
from typing import Iterable, Iterator

#: folder names never descended into (build outputs, caches, environments; common practice)
SKIPPED_FOLDERS = frozenset({
    "__pycache__", "node_modules", "build", "dist", "site-packages", "venv", "env",
    "_build", "htmlcov", "wandb", "mlruns", "lightning_logs",
})
#: Python files and Jupyter notebooks (nnlint/notebooks.py)
SOURCE_SUFFIXES = (".py", ".ipynb")


class DecodeError(Exception):
    """The bytes are not text in the declared (or default UTF-8) encoding."""

    def __init__(self, message: str, line: int = 1) -> None:
        super().__init__(message)
        self.message = message
        #: 1-based line of the first undecodable byte
        self.line = line


_LINE_BREAK = re.compile(r"(?<=\r\n)|(?<=\r)(?!\n)|(?<=\n)")


def split_lines(text: str) -> list[str]:
    """Lines with their endings, breaking only where Python does (\\n, \\r\\n, \\r).

    str.splitlines also breaks at form feeds and other separators, which would shift line
    numbers against the tokenizer's.
    """
    lines = _LINE_BREAK.split(text)
    if lines and lines[-1] == "":
        lines.pop()
    return lines


def decode(data: bytes) -> str:
    """Decode source bytes as Python does: BOM, PEP 263 cookie, else UTF-8."""
    try:
        encoding, _ = tokenize.detect_encoding(io.BytesIO(data).readline)
    except SyntaxError as error:
        raise DecodeError(f"cannot decode: {error.msg}") from None
    try:
        return data.decode(encoding)
    except UnicodeDecodeError as error:
        line = data.count(b"\n", 0, error.start) + 1
        raise DecodeError(f"cannot decode as {encoding} (byte {error.start})", line) from None
    except LookupError:
        raise DecodeError(f"unknown encoding {encoding!r}") from None


def matches_any(path: str, patterns: Iterable[str], root: str) -> bool:
    """True when `path` (or its name) matches a glob, relative to `root` or anywhere below."""
    relative = os.path.relpath(path, root).replace(os.sep, "/")
    name = os.path.basename(path)
    for pattern in patterns:
        pattern = pattern.rstrip("/")
        if (fnmatch.fnmatchcase(relative, pattern) or fnmatch.fnmatchcase(name, pattern)
                or fnmatch.fnmatchcase(relative, pattern + "/*")):
            return True
    return False


def _is_environment(folder: str) -> bool:
    return os.path.isfile(os.path.join(folder, "pyvenv.cfg"))


def discover(paths: Iterable[str], exclude: Iterable[str] = (), root: str = ".",
             suffixes: tuple[str, ...] = SOURCE_SUFFIXES) -> Iterator[str]:
    """Yield the files to check, in sorted order, each once.

    Explicit file arguments are kept unless excluded; folders are walked without following
    symlinked folders, skipping hidden folders, environments and build outputs.
    """
    exclude = tuple(exclude)
    seen: set[str] = set()
    for given in paths:
        if os.path.isdir(given):
            for found in _walk(given, exclude, root, suffixes):
                if found not in seen:
                    seen.add(found)
                    yield found
        elif not matches_any(given, exclude, root) and given not in seen:
            seen.add(given)
            yield given


def _walk(top: str, exclude: tuple[str, ...], root: str,
          suffixes: tuple[str, ...]) -> Iterator[str]:
    for folder, subfolders, names in os.walk(top):
        subfolders[:] = sorted(
            sub for sub in subfolders
            if not sub.startswith(".") and sub not in SKIPPED_FOLDERS
            and not sub.endswith(".egg-info")
            and not _is_environment(os.path.join(folder, sub))
            and not matches_any(os.path.join(folder, sub), exclude, root)
        )
        for name in sorted(names):
            if not name.endswith(suffixes):
                continue
            path = os.path.join(folder, name)
            if matches_any(path, exclude, root):
                continue
            yield os.path.normpath(path)


#: larger files are reported as NNL001 instead of parsed: libcst parses about 10k lines/s
#: (DESIGN §6), so 1 MiB (~25k lines) already costs seconds; real training scripts are far
#: smaller, and files this big are generated (common practice)
MAX_FILE_BYTES = 1 << 20


def read_source(path: str) -> bytes | str:
    """The file's bytes, or a one-line message saying why it cannot be read."""
    try:
        status = os.stat(path)
    except OSError as error:
        return f"nnlint: {path}: cannot read: {error.strerror or type(error).__name__}"
    if stat.S_ISDIR(status.st_mode):
        return f"nnlint: {path}: is a folder, not a file; skipped"
    if not stat.S_ISREG(status.st_mode):
        # FIFOs and devices would block or never end; never open them
        return f"nnlint: {path}: not a regular file; skipped"
    from nnlint import notebooks

    limit = notebooks.MAX_NOTEBOOK_BYTES if notebooks.is_notebook(path) else MAX_FILE_BYTES
    if status.st_size > limit:
        return status.st_size
    try:
        with open(path, "rb") as handle:
            return handle.read(limit + 1)
    except OSError as error:
        return f"nnlint: {path}: cannot read: {error.strerror or type(error).__name__}"
