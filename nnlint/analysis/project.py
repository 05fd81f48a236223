"""ProjectIndex: modules of the checked tree, their files and their summaries.

A name imported from another module of the tree (`from .models import Net`, `from models
import Net` beside the file) carries that module's summary. Summaries are computed on demand,
bounded in depth and count, cached by (path, content hash); cycles, missing files and files
that do not parse degrade to "unknown" (None), never to an error.
"""
from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Iterator

from nnlint.analysis.api import EXTERNAL_PACKAGES

if TYPE_CHECKING:
    from nnlint.analysis.model import ModuleModel
    from nnlint.analysis.summary import ModuleSummary
    from nnlint.config import Settings

#: how many import hops a summary may follow, and how many files one index may summarise
MAX_DEPTH = 3  # common practice: model -> layers -> blocks covers real projects
MAX_SUMMARIES = 200  # common practice: a bound on time and memory, not a measured value


def package_of(path: str | os.PathLike) -> tuple[str | None, str | None, Path]:
    """(package, module, root) of a file: dotted names from the folders holding __init__.py.

    `root` is the folder the top package lives in (the file's folder outside packages).
    package is None when the file is not inside a package.
    """
    file = Path(path)
    parts: list[str] = []
    folder = file.parent
    while (folder / "__init__.py").is_file() and folder.name.isidentifier():
        parts.append(folder.name)
        if folder.parent == folder:
            break
        folder = folder.parent
    package = ".".join(reversed(parts)) if parts else None
    stem = file.stem
    if stem == "__init__":
        module = package
    else:
        module = f"{package}.{stem}" if package else stem
    return package, module, folder


def content_hash(data: bytes) -> str:
    """A short digest of file contents (cache keys and dependency checks)."""
    return hashlib.blake2b(data, digest_size=16).hexdigest()


class ProjectIndex:
    """Finds modules of the tree and serves their summaries (one index per process)."""

    def __init__(self, settings: "Settings | None" = None) -> None:
        self.settings = settings
        self._by_path: dict[str, tuple[str, "ModuleSummary | None"]] = {}
        self._in_progress: set[str] = set()
        self._depth = 0
        self._computed = 0
        self._module_files: dict[tuple[str, str], Path | None] = {}
        #: files each summary was computed from (itself and what it consulted), with hashes
        self._dependencies: dict[str, dict[str, str]] = {}
        #: open "what did this analysis consult" records (see track/untrack)
        self._consumers: list[dict[str, str]] = []

    # -- files --------------------------------------------------------------------------
    def find_module(self, module: str, importer: str) -> Path | None:
        """The file of `module` as seen from the file `importer`, or None."""
        if module.split(".")[0] in EXTERNAL_PACKAGES:
            return None
        key = (module, os.path.dirname(os.path.abspath(importer)))
        if key not in self._module_files:
            self._module_files[key] = self._find_module(module, importer)
        return self._module_files[key]

    def _find_module(self, module: str, importer: str) -> Path | None:
        importer_path = Path(importer)
        folder = importer_path.parent
        level = len(module) - len(module.lstrip("."))
        if level:
            for _ in range(level - 1):
                folder = folder.parent
            bases = [folder]
            module = module[level:]
        else:
            _, _, root = package_of(importer_path)
            bases = [folder] if folder == root else [folder, root]
        relative = Path(*module.split(".")) if module else Path()
        for base in bases:
            for candidate in (base / relative.with_suffix(".py") if module else None,
                              base / relative / "__init__.py"):
                if candidate is not None and candidate.is_file():
                    return candidate
        return None

    # -- summaries ----------------------------------------------------------------------
    def remember(self, path: str, data: bytes,
                 summary: "Callable[[], ModuleSummary | None]") -> None:
        """Store (the means to make) the summary of a file the engine has just analysed.

        The summary is made only if another module asks for it.
        """
        key = os.path.abspath(path)
        self._by_path[key] = (content_hash(data), summary)
        self._dependencies[key] = dict(self._consumers[-1]) if self._consumers else {}

    def track(self) -> None:
        """Start recording which files' summaries the next analysis consults."""
        self._consumers.append({})

    def untrack(self) -> dict[str, str]:
        """Stop recording; path -> content hash of every file consulted (transitively)."""
        return self._consumers.pop()

    def _consulted(self, key: str, digest: str) -> None:
        for consumer in self._consumers:
            consumer[key] = digest
            consumer.update(self._dependencies.get(key, {}))

    def summary_of_module(self, module: str, importer: str) -> "ModuleSummary | None":
        file = self.find_module(module, importer)
        if file is None:
            return None
        return self.summary_of_file(str(file))

    def summary_of_file(self, path: str) -> "ModuleSummary | None":
        key = os.path.abspath(path)
        try:
            data = Path(key).read_bytes()
        except OSError:
            return None
        digest = content_hash(data)
        cached = self._by_path.get(key)
        if cached is not None and cached[0] == digest:
            self._consulted(key, digest)
            if callable(cached[1]):
                self._by_path[key] = (digest, cached[1]())
            return self._by_path[key][1]
        self._consulted(key, digest)
        if (key in self._in_progress or self._depth >= MAX_DEPTH
                or self._computed >= MAX_SUMMARIES):
            return None
        self._in_progress.add(key)
        self._depth += 1
        self._computed += 1
        self._consumers.append({})
        try:
            summary = self._compute(key, data)
        finally:
            self._dependencies[key] = self._consumers.pop()
            self._depth -= 1
            self._in_progress.discard(key)
        self._by_path[key] = (digest, summary)
        self._consulted(key, digest)
        return summary

    def _compute(self, path: str, data: bytes) -> "ModuleSummary | None":
        from nnlint.analysis.model import ModuleModel
        from nnlint.files import DecodeError, decode
        from nnlint.parsing import ParseFailure, parse

        try:
            text = decode(data)
            module = parse(text)
        except (DecodeError, ParseFailure):
            return None
        package, _, _ = package_of(path)
        return ModuleModel(module, path, self.settings, self, package, source=text).summary()

    # -- questions rules ask -------------------------------------------------------------
    def summary_for_name(self, canonical: str, model: "ModuleModel"
                         ) -> tuple["ModuleSummary", str] | None:
        """(summary, exported name) for a canonical name imported from the tree."""
        module, _, name = canonical.rpartition(".")
        if not module or not name:
            return None
        summary = self.summary_of_module(module, model.path)
        if summary is None:
            return None
        return summary, name

    def class_ancestry(self, base: str, model: "ModuleModel") -> Iterator[str]:
        found = self.summary_for_name(base, model)
        if found is None:
            return iter(())
        summary, name = found
        return iter(summary.class_bases.get(name, ()))

    def exported_fact(self, canonical: str, analysis: str, model: "ModuleModel") -> str | None:
        """A fact another module exported for `canonical` (see summary.register_summariser)."""
        found = self.summary_for_name(canonical, model)
        if found is None:
            return None
        summary, name = found
        return summary.facts.get(f"{analysis}:{name}")
