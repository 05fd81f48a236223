"""Canonical dotted names of imports and aliases, resolved by our own statement-level pass.

`import torch.nn.functional as F` makes `F.dropout` resolve to `torch.nn.functional.dropout`.
The table is flow-insensitive: a local name bound to several imports (in different functions
or under try/except) resolves to every candidate, and a name also bound to something that is
not an import resolves to nothing, so rules that need *every* candidate to have a role stay
silent. libcst's ScopeProvider/QualifiedNameProvider are not used (DESIGN §6: 2-5x the walk).
"""
from __future__ import annotations

from typing import Iterable, Iterator

import libcst as cst

#: canonical-name prefixes that name the same package (an alias is rewritten to its target)
PACKAGE_ALIASES = {
    # Keras 3 and tf.keras share layer and loss names (common practice)
    "keras": "tensorflow.keras",
    "tf_keras": "tensorflow.keras",
    "pytorch_lightning": "lightning.pytorch",
}


def dotted_name(expr: cst.BaseExpression) -> str | None:
    """`a.b.c` as a string, or None when the expression is not a plain dotted name."""
    parts: list[str] = []
    while isinstance(expr, cst.Attribute):
        parts.append(expr.attr.value)
        expr = expr.value
    if not isinstance(expr, cst.Name):
        return None
    parts.append(expr.value)
    return ".".join(reversed(parts))


def _module_name(node: cst.BaseExpression | None) -> str:
    if node is None:
        return ""
    return dotted_name(node) or ""


def normalise(name: str) -> str:
    """Rewrite package aliases (`keras.layers.Dense` -> `tensorflow.keras.layers.Dense`)."""
    head, _, rest = name.partition(".")
    target = PACKAGE_ALIASES.get(head)
    if target is None:
        return name
    return f"{target}.{rest}" if rest else target


class NameTable:
    """Local name -> set of canonical dotted names it may hold."""

    def __init__(self, package: str | None = None) -> None:
        #: the dotted package of the file (for relative imports), None when unknown
        self.package = package
        self._candidates: dict[str, set[str]] = {}
        #: names also bound to something that is not an import (they resolve to nothing)
        self._ambiguous: set[str] = set()
        #: module names imported with `import x` or `from x import y`, as written
        self.imported_modules: set[str] = set()

    # -- building ---------------------------------------------------------------------------
    def bind(self, local: str, canonical: str) -> None:
        self._candidates.setdefault(local, set()).add(normalise(canonical))

    def bind_other(self, local: str) -> None:
        """`local` is also assigned something that is not an import alias."""
        self._ambiguous.add(local)

    def absolute_module(self, module: str, level: int) -> str:
        """Resolve a relative module (`..x`, level 2) against the file's package."""
        if level == 0:
            return module
        if self.package is None:
            return "." * level + module
        parts = self.package.split(".") if self.package else []
        if level - 1 > len(parts):
            return "." * level + module
        base = parts[: len(parts) - (level - 1)]
        return ".".join([*base, module] if module else base)

    def add_import(self, node: cst.Import | cst.ImportFrom) -> None:
        if isinstance(node, cst.Import):
            for alias in node.names:
                full = _module_name(alias.name)
                self.imported_modules.add(full)
                if alias.asname is not None and isinstance(alias.asname.name, cst.Name):
                    self.bind(alias.asname.name.value, full)
                else:
                    head = full.split(".")[0]
                    self.bind(head, head)
            return
        module = self.absolute_module(_module_name(node.module), len(node.relative))
        self.imported_modules.add(module)
        if isinstance(node.names, cst.ImportStar):
            return
        for alias in node.names:
            imported = _module_name(alias.name)
            local = imported
            if alias.asname is not None and isinstance(alias.asname.name, cst.Name):
                local = alias.asname.name.value
            self.bind(local, f"{module}.{imported}" if module else imported)

    # -- querying ---------------------------------------------------------------------------
    def candidates(self, local: str) -> frozenset[str]:
        if local in self._ambiguous:
            return frozenset()
        return frozenset(self._candidates.get(local, ()))

    def resolve(self, expr: cst.BaseExpression) -> frozenset[str]:
        """Every canonical dotted name `expr` may denote; empty when unknown."""
        written = dotted_name(expr)
        if written is None:
            return frozenset()
        head, _, rest = written.partition(".")
        heads = self.candidates(head)
        if not heads:
            return frozenset()
        return frozenset(normalise(f"{h}.{rest}") if rest else h for h in heads)

    def resolve_one(self, expr: cst.BaseExpression) -> str | None:
        """The canonical name when it is unique, else None."""
        names = self.resolve(expr)
        if len(names) == 1:
            return next(iter(names))
        return None

    def locals(self) -> Iterator[str]:
        return iter(self._candidates)


def _assigned_names(target: cst.BaseExpression) -> Iterable[str]:
    if isinstance(target, cst.Name):
        yield target.value
    elif isinstance(target, (cst.Tuple, cst.List)):
        for element in target.elements:
            yield from _assigned_names(element.value)
    elif isinstance(target, cst.StarredElement):
        yield from _assigned_names(target.value)


Assignment = tuple[cst.BaseExpression, "cst.BaseExpression | None"]


def collect_aliases(table: NameTable, assignments: Iterable[Assignment]) -> None:
    """Add `F = torch.nn.functional`-style aliases; other bindings make a name ambiguous.

    `assignments` yields (target, value) pairs; value is None for bindings that are not
    plain assignments (for-loop targets, with-as, augmented assignment).
    """
    pending: list[tuple[str, cst.BaseExpression]] = []
    for target, value in assignments:
        names = list(_assigned_names(target))
        if value is not None and isinstance(target, cst.Name) and dotted_name(value):
            pending.append((target.value, value))
            continue
        for name in names:
            if name in table._candidates:
                table.bind_other(name)
    # Resolve after all imports are known; an alias of an alias resolves in file order.
    for local, value in pending:
        resolved = table.resolve(value)
        if resolved and local not in table._ambiguous:
            for name in resolved:
                table.bind(local, name)
        elif local in table._candidates:
            table.bind_other(local)
