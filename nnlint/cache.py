"""The result cache: findings of a file keyed by its content, nnlint's code and the settings.

Entries live in `.nnlint_cache/` under the project root (the folder of the pyproject.toml
that configures the run, else the working folder). A file's findings can depend on other
modules of the tree (their summaries), so an entry records the content hash of every file
consulted and is used only while all of them are unchanged. Writes are atomic (temporary
file + rename); the cache never follows a symlink and is switched off when its folder is a
symlink or lies outside the project root. Delete the folder to clear it; `--no-cache`
bypasses it.
"""
from __future__ import annotations

import hashlib
import json
import os
from functools import lru_cache
from pathlib import Path

from nnlint import __version__
from nnlint.analysis.project import content_hash
from nnlint.finding import Edit, Finding, Severity

FOLDER_NAME = ".nnlint_cache"
_FORMAT = "1"
_TAG = "Signature: 8a477f597d28d172789f06886806bc55\n# nnlint result cache; safe to delete\n"


@lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """nnlint's version and the size/mtime of its own sources, so edits invalidate entries."""
    digest = hashlib.blake2b(digest_size=16)
    digest.update(__version__.encode())
    package = Path(__file__).resolve().parent
    for source in sorted(package.rglob("*.py")):
        status = source.stat()
        digest.update(f"{source.relative_to(package)}:{status.st_size}:{status.st_mtime_ns}"
                      .encode())
    return digest.hexdigest()


class ResultCache:
    """Get and put one file's result; every failure just means "not cached"."""

    def __init__(self, root: str, settings_key: str) -> None:
        self.folder: Path | None = self._open(Path(root))
        self._prefix = f"{_FORMAT}|{code_fingerprint()}|{settings_key}|"

    @staticmethod
    def _open(root: Path) -> Path | None:
        folder = root / FOLDER_NAME
        try:
            if folder.is_symlink():
                return None
            folder.mkdir(exist_ok=True)
            real_root, real_folder = root.resolve(), folder.resolve()
            if real_folder.parent != real_root:
                return None
            tag = folder / "CACHEDIR.TAG"
            if not tag.exists():
                _atomic_write(folder, tag.name, _TAG)
                _atomic_write(folder, ".gitignore", "*\n")
        except OSError:
            return None
        return folder

    def _entry_name(self, path: str, digest: str) -> str:
        key = hashlib.blake2b(f"{self._prefix}{os.path.abspath(path)}|{digest}".encode(),
                              digest_size=20).hexdigest()
        return f"{key}.json"

    def get(self, path: str, data: bytes) -> list[Finding] | None:
        if self.folder is None:
            return None
        entry = self.folder / self._entry_name(path, content_hash(data))
        try:
            if entry.is_symlink():
                return None
            record = json.loads(entry.read_text(encoding="utf-8"))
            for dependency, digest in record["dependencies"].items():
                if _hash_of_file(dependency) != digest:
                    return None
            return [_finding(path, item) for item in record["findings"]]
        except (OSError, ValueError, KeyError, TypeError):
            return None

    def put(self, path: str, data: bytes, findings: list[Finding],
            dependencies: dict[str, str]) -> None:
        if self.folder is None:
            return
        record = {"dependencies": dependencies,
                  "findings": [_record(finding) for finding in findings]}
        try:
            _atomic_write(self.folder, self._entry_name(path, content_hash(data)),
                          json.dumps(record))
        except OSError:
            pass


def _hash_of_file(path: str) -> str | None:
    try:
        with open(path, "rb") as handle:
            return content_hash(handle.read())
    except OSError:
        return None


def _atomic_write(folder: Path, name: str, text: str) -> None:
    """Write folder/name via a temporary file and rename; never through a symlink."""
    temporary = folder / f".{name}.{os.getpid()}.tmp"
    flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC | getattr(os, "O_NOFOLLOW", 0)
    descriptor = os.open(temporary, flags, 0o644)
    try:
        with os.fdopen(descriptor, "w", encoding="utf-8") as handle:
            handle.write(text)
        os.replace(temporary, folder / name)
    except BaseException:
        try:
            os.unlink(temporary)
        except OSError:
            pass
        raise


def _record(finding: Finding) -> dict:
    data = finding.to_json()
    data.pop("path")
    if finding.edits:
        data["edits"] = [list(edit) for edit in finding.edits]
    return data


def _finding(path: str, data: dict) -> Finding:
    return Finding(path, data["cell"], data["line"], data["column"], data["code"], data["name"],
                   Severity(data["severity"]), data["message"], data["end_line"],
                   data["end_column"], data["fix"],
                   tuple(Edit(*edit) for edit in data.get("edits", ())))
