"""WalkContext: where the single rule walk is now (enclosing functions, classes, blocks).

The engine's dispatcher updates it before any rule sees a node, so rules share one set of
stacks instead of each keeping its own.
"""
from __future__ import annotations

import dataclasses

import libcst as cst

#: node types whose nesting rules ask about (exact types: libcst nodes are not subclassed)
TRACKED_TYPES = frozenset({cst.FunctionDef, cst.ClassDef, cst.With, cst.For, cst.While, cst.If,
                           cst.Try, cst.TryStar, cst.Lambda})


#: node fields that hold only layout (whitespace, brackets, separators): never walked
_LAYOUT_FIELDS = frozenset({
    "lpar", "rpar", "comma", "semicolon", "colon", "first_colon", "second_colon", "equal",
    "dot", "leading_lines", "lines_after_decorators", "header", "footer", "indent",
    "trailing_whitespace", "encoding", "default_indent", "default_newline",
    "has_trailing_newline", "relative", "lbracket", "rbracket", "lbrace", "rbrace",
    "asynchronous", "star", "conversion", "newline", "lsqb", "rsqb",
})
_CHILD_FIELDS: dict[type, tuple[str, ...]] = {}


def child_fields(node_type: type) -> tuple[str, ...]:
    """The fields of a node type that can hold meaningful child nodes, in source order."""
    fields = _CHILD_FIELDS.get(node_type)
    if fields is None:
        names = [field.name for field in dataclasses.fields(node_type)
                 if field.name not in _LAYOUT_FIELDS and not field.name.startswith("whitespace")]
        if "decorators" in names:  # decorators come first in the source
            names.remove("decorators")
            names.insert(0, "decorators")
        fields = _CHILD_FIELDS[node_type] = tuple(names)
    return fields


#: type -> is it a libcst node type (filled on first sight of each type)
NODE_KINDS: dict[type, bool] = {}


def is_node_kind(kind: type) -> bool:
    known = NODE_KINDS.get(kind)
    if known is None:
        known = NODE_KINDS[kind] = issubclass(kind, cst.CSTNode)
    return known


def children(node: cst.CSTNode) -> list[cst.CSTNode]:
    """The node's meaningful children in source order (what the engine's walk visits)."""
    found: list[cst.CSTNode] = []
    for name in child_fields(type(node)):
        value = getattr(node, name)
        if type(value) in (tuple, list):
            found.extend(item for item in value if is_node_kind(type(item)))
        elif is_node_kind(type(value)):
            found.append(value)
    return found


class WalkContext:
    """Stacks of the enclosing nodes of the node being visited."""

    __slots__ = ("ancestors", "functions", "classes", "blocks")

    def __init__(self) -> None:
        #: every node from the module down to the current one's parent
        self.ancestors: list[cst.CSTNode] = []
        self.functions: list[cst.FunctionDef] = []
        self.classes: list[cst.ClassDef] = []
        #: enclosing With/For/While/If/Try/Lambda/FunctionDef/ClassDef nodes, outermost first
        self.blocks: list[cst.CSTNode] = []

    def enter(self, node: cst.CSTNode) -> None:
        """Called for nodes of TRACKED_TYPES only, before rules visit them."""
        self.blocks.append(node)
        if type(node) is cst.FunctionDef:
            self.functions.append(node)
        elif type(node) is cst.ClassDef:
            self.classes.append(node)

    def leave(self, node: cst.CSTNode) -> None:
        """Called for nodes of TRACKED_TYPES only, after rules left them."""
        self.blocks.pop()
        if type(node) is cst.FunctionDef:
            self.functions.pop()
        elif type(node) is cst.ClassDef:
            self.classes.pop()

    @property
    def function(self) -> cst.FunctionDef | None:
        """The innermost enclosing function, if any."""
        return self.functions[-1] if self.functions else None

    @property
    def parent(self) -> cst.CSTNode | None:
        return self.ancestors[-1] if self.ancestors else None

    def enclosing(self, kinds: type | tuple[type, ...]) -> list[cst.CSTNode]:
        """Enclosing blocks of the given node types, innermost first."""
        return [block for block in reversed(self.blocks) if isinstance(block, kinds)]
