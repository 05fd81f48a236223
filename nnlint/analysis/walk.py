"""WalkContext: where the single rule walk is now (enclosing functions, classes, blocks).

The engine's dispatcher updates it before any rule sees a node, so rules share one set of
stacks instead of each keeping its own.
"""
from __future__ import annotations

import libcst as cst

#: node types whose nesting rules ask about (exact types: libcst nodes are not subclassed)
TRACKED_TYPES = frozenset({cst.FunctionDef, cst.ClassDef, cst.With, cst.For, cst.While, cst.If,
                           cst.Try, cst.TryStar, cst.Lambda})


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
