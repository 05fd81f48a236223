"""Rule: one hazard's identity, documentation and check, and the registry of all rules."""
from __future__ import annotations

import string
from typing import TYPE_CHECKING, Callable, ClassVar

import libcst as cst

from nnlint.finding import Severity

if TYPE_CHECKING:
    from nnlint.analysis.model import ModuleModel
    from nnlint.analysis.walk import WalkContext


class Fix:
    """One unambiguous rewrite: replace `target` (a node of the parsed module) by `replacement`.

    `nnlint fix` applies it with libcst, so everything outside `target` stays byte-identical.
    `imports` are top-level import statements the replacement needs (`"import torch"`); the
    fixer adds each one the module does not already contain, after its last top-level import.
    """

    __slots__ = ("target", "replacement", "imports")

    def __init__(self, target: cst.CSTNode, replacement: cst.CSTNode,
                 imports: tuple[str, ...] = ()) -> None:
        self.target = target
        self.replacement = replacement
        self.imports = imports


class Report:
    """A finding before positions are known: the node and the finished message."""

    __slots__ = ("rule", "node", "message", "line", "column", "severity", "fix")

    def __init__(self, rule: type["Rule"], node: cst.CSTNode | None, message: str,
                 line: int | None = None, column: int | None = None,
                 severity: Severity | None = None, fix: Fix | None = None) -> None:
        self.rule = rule
        self.node = node
        self.message = message
        #: overrides the rule's default severity for this one finding (None: the rule's)
        self.severity = severity or rule.severity
        self.fix = fix
        #: explicit 1-based position, used when there is no node (parse errors)
        self.line = line
        self.column = column


class Rule:
    """Base class of every rule; subclasses set the class attributes and define visit_* methods.

    A rule instance lives for one file. It reads `self.model` (what the file means, built by
    analysis/) and `self.context` (where the walk is now), and calls `self.report(node, ...)`.
    """

    code: ClassVar[str] = ""
    name: ClassVar[str] = ""
    severity: ClassVar[Severity] = Severity.WARNING
    summary: ClassVar[str] = ""
    #: str.format template for the one-line message; fields come from report(**fields)
    message: ClassVar[str] = ""
    rationale: ClassVar[str] = ""
    bad: ClassVar[str] = ""
    good: ClassVar[str] = ""
    references: ClassVar[tuple[str, ...]] = ()
    #: what `nnlint fix` rewrites, in a few words ("adds the missing call"); "" when no
    #: finding of this rule carries a fix
    rewrite: ClassVar[str] = ""
    enabled_by_default: ClassVar[bool] = True
    retired: ClassVar[bool] = False
    #: True when the CLI emits it itself instead of a visitor (NNL001)
    engine_only: ClassVar[bool] = False

    def __init__(self, model: "ModuleModel", context: "WalkContext", sink: list[Report]) -> None:
        self.model = model
        self.context = context
        self._sink = sink

    def report(self, node: cst.CSTNode, severity: Severity | None = None,
               autofix: Fix | None = None, **fields: object) -> None:
        """Record a finding at `node`; the message is the template filled with `fields`.

        `severity` overrides the rule's default for this finding (for rules whose certainty
        depends on what is known, e.g. a warning that becomes an error with more evidence).
        `autofix` is the rewrite `nnlint fix` may apply; give one only when it is unambiguous and
        changes nothing but the bug.
        """
        self._sink.append(Report(type(self), node, self.message.format(**fields),
                                 severity=severity, fix=autofix))

    @classmethod
    def message_fields(cls) -> set[str]:
        """The field names the message template expects."""
        return {field for _, field, _, _ in string.Formatter().parse(cls.message) if field}

    @classmethod
    def explain(cls) -> str:
        """The long help text: summary, rationale, examples, references."""
        lines = [f"{cls.code} {cls.name} ({cls.severity.value})", "", cls.summary, ""]
        if cls.rationale:
            lines += [cls.rationale, ""]
        if cls.bad:
            lines += ["Flagged:", *("    " + line for line in cls.bad.splitlines()), ""]
        if cls.good:
            lines += ["Not flagged:", *("    " + line for line in cls.good.splitlines()), ""]
        if cls.rewrite:
            lines += [f"Automatic fix (`nnlint fix`): {cls.rewrite}.", ""]
        if cls.references:
            lines += ["References:", *("  - " + ref for ref in cls.references), ""]
        if not cls.enabled_by_default:
            lines += ["Off by default: enable it with --select " + cls.code, ""]
        return "\n".join(lines).rstrip() + "\n"


_REGISTRY: dict[str, type[Rule]] = {}


def register(rule: type[Rule]) -> type[Rule]:
    """Class decorator: add a rule to the registry (codes and names must be unique)."""
    if rule.code in _REGISTRY:
        raise ValueError(f"rule code {rule.code} registered twice")
    if any(other.name == rule.name for other in _REGISTRY.values()):
        raise ValueError(f"rule name {rule.name} registered twice")
    _REGISTRY[rule.code] = rule
    return rule


def all_rules() -> list[type[Rule]]:
    """Every registered rule, sorted by code."""
    import nnlint.rules  # noqa: F401  (importing the package registers the families)

    return [_REGISTRY[code] for code in sorted(_REGISTRY)]


def get_rule(code: str) -> type[Rule] | None:
    all_rules()
    return _REGISTRY.get(code)


VisitMethod = Callable[[cst.CSTNode], None]
