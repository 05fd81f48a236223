"""ModuleSummary: the cheap, picklable digest of a module that other modules of the tree read.

Phase 1 of a run summarises files; phase 2 runs the rules of a file with the summaries of
the modules it imports from the same tree. Analyses add what they know through
`register_summariser` (for example values.py records what each function returns), so facts
flow between modules without the engine knowing any analysis.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable

if TYPE_CHECKING:
    from nnlint.analysis.model import ModuleModel


@dataclass
class ModuleSummary:
    """What a module of the checked tree exports, as plain data."""

    path: str
    #: the module's dotted name (`kestrel.models`), None when it is not in a package
    module: str | None
    #: class name -> canonical names of its bases (local bases resolved through the file)
    class_bases: dict[str, tuple[str, ...]] = field(default_factory=dict)
    #: top-level function names
    functions: tuple[str, ...] = ()
    #: free-form facts, keyed "<analysis>:<exported name>" -> a short string value
    facts: dict[str, str] = field(default_factory=dict)


Summariser = Callable[["ModuleModel", ModuleSummary], None]
_SUMMARISERS: list[Summariser] = []


def register_summariser(function: Summariser) -> Summariser:
    """Decorator: `function(model, summary)` adds an analysis' exported facts."""
    _SUMMARISERS.append(function)
    return function


def summarise(model: "ModuleModel") -> ModuleSummary:
    summary = ModuleSummary(path=model.path, module=model.names.package)
    for name, info in model.classes.items():
        summary.class_bases[name] = tuple(model.class_ancestry(info))
    summary.functions = tuple(sorted(model.functions))
    for summariser in _SUMMARISERS:
        summariser(model, summary)
    return summary
