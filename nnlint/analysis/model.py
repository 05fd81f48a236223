"""ModuleModel: the one object rules read — what a parsed file means.

Built by a statement-level pass (it descends into compound statements, never into
expressions), so it costs far less than a libcst visitor walk. It records imports and
aliases (names.py), classes and their methods, functions, and per scope the values
assigned to each name, the values returned, and `self.attr` assignments per class.
Value facts (values.py) read these records lazily; nothing is computed twice.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Iterator

import libcst as cst

from nnlint.analysis.names import NameTable, collect_aliases, dotted_name

if TYPE_CHECKING:
    from nnlint.analysis.project import ProjectIndex
    from nnlint.analysis.summary import ModuleSummary
    from nnlint.config import Settings

FunctionNode = cst.FunctionDef


@dataclass(eq=False)
class Binding:
    """One assignment of a value to a name (or attribute) inside a scope."""

    #: the assigned expression; None when unknown (loop target, with-as of a non-call, ...)
    value: cst.BaseExpression | None
    #: index into a tuple unpacking of `value` (`a, b = f()` gives a index 0, b index 1)
    index: int | None = None
    #: the operator of an augmented assignment (`+=`), None for `=`
    augmented: cst.BaseAugOp | None = None
    #: the statement that binds (for ordering and reports)
    statement: cst.CSTNode | None = None


@dataclass(eq=False)
class Scope:
    """A module or function body: what its names are bound to and what it returns."""

    node: cst.Module | FunctionNode
    parent: "Scope | None"
    bindings: dict[str, list[Binding]] = field(default_factory=dict)
    returns: list[cst.BaseExpression] = field(default_factory=list)
    #: names declared global/nonlocal here (their bindings belong to the outer scope)
    outer_names: set[str] = field(default_factory=set)
    parameters: set[str] = field(default_factory=set)

    def bind(self, name: str, binding: Binding) -> None:
        self.bindings.setdefault(name, []).append(binding)


@dataclass(eq=False)
class ClassInfo:
    """A class defined in the file."""

    node: cst.ClassDef
    name: str
    #: base classes as written and resolved: canonical names, or local class names
    bases: tuple[str, ...]
    methods: dict[str, FunctionNode] = field(default_factory=dict)
    #: `self.attr = value` assignments in any method: attr -> bindings (with their method)
    attributes: dict[str, list[tuple[Binding, FunctionNode]]] = field(default_factory=dict)


class ModuleModel:
    """What one parsed file means; built once, read by every rule."""

    def __init__(self, module: cst.Module, path: str = "<string>",
                 settings: "Settings | None" = None, project: "ProjectIndex | None" = None,
                 package: str | None = None, source: str | None = None) -> None:
        self.module = module
        #: the text the module was parsed from (regenerated from the tree only when absent)
        self._source = source
        self.path = path
        self.settings = settings
        self.project = project
        self.names = NameTable(package)
        self.classes: dict[str, ClassInfo] = {}
        #: top-level functions by name
        self.functions: dict[str, FunctionNode] = {}
        self.module_scope = Scope(module, None)
        self._scopes: dict[int, Scope] = {id(module): self.module_scope}
        #: the class a function is a method of
        self._method_class: dict[int, ClassInfo] = {}
        self._alias_candidates: list[tuple[cst.BaseExpression, cst.BaseExpression | None]] = []
        #: per-analysis memo tables (values, precision, ...) keyed by the analysis' name
        self.memo: dict[str, dict] = {}
        self._build()

    # -- the statement-level pass ---------------------------------------------------------
    def _build(self) -> None:
        self._statements(self.module.body, self.module_scope, None)
        collect_aliases(self.names, self._alias_candidates)
        self._alias_candidates = []

    def _statements(self, body: "tuple[cst.BaseStatement, ...] | list", scope: Scope,
                    owner: ClassInfo | None) -> None:
        for statement in body:
            self._statement(statement, scope, owner)

    def _block(self, block: cst.BaseSuite, scope: Scope, owner: ClassInfo | None) -> None:
        if isinstance(block, cst.IndentedBlock):
            self._statements(block.body, scope, owner)
        elif isinstance(block, cst.SimpleStatementSuite):
            for small in block.body:
                self._small(small, scope, owner, block)

    def _statement(self, statement: cst.CSTNode, scope: Scope, owner: ClassInfo | None) -> None:
        if isinstance(statement, cst.SimpleStatementLine):
            for small in statement.body:
                self._small(small, scope, owner, statement)
        elif isinstance(statement, cst.FunctionDef):
            self._function(statement, scope, owner)
        elif isinstance(statement, cst.ClassDef):
            self._class(statement, scope)
        elif isinstance(statement, (cst.If, cst.While)):
            self._block(statement.body, scope, owner)
            orelse = statement.orelse
            while orelse is not None:
                if isinstance(orelse, cst.If):
                    self._block(orelse.body, scope, owner)
                    orelse = orelse.orelse
                else:
                    self._block(orelse.body, scope, owner)
                    orelse = None
        elif isinstance(statement, cst.For):
            self._bind_target(statement.target, None, scope, owner, statement, unknown=True)
            self._block(statement.body, scope, owner)
            if statement.orelse is not None:
                self._block(statement.orelse.body, scope, owner)
        elif isinstance(statement, cst.With):
            for item in statement.items:
                if item.asname is not None:
                    self._bind_target(item.asname.name, item.item, scope, owner, statement)
            self._block(statement.body, scope, owner)
        elif isinstance(statement, (cst.Try, cst.TryStar)):
            self._block(statement.body, scope, owner)
            for handler in statement.handlers:
                self._block(handler.body, scope, owner)
            if statement.orelse is not None:
                self._block(statement.orelse.body, scope, owner)
            if statement.finalbody is not None:
                self._block(statement.finalbody.body, scope, owner)
        elif isinstance(statement, cst.Match):
            for case in statement.cases:
                self._block(case.body, scope, owner)

    def _small(self, small: cst.BaseSmallStatement, scope: Scope, owner: ClassInfo | None,
               statement: cst.CSTNode) -> None:
        if isinstance(small, (cst.Import, cst.ImportFrom)):
            self.names.add_import(small)
        elif isinstance(small, cst.Assign):
            for target in small.targets:
                self._bind_target(target.target, small.value, scope, owner, statement)
        elif isinstance(small, cst.AnnAssign):
            if small.value is not None:
                self._bind_target(small.target, small.value, scope, owner, statement)
        elif isinstance(small, cst.AugAssign):
            self._bind_target(small.target, small.value, scope, owner, statement,
                              augmented=small.operator)
        elif isinstance(small, cst.Return):
            if small.value is not None:
                scope.returns.append(small.value)
        elif isinstance(small, (cst.Global, cst.Nonlocal)):
            scope.outer_names.update(item.name.value for item in small.names)

    def _bind_target(self, target: cst.BaseExpression, value: cst.BaseExpression | None,
                     scope: Scope, owner: ClassInfo | None, statement: cst.CSTNode,
                     augmented: cst.BaseAugOp | None = None, unknown: bool = False,
                     index: int | None = None) -> None:
        if isinstance(target, cst.Name):
            binding = Binding(None if unknown else value, index, augmented, statement)
            self._scope_for_name(target.value, scope).bind(target.value, binding)
            if scope is self.module_scope or augmented is not None or unknown:
                self._alias_candidates.append((target, None if (unknown or augmented) else value))
            elif value is not None:
                self._alias_candidates.append((target, value))
        elif isinstance(target, (cst.Tuple, cst.List)):
            for position, element in enumerate(target.elements):
                inner = element.value
                if isinstance(inner, cst.StarredElement) or isinstance(element,
                                                                       cst.StarredElement):
                    inner = inner.value if isinstance(inner, cst.StarredElement) else inner
                    self._bind_target(inner, None, scope, owner, statement, unknown=True)
                    continue
                self._bind_target(inner, value, scope, owner, statement, augmented,
                                  unknown or value is None, position)
        elif isinstance(target, cst.Attribute) and owner is not None:
            receiver = target.value
            function = scope.node
            if (isinstance(receiver, cst.Name) and isinstance(function, cst.FunctionDef)
                    and receiver.value == _first_parameter(function)):
                binding = Binding(None if unknown else value, index, augmented, statement)
                owner.attributes.setdefault(target.attr.value, []).append((binding, function))

    def _scope_for_name(self, name: str, scope: Scope) -> Scope:
        while name in scope.outer_names and scope.parent is not None:
            scope = scope.parent
        return scope

    def _function(self, node: FunctionNode, scope: Scope, owner: ClassInfo | None) -> None:
        inner = Scope(node, scope)
        self._scopes[id(node)] = inner
        params = node.params
        for param in (*params.posonly_params, *params.params, *params.kwonly_params):
            inner.parameters.add(param.name.value)
        for star in (params.star_arg, params.star_kwarg):
            if isinstance(star, cst.Param):
                inner.parameters.add(star.name.value)
        scope.bind(node.name.value, Binding(None, statement=node))
        if owner is not None:
            owner.methods.setdefault(node.name.value, node)
            self._method_class[id(node)] = owner
        elif scope is self.module_scope:
            self.functions[node.name.value] = node
        self._alias_candidates.append((node.name, None))
        self._block(node.body, inner, owner)

    def _class(self, node: cst.ClassDef, scope: Scope) -> None:
        bases = []
        for arg in node.bases:
            if arg.keyword is not None:
                continue
            resolved = self.names.resolve(arg.value)
            written = dotted_name(arg.value)
            if resolved:
                bases.extend(sorted(resolved))
            elif written is not None:
                bases.append(written)
        info = ClassInfo(node, node.name.value, tuple(bases))
        if scope is self.module_scope:
            self.classes[info.name] = info
        scope.bind(info.name, Binding(None, statement=node))
        self._alias_candidates.append((node.name, None))
        self._block(node.body, scope, info)

    # -- queries ---------------------------------------------------------------------------
    @property
    def source(self) -> str:
        """The file's text; callers never need `module.code`, which regenerates it."""
        if self._source is None:
            self._source = self.module.code
        return self._source

    def resolve(self, expr: cst.BaseExpression) -> frozenset[str]:
        """Every canonical dotted name `expr` may denote (empty when unknown)."""
        return self.names.resolve(expr)

    def canonical(self, expr: cst.BaseExpression) -> str | None:
        """The canonical dotted name of `expr` when it is unique."""
        return self.names.resolve_one(expr)

    def quote(self, node: cst.CSTNode, limit: int) -> str:
        """The source of `node` shortened for a message (see `shorten`)."""
        return shorten(self.module.code_for_node(node), limit)

    def scope_of(self, function: FunctionNode | None) -> Scope:
        """The scope of a function (the module scope for None)."""
        if function is None:
            return self.module_scope
        return self._scopes.get(id(function), self.module_scope)

    def class_of_method(self, function: FunctionNode | None) -> ClassInfo | None:
        """The class whose body defines `function`, if any."""
        if function is None:
            return None
        return self._method_class.get(id(function))

    def lookup(self, name: str, scope: Scope) -> tuple[Scope, list[Binding]] | None:
        """The bindings of `name` seen from `scope` (Python's LEGB without builtins)."""
        current: Scope | None = scope
        while current is not None:
            if name in current.bindings and name not in current.outer_names:
                return current, current.bindings[name]
            if name in current.parameters:
                return current, []
            current = current.parent
        return None

    def class_ancestry(self, info: ClassInfo, seen: set[str] | None = None) -> Iterator[str]:
        """Canonical names of every base of `info`, following classes of this file."""
        seen = set() if seen is None else seen
        for base in info.bases:
            if base in seen:
                continue
            seen.add(base)
            yield base
            local = self.classes.get(base)
            if local is not None:
                yield from self.class_ancestry(local, seen)
            elif self.project is not None:
                yield from self.project.class_ancestry(base, self)

    def is_subclass_of(self, info: ClassInfo, prefixes: tuple[str, ...]) -> bool:
        """True when some ancestor's canonical name starts with one of `prefixes`."""
        return any(base.startswith(prefixes) for base in self.class_ancestry(info))

    def summary(self) -> "ModuleSummary":
        """The cheap, picklable digest other modules of the tree read."""
        from nnlint.analysis.summary import summarise

        return summarise(self)


def shorten(text: str, limit: int) -> str:
    """Text for a one-line message: whitespace collapsed, cut to `limit` with "..."."""
    text = " ".join(text.split())
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _first_parameter(function: FunctionNode) -> str | None:
    params = function.params
    ordered = (*params.posonly_params, *params.params)
    if not ordered:
        return None
    return ordered[0].name.value
