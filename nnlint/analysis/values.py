"""Value facts: what an expression holds (probabilities, log-probs, logits, exact zeros).

API (stable; other analyses and rules use it)::

    from nnlint.analysis.values import Kind, Fact, fact_of
    fact = fact_of(model, expr, function)             # function: the enclosing FunctionDef
    fact = fact_of(model, expr, function, statement)  # statement: the use's statement, for
                                                      # straight-line kills (see below)
    fact.kind          # Kind.PROB, LOGPROB, LOGITS, NONNEG, POSITIVE, UNKNOWN
    fact.can_be_zero   # the value can be exactly 0 in floating point
    fact.description   # "softmax output", "sigmoid output of `D`"
    fact.producer      # "softmax", "sigmoid", "ReLU", "count", "sparse", "1 - sigmoid", ...
    fact.guard         # the epsilon of `x + eps` / `clamp(min=eps)` when it is a constant
    fact.is_guarded    # an epsilon (known or not) or a floor was applied

    call_result(model, callee, function)   # what calling the object `callee` returns
    constant_value(model, expr, function)  # a numeric constant behind a name, or None

The domain is DESIGN §3's: PROB in [0, 1] (may underflow to 0 or round to 1), LOGPROB,
LOGITS (raw scores of an affine layer with no activation), NONNEG (>= 0; `can_be_zero` for
ReLU, counts, `1 - p`...), POSITIVE (> 0: exp, softplus, a guarded value), UNKNOWN.

Facts flow through names (the per-scope bindings of ModuleModel), tuple unpacking, `self.attr`
across the methods of a class, returns of functions of the same file, calls of modules (an
`nn.Sequential`/Keras `Sequential` returns what its last layer returns, an instance of a class
what its `forward`/`call`/`__call__` returns, a Keras `Model(inputs, outputs)` its outputs),
and across modules of the checked tree through ModuleSummary facts ("values:<name>").

Names are joined flow-insensitively (bindings that disagree give UNKNOWN or the weaker fact),
except that, given the statement of a use, a binding on the straight-line path to it (the
same or an enclosing block, earlier) hides the bindings before it: `p = softmax(s);
p = p.clamp(min=1e-6); log(p)` is guarded. Results are memoised in `model.memo["values"]`;
a recursion guard turns cycles into UNKNOWN.
"""
from __future__ import annotations

import enum
import json
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING

import libcst as cst

from nnlint.analysis.api import numerics as api
from nnlint.analysis.summary import register_summariser

if TYPE_CHECKING:
    from nnlint.analysis.model import Binding, ClassInfo, ModuleModel, Scope
    from nnlint.analysis.summary import ModuleSummary

#: how deep one question may recurse through names and calls before answering UNKNOWN
MAX_DEPTH = 60  # common practice: real chains are a few links; this bounds deep expressions


class Kind(enum.Enum):
    PROB = "prob"
    LOGPROB = "logprob"
    LOGITS = "logits"
    NONNEG = "nonneg"
    POSITIVE = "positive"
    UNKNOWN = "unknown"


@dataclass(frozen=True)
class Fact:
    """What one expression is known to hold."""

    kind: Kind
    #: the value can be exactly 0 in floating point
    can_be_zero: bool = False
    #: short human text naming what produced the value
    description: str = ""
    #: the producing operation ("softmax", "sigmoid", "ReLU", "count", "sparse",
    #: "1 - sigmoid", "model", ...), "" when unknown
    producer: str = ""
    #: the constant epsilon or floor applied (`x + 1e-8`, `clamp(min=1e-6)`), when known
    guard: float | None = None
    #: an epsilon or floor was applied (its value may be unknown)
    is_guarded: bool = False
    #: the expression that produced the fact (for messages), not part of equality
    origin: cst.CSTNode | None = field(default=None, compare=False, repr=False)


UNKNOWN = Fact(Kind.UNKNOWN)
_NONNEG_KINDS = (Kind.PROB, Kind.NONNEG, Kind.POSITIVE)


def fact_of(model: "ModuleModel", expr: cst.BaseExpression,
            function: cst.FunctionDef | None, statement: cst.CSTNode | None = None) -> Fact:
    """The fact of `expr` as seen inside `function` (None: module level).

    `statement` is the statement containing `expr` (the innermost SimpleStatementLine,
    SimpleStatementSuite or compound statement); without it names are joined over all
    their bindings.
    """
    return _evaluator(model).fact(expr, model.scope_of(function), statement)


def call_result(model: "ModuleModel", callee: cst.BaseExpression,
                function: cst.FunctionDef | None, statement: cst.CSTNode | None = None) -> Fact:
    """The fact of what calling the object `callee` returns (a model, a layer, a function)."""
    return _evaluator(model).call_result(callee, model.scope_of(function), statement)


def constant_value(model: "ModuleModel", expr: cst.BaseExpression,
                   function: cst.FunctionDef | None,
                   statement: cst.CSTNode | None = None) -> float | None:
    """The number `expr` always holds (literal, name or `self.attr` bound to one), or None."""
    return _evaluator(model).constant(expr, model.scope_of(function), statement)


def reaching_values(model: "ModuleModel", name: cst.Name, function: cst.FunctionDef | None,
                    statement: cst.CSTNode | None = None) -> list[cst.BaseExpression] | None:
    """The expressions `name` may hold at `statement` (None if any binding is not one)."""
    return _evaluator(model).reaching_values(name, model.scope_of(function), statement)


def join(facts: list[Fact]) -> Fact:
    """The weakest fact true of every one of `facts`."""
    if not facts:
        return UNKNOWN
    first = facts[0]
    if all(fact == first for fact in facts[1:]):
        return first
    kinds = {fact.kind for fact in facts}
    can_be_zero = any(fact.can_be_zero for fact in facts)
    zero_fact = next((fact for fact in facts if fact.can_be_zero), first)
    if len(kinds) == 1:
        guards = [fact.guard for fact in facts]
        guard = min(guards) if all(value is not None for value in guards) else None
        return replace(zero_fact, can_be_zero=can_be_zero, guard=guard,
                       is_guarded=all(fact.is_guarded for fact in facts))
    if kinds <= set(_NONNEG_KINDS):
        return replace(zero_fact, kind=Kind.NONNEG, can_be_zero=can_be_zero,
                       is_guarded=all(fact.is_guarded for fact in facts), guard=None)
    return UNKNOWN


def _evaluator(model: "ModuleModel") -> "_Evaluator":
    memo = model.memo.setdefault("values", {})
    evaluator = memo.get("evaluator")
    if evaluator is None:
        evaluator = memo["evaluator"] = _Evaluator(model)
    return evaluator


def _short(model: "ModuleModel", expr: cst.CSTNode) -> str:
    if isinstance(expr, cst.Name):
        return expr.value
    text = model.module.code_for_node(expr).strip()
    return text if len(text) <= 30 and "\n" not in text else "the model"


def _final_name(expr: cst.BaseExpression) -> str | None:
    if isinstance(expr, cst.Name):
        return expr.value
    if isinstance(expr, cst.Attribute):
        return expr.attr.value
    return None


def positional_argument(call: cst.Call, position: int) -> cst.BaseExpression | None:
    index = 0
    for arg in call.args:
        if arg.keyword is not None or arg.star:
            continue
        if index == position:
            return arg.value
        index += 1
    return None


def keyword_argument(call: cst.Call, names: tuple[str, ...]) -> cst.BaseExpression | None:
    for arg in call.args:
        if arg.keyword is not None and arg.keyword.value in names:
            return arg.value
    return None


def _is_one(expr: cst.BaseExpression) -> bool:
    if isinstance(expr, cst.Integer):
        return expr.evaluated_value == 1
    if isinstance(expr, cst.Float):
        return expr.evaluated_value == 1.0
    return False


# -- statement order inside a scope -----------------------------------------------------------
@dataclass
class _Position:
    order: int
    #: ((compound statement id, branch), ...) of the enclosing conditional blocks
    path: tuple[tuple[int, int], ...]
    #: ids of the enclosing loops
    loops: frozenset[int]


class _StatementIndex:
    """Source order and block nesting of every statement of one scope (statements only)."""

    def __init__(self, scope_node: cst.CSTNode) -> None:
        self.positions: dict[int, _Position] = {}
        #: id of a returned expression -> its statement
        self.return_statements: dict[int, cst.CSTNode] = {}
        self._order = 0
        body = scope_node.body
        if isinstance(body, cst.BaseSuite):
            self._suite(body, (), frozenset())
        else:
            self._statements(body, (), frozenset())

    def _record(self, statement: cst.CSTNode, path: tuple, loops: frozenset[int]) -> None:
        self.positions[id(statement)] = _Position(self._order, path, loops)
        self._order += 1

    def _statements(self, body, path: tuple, loops: frozenset[int]) -> None:
        for statement in body:
            self._statement(statement, path, loops)

    def _suite(self, suite: cst.BaseSuite, path: tuple, loops: frozenset[int]) -> None:
        if isinstance(suite, cst.IndentedBlock):
            self._statements(suite.body, path, loops)
        elif isinstance(suite, cst.SimpleStatementSuite):
            self._record(suite, path, loops)
            self._returns(suite.body, suite)

    def _returns(self, smalls, statement: cst.CSTNode) -> None:
        for small in smalls:
            if isinstance(small, cst.Return) and small.value is not None:
                self.return_statements[id(small.value)] = statement

    def _statement(self, statement: cst.CSTNode, path: tuple, loops: frozenset[int]) -> None:
        self._record(statement, path, loops)
        key = id(statement)
        if isinstance(statement, cst.SimpleStatementLine):
            self._returns(statement.body, statement)
        elif isinstance(statement, cst.ClassDef):
            self._suite(statement.body, path, loops)
        elif isinstance(statement, cst.If):
            branch = 0
            current: cst.CSTNode | None = statement
            while isinstance(current, cst.If):
                self._suite(current.body, (*path, (key, branch)), loops)
                branch += 1
                current = current.orelse
                if isinstance(current, cst.If):
                    self._record(current, (*path, (key, branch)), loops)
            if isinstance(current, cst.Else):
                self._suite(current.body, (*path, (key, branch)), loops)
        elif isinstance(statement, (cst.For, cst.While)):
            self._suite(statement.body, (*path, (key, 0)), loops | {key})
            if statement.orelse is not None:
                self._suite(statement.orelse.body, (*path, (key, 1)), loops)
        elif isinstance(statement, cst.With):
            self._suite(statement.body, path, loops)
        elif isinstance(statement, (cst.Try, cst.TryStar)):
            self._suite(statement.body, (*path, (key, 0)), loops)
            for number, handler in enumerate(statement.handlers, start=1):
                self._suite(handler.body, (*path, (key, number)), loops)
            if statement.orelse is not None:
                self._suite(statement.orelse.body, (*path, (key, -1)), loops)
            if statement.finalbody is not None:
                self._suite(statement.finalbody.body, (*path, (key, -2)), loops)
        elif isinstance(statement, cst.Match):
            for number, case in enumerate(statement.cases):
                self._suite(case.body, (*path, (key, number)), loops)


_PARAMETER = object()  # the value a parameter has on entry (unknown)


class _Evaluator:
    """Answers fact questions for one ModuleModel, memoising every answer."""

    def __init__(self, model: "ModuleModel") -> None:
        self.model = model
        self._facts: dict[tuple[int, int], Fact] = {}
        self._calls: dict[tuple[int, int, int | None], Fact] = {}
        self._in_progress: set[tuple] = set()
        self._indexes: dict[int, _StatementIndex] = {}
        self._depth = 0

    # -- plumbing ---------------------------------------------------------------------------
    def _guarded(self, key: tuple, compute, memo: dict) -> Fact:
        if key in memo:
            return memo[key]
        if key in self._in_progress or self._depth >= MAX_DEPTH:
            return UNKNOWN
        self._in_progress.add(key)
        self._depth += 1
        try:
            result = compute()
        finally:
            self._depth -= 1
            self._in_progress.discard(key)
        memo[key] = result
        return result

    def index(self, scope: "Scope") -> _StatementIndex:
        found = self._indexes.get(id(scope.node))
        if found is None:
            found = self._indexes[id(scope.node)] = _StatementIndex(scope.node)
        return found

    def fact(self, expr: cst.BaseExpression, scope: "Scope",
             statement: cst.CSTNode | None) -> Fact:
        key = (id(expr), id(statement) if statement is not None else 0)
        return self._guarded(key, lambda: self._fact(expr, scope, statement), self._facts)

    # -- expressions ------------------------------------------------------------------------
    def _fact(self, expr: cst.BaseExpression, scope: "Scope",
              statement: cst.CSTNode | None) -> Fact:
        if isinstance(expr, cst.Name):
            return self._name_fact(expr, scope, statement)
        if isinstance(expr, cst.Call):
            return self._call_fact(expr, scope, statement)
        if isinstance(expr, cst.BinaryOperation):
            return self._binary_fact(expr, scope, statement)
        if isinstance(expr, cst.Attribute):
            if expr.attr.value in ("T", "data", "mT"):
                return self.fact(expr.value, scope, statement)
            bindings = self._self_attribute(expr, scope)
            if bindings is not None:
                return join([self._binding_fact(binding, self.model.scope_of(method))
                             for binding, method in bindings])
            return UNKNOWN
        if isinstance(expr, cst.Subscript):
            return self.fact(expr.value, scope, statement)
        if isinstance(expr, cst.IfExp):
            return join([self.fact(expr.body, scope, statement),
                         self.fact(expr.orelse, scope, statement)])
        if isinstance(expr, (cst.Integer, cst.Float)):
            value = expr.evaluated_value
            if value > 0:
                return Fact(Kind.POSITIVE, description=f"the constant {expr.value}")
            if value == 0:
                return Fact(Kind.NONNEG, True, f"the constant {expr.value}", "constant")
        return UNKNOWN

    def _self_attribute(self, expr: cst.Attribute, scope: "Scope"
                        ) -> "list[tuple[Binding, cst.FunctionDef]] | None":
        """Bindings of `self.attr` when `expr` is an attribute of the method's receiver."""
        function = scope.node
        if not isinstance(expr.value, cst.Name) or not isinstance(function, cst.FunctionDef):
            return None
        info = self._owner_class(function)
        if info is None or expr.value.value != _receiver_name(function):
            return None
        found = self._class_attribute(info, expr.attr.value, set())
        return found

    def _is_receiver(self, expr: cst.Attribute, scope: "Scope") -> bool:
        """`expr` is `self.<name>` inside a method (the receiver is its first parameter)."""
        function = scope.node
        return (isinstance(expr.value, cst.Name) and isinstance(function, cst.FunctionDef)
                and self._owner_class(function) is not None
                and expr.value.value == _receiver_name(function))

    def _owner_class(self, function: cst.FunctionDef) -> "ClassInfo | None":
        return self.model.class_of_method(function)

    def _class_attribute(self, info: "ClassInfo", attribute: str, seen: set[str]):
        if attribute in info.attributes:
            return info.attributes[attribute]
        for base in info.bases:
            local = self.model.classes.get(base)
            if local is not None and base not in seen:
                seen.add(base)
                found = self._class_attribute(local, attribute, seen)
                if found is not None:
                    return found
        return None

    # -- names -------------------------------------------------------------------------------
    def reaching(self, name: str, scope: "Scope", statement: cst.CSTNode | None):
        """(owner scope, bindings and _PARAMETER markers reaching `statement`) or None."""
        found = self.model.lookup(name, scope)
        if found is None:
            return None
        owner, bindings = found
        entry = [_PARAMETER] if name in owner.parameters else []
        if owner is not scope or statement is None:
            return owner, [*bindings, *entry]
        index = self.index(owner)
        use = index.positions.get(id(statement))
        if use is None:
            return owner, [*bindings, *entry]
        before: list[tuple[int, "Binding", _Position | None]] = []
        carried: list[tuple["Binding", _Position]] = []
        for binding in bindings:
            position = index.positions.get(id(binding.statement))
            if position is None:
                before.append((-1, binding, None))
            elif position.order < use.order:
                before.append((position.order, binding, position))
            elif position.order > use.order and position.loops & use.loops:
                carried.append((binding, position))
        killer = None
        for order, binding, position in sorted(before, key=lambda item: item[0], reverse=True):
            if position is not None and use.path[: len(position.path)] == position.path:
                killer = (order, binding, position)
                break
        if killer is None:
            return owner, [item[1] for item in before] + [item[0] for item in carried] + entry
        order, _, killer_position = killer
        live = [item[1] for item in before if item[0] >= order]
        live += [binding for binding, position in carried
                 if (position.loops & use.loops) - killer_position.loops]
        return owner, live

    def _name_fact(self, name: cst.Name, scope: "Scope", statement: cst.CSTNode | None) -> Fact:
        found = self.reaching(name.value, scope, statement)
        if found is None:
            return UNKNOWN
        owner, bindings = found
        if not bindings:
            return UNKNOWN
        facts = []
        for binding in bindings:
            if binding is _PARAMETER:
                return UNKNOWN
            facts.append(self._binding_fact(binding, owner))
            if facts[-1].kind is Kind.UNKNOWN:
                return UNKNOWN
        return join(facts)

    def _binding_fact(self, binding: "Binding", scope: "Scope") -> Fact:
        value = binding.value
        if value is None:
            return UNKNOWN
        statement = binding.statement
        if binding.augmented is not None:
            return self._augmented_fact(binding, scope)
        if binding.index is not None:
            return self._element_fact(value, binding.index, scope, statement)
        return self.fact(value, scope, statement)

    def _augmented_fact(self, binding: "Binding", scope: "Scope") -> Fact:
        if not isinstance(binding.augmented, cst.AddAssign):
            return UNKNOWN
        target = _binding_target(binding)
        if target is None:
            return UNKNOWN
        before = self.fact(target, scope, binding.statement)
        return self._sum_fact(before, binding.value, scope, binding.statement)

    def _element_fact(self, value: cst.BaseExpression, index: int, scope: "Scope",
                      statement: cst.CSTNode | None) -> Fact:
        if isinstance(value, (cst.Tuple, cst.List)):
            elements = value.elements
            if index < len(elements) and not isinstance(elements[index], cst.StarredElement):
                return self.fact(elements[index].value, scope, statement)
            return UNKNOWN
        if isinstance(value, cst.Call):
            return self._returned_element(value, index, scope, statement, calls=False)
        return UNKNOWN

    def reaching_values(self, name: cst.Name, scope: "Scope", statement: cst.CSTNode | None):
        found = self.reaching(name.value, scope, statement)
        if found is None or not found[1]:
            return None
        values = []
        for binding in found[1]:
            if (binding is _PARAMETER or binding.value is None or binding.index is not None
                    or binding.augmented is not None):
                return None
            values.append(binding.value)
        return values

    # -- constants ---------------------------------------------------------------------------
    def constant(self, expr: cst.BaseExpression, scope: "Scope",
                 statement: cst.CSTNode | None, depth: int = 0) -> float | None:
        if depth > 8:
            return None
        if isinstance(expr, (cst.Integer, cst.Float)):
            return float(expr.evaluated_value)
        if isinstance(expr, cst.UnaryOperation) and isinstance(expr.operator, cst.Minus):
            inner = self.constant(expr.expression, scope, statement, depth + 1)
            return -inner if inner is not None else None
        if isinstance(expr, cst.BinaryOperation):
            left = self.constant(expr.left, scope, statement, depth + 1)
            right = self.constant(expr.right, scope, statement, depth + 1)
            if left is None or right is None:
                return None
            return _arithmetic(expr.operator, left, right)
        if isinstance(expr, cst.Name):
            found = self.reaching(expr.value, scope, statement)
            if found is None or not found[1]:
                return None
            owner, bindings = found
            values = set()
            for binding in bindings:
                if binding is _PARAMETER:
                    value = _parameter_default(owner, expr.value)
                    value = (None if value is None
                             else self.constant(value, owner.parent or owner, None, depth + 1))
                elif binding.value is None or binding.index is not None or binding.augmented:
                    value = None
                else:
                    value = self.constant(binding.value, owner, binding.statement, depth + 1)
                if value is None:
                    return None
                values.add(value)
            return values.pop() if len(values) == 1 else None
        if isinstance(expr, cst.Attribute):
            bindings = self._self_attribute(expr, scope)
            if not bindings:
                return None
            values = {self.constant(binding.value, self.model.scope_of(method),
                                    binding.statement, depth + 1)
                      if binding.value is not None and binding.index is None else None
                      for binding, method in bindings}
            if len(values) == 1:
                return values.pop()
        return None

    # -- calls ---------------------------------------------------------------------------------
    def _call_fact(self, call: cst.Call, scope: "Scope", statement: cst.CSTNode | None) -> Fact:
        func = call.func
        names = self.model.resolve(func)
        if names:
            return join([self._canonical_call(name, call, scope, statement)
                         for name in sorted(names)])
        final = _final_name(func)
        if final in api.SPARSE_PROB_NAMES:
            return Fact(Kind.PROB, True, f"{final} output", "sparse")
        if isinstance(func, cst.Attribute):
            method = func.attr.value
            if self._self_attribute(func, scope) is not None or self._is_receiver(func, scope):
                return self.call_result(func, scope, statement)
            return self._method_fact(method, func.value, call, scope, statement)
        return self.call_result(func, scope, statement)

    def _method_fact(self, method: str, receiver: cst.BaseExpression, call: cst.Call,
                     scope: "Scope", statement: cst.CSTNode | None) -> Fact:
        if method in api.PROB_METHODS:
            producer = api.PROB_METHODS[method]
            return Fact(Kind.PROB, True, f"{producer} output", producer, origin=call)
        if method in api.LOGPROB_METHODS:
            return Fact(Kind.LOGPROB, description="log_softmax output", producer="log_softmax")
        if method in api.POSITIVE_METHODS:
            return Fact(Kind.POSITIVE, description=f"{method.rstrip('_')} output",
                        producer="exp")
        if method in api.ZERO_PRODUCING_METHODS:
            producer = api.ZERO_PRODUCING_METHODS[method]
            return Fact(Kind.NONNEG, True, f"{producer} output", producer, origin=call)
        if method in api.NONNEG_METHODS:
            return Fact(Kind.NONNEG, description=f"{method.rstrip('_')} output")
        if method in api.CLAMP_METHODS:
            lower_names, _ = api.CLAMP_METHODS[method]
            lower = keyword_argument(call, lower_names) or positional_argument(call, 0)
            return self._floor_fact(receiver, lower, scope, statement)
        if method in api.PASS_THROUGH_METHODS:
            return self.fact(receiver, scope, statement)
        if method in api.MODEL_RUN_METHODS:
            return self.call_result(receiver, scope, statement)
        return UNKNOWN

    def _canonical_call(self, name: str, call: cst.Call, scope: "Scope",
                        statement: cst.CSTNode | None) -> Fact:
        short = name.rpartition(".")[2]
        if name in api.PROB_FUNCTIONS:
            producer = api.PROB_FUNCTIONS[name]
            return Fact(Kind.PROB, True, f"{producer} output", producer, origin=call)
        if name in api.LOGPROB_FUNCTIONS:
            return Fact(Kind.LOGPROB, description=f"{short} output", producer=short)
        if name in api.ZERO_PRODUCING_FUNCTIONS:
            producer = api.ZERO_PRODUCING_FUNCTIONS[name]
            text = "counts" if producer == "count" else f"{producer} output"
            return Fact(Kind.NONNEG, True, text, producer, origin=call)
        if name in api.POSITIVE_FUNCTIONS:
            return Fact(Kind.POSITIVE, description=f"{short} output", producer=short)
        if name in api.NONNEG_FUNCTIONS:
            return Fact(Kind.NONNEG, description=f"{short} output")
        if name in api.LOGITS_FUNCTIONS:
            return Fact(Kind.LOGITS, description=f"{short} output", producer="linear layer")
        subject = positional_argument(call, 0)
        if name in api.CLAMP_FUNCTIONS:
            lower_names, _ = api.CLAMP_FUNCTIONS[name]
            lower = keyword_argument(call, lower_names) or positional_argument(call, 1)
            if subject is None:
                return UNKNOWN
            return self._floor_fact(subject, lower, scope, statement)
        if name in api.MAXIMUM_FUNCTIONS:
            other = positional_argument(call, 1)
            if subject is None or other is None:
                return UNKNOWN
            if self.constant(subject, scope, statement) is not None:
                subject, other = other, subject
            return self._floor_fact(subject, other, scope, statement)
        if name in api.WHERE_FUNCTIONS:
            chosen = [positional_argument(call, 1), positional_argument(call, 2)]
            if None in chosen:
                return UNKNOWN
            return join([self.fact(expr, scope, statement) for expr in chosen])
        if name in api.PASS_THROUGH_FUNCTIONS:
            return self.fact(subject, scope, statement) if subject is not None else UNKNOWN
        if short in api.SPARSE_PROB_NAMES:
            return Fact(Kind.PROB, True, f"{short} output", "sparse")
        return self._exported(name, "r")

    def _floor_fact(self, subject: cst.BaseExpression, lower: cst.BaseExpression | None,
                    scope: "Scope", statement: cst.CSTNode | None) -> Fact:
        inner = self.fact(subject, scope, statement)
        if lower is None or (isinstance(lower, cst.Name) and lower.value == "None"):
            return inner
        floor = self.constant(lower, scope, statement)
        if floor is not None and floor <= 0:
            kind = inner.kind if inner.kind in _NONNEG_KINDS else Kind.NONNEG
            return Fact(kind, True, f"{inner.description or 'a value'} clamped at {floor:g}",
                        inner.producer or "clamp", origin=inner.origin)
        kind = Kind.POSITIVE if inner.kind in (Kind.NONNEG, Kind.POSITIVE) else inner.kind
        if kind is Kind.UNKNOWN:
            kind = Kind.POSITIVE
        return Fact(kind, False, inner.description, inner.producer, floor, True,
                    origin=inner.origin)

    # -- arithmetic ------------------------------------------------------------------------
    def _binary_fact(self, expr: cst.BinaryOperation, scope: "Scope",
                     statement: cst.CSTNode | None) -> Fact:
        operator = expr.operator
        if isinstance(operator, cst.Subtract) and _is_one(expr.left):
            inner = self.fact(expr.right, scope, statement)
            if inner.kind is Kind.PROB:
                producer = inner.producer.rpartition(" ")[2] or "probability"
                return Fact(Kind.PROB, True, f"1 - {inner.description}", f"1 - {producer}",
                            origin=inner.origin)
            return UNKNOWN
        if isinstance(operator, cst.Add):
            left = self.fact(expr.left, scope, statement)
            if left.kind is Kind.UNKNOWN and self.constant(expr.left, scope, statement) is None:
                return UNKNOWN
            if self.constant(expr.left, scope, statement) is not None:
                right = self.fact(expr.right, scope, statement)
                return self._sum_fact(right, expr.left, scope, statement)
            return self._sum_fact(left, expr.right, scope, statement)
        if isinstance(operator, cst.Divide):
            return self._quotient_fact(expr, scope, statement)
        if isinstance(operator, cst.Multiply):
            left = self.fact(expr.left, scope, statement)
            right = self.fact(expr.right, scope, statement)
            if left.kind in _NONNEG_KINDS and right.kind in _NONNEG_KINDS:
                zero = left.can_be_zero or right.can_be_zero
                kind = Kind.PROB if left.kind is right.kind is Kind.PROB else (
                    Kind.POSITIVE if not zero else Kind.NONNEG)
                source = left if left.can_be_zero else right
                return Fact(kind, zero, source.description, source.producer,
                            origin=source.origin)
            return UNKNOWN
        if isinstance(operator, cst.Power):
            exponent = self.constant(expr.right, scope, statement)
            base = self.fact(expr.left, scope, statement)
            if base.kind is Kind.PROB and exponent is not None and exponent > 0:
                return base
            if exponent is not None and exponent % 2 == 0:
                return Fact(Kind.NONNEG, description="a square")
        return UNKNOWN

    def _sum_fact(self, base: Fact, addend: cst.BaseExpression, scope: "Scope",
                  statement: cst.CSTNode | None) -> Fact:
        value = self.constant(addend, scope, statement)
        if value is not None:
            if value > 0 and base.kind in _NONNEG_KINDS:
                return Fact(Kind.POSITIVE, False, base.description, base.producer, value,
                            True, origin=base.origin)
            if value == 0:
                return base
            return UNKNOWN
        other = self.fact(addend, scope, statement)
        if base.kind in _NONNEG_KINDS and other.kind in _NONNEG_KINDS:
            zero = base.can_be_zero and other.can_be_zero
            guarded = other.kind is Kind.POSITIVE or base.kind is Kind.POSITIVE
            return Fact(Kind.POSITIVE if guarded else Kind.NONNEG, zero and not guarded,
                        base.description, base.producer, None, guarded, origin=base.origin)
        if base.can_be_zero and other.kind is Kind.UNKNOWN:
            # `p + eps` with eps unknown (a parameter): a guard we cannot judge, so trust it
            return Fact(Kind.POSITIVE, False, base.description, base.producer, None, True,
                        origin=base.origin)
        return UNKNOWN

    def _quotient_fact(self, expr: cst.BinaryOperation, scope: "Scope",
                       statement: cst.CSTNode | None) -> Fact:
        if _is_one(expr.left):
            denominator = expr.right
            if (isinstance(denominator, cst.BinaryOperation)
                    and isinstance(denominator.operator, cst.Add)
                    and _is_one(denominator.left)
                    and self._is_exp(denominator.right, scope, statement)):
                return Fact(Kind.PROB, True, "sigmoid output", "sigmoid", origin=expr)
            return UNKNOWN
        if (self._is_exp(expr.left, scope, statement)
                and self._is_exp_sum(expr.right, scope, statement)):
            return Fact(Kind.PROB, True, "softmax output", "softmax", origin=expr)
        return UNKNOWN

    def _is_exp(self, expr: cst.BaseExpression, scope: "Scope",
                statement: cst.CSTNode | None) -> bool:
        return exp_argument(self.model, expr, scope, statement, self) is not None

    def _is_exp_sum(self, expr: cst.BaseExpression, scope: "Scope",
                    statement: cst.CSTNode | None) -> bool:
        return summed_exp_argument(self.model, expr, scope, statement, self) is not None

    # -- calling objects (models, layers, functions) -------------------------------------------
    def call_result(self, callee: cst.BaseExpression, scope: "Scope",
                    statement: cst.CSTNode | None) -> Fact:
        key = (id(callee), id(statement) if statement is not None else 0, None)
        return self._guarded(key, lambda: self._call_result(callee, scope, statement),
                             self._calls)

    def _call_result(self, callee: cst.BaseExpression, scope: "Scope",
                     statement: cst.CSTNode | None) -> Fact:
        if isinstance(callee, cst.Name):
            found = self.reaching(callee.value, scope, statement)
            if found is None:
                return UNKNOWN
            owner, bindings = found
            facts = []
            for binding in bindings:
                if binding is _PARAMETER:
                    return UNKNOWN
                facts.append(self._called_binding(binding, owner, callee))
            return _named(join(facts), self.model, callee)
        if isinstance(callee, cst.Attribute):
            bindings = self._self_attribute(callee, scope)
            if bindings is not None:
                return _named(join([self._called_binding(binding, self.model.scope_of(method),
                                                         callee)
                                    for binding, method in bindings]), self.model, callee)
            function = scope.node
            if isinstance(function, cst.FunctionDef) and self._is_receiver(callee, scope):
                info = self._owner_class(function)
                method = info.methods.get(callee.attr.value) if info is not None else None
                if method is not None:
                    return self._function_returns(method)
            return UNKNOWN
        if isinstance(callee, cst.Call):
            return self._object_call(callee, scope, statement)
        return UNKNOWN

    def _called_binding(self, binding: "Binding", scope: "Scope",
                        callee: cst.BaseExpression) -> Fact:
        statement = binding.statement
        if isinstance(statement, cst.FunctionDef) and binding.value is None:
            return self._function_returns(statement)
        value = binding.value
        if value is None or binding.augmented is not None:
            return UNKNOWN
        if binding.index is not None:
            if isinstance(value, (cst.Tuple, cst.List)):
                elements = value.elements
                if binding.index < len(elements):
                    return self._object_value_call(elements[binding.index].value, scope,
                                                   statement)
                return UNKNOWN
            if isinstance(value, cst.Call):
                return self._returned_element(value, binding.index, scope, statement,
                                              calls=True)
            return UNKNOWN
        return self._object_value_call(value, scope, statement)

    def _object_value_call(self, value: cst.BaseExpression, scope: "Scope",
                           statement: cst.CSTNode | None) -> Fact:
        if isinstance(value, cst.Call):
            return self._object_call(value, scope, statement)
        if isinstance(value, (cst.Name, cst.Attribute)):
            return self.call_result(value, scope, statement)
        return UNKNOWN

    def _object_call(self, construction: cst.Call, scope: "Scope",
                     statement: cst.CSTNode | None) -> Fact:
        """What calling the object made by `construction` (`nn.Linear(...)`, `Net()`) returns."""
        func = construction.func
        names = self.model.resolve(func)
        if names:
            return join([self._constructed_call(name, construction, scope, statement)
                         for name in sorted(names)])
        if isinstance(func, cst.Attribute) and func.attr.value in api.MODULE_PRESERVING_METHODS:
            return self._object_value_call(func.value, scope, statement)
        if isinstance(func, cst.Name):
            info = self.model.classes.get(func.value)
            if info is not None and self.model.lookup(func.value, scope) is not None:
                return self.class_call(info)
            function = self.model.functions.get(func.value)
            if function is not None:
                return self._function_object(function)
        return UNKNOWN

    def _constructed_call(self, name: str, construction: cst.Call, scope: "Scope",
                          statement: cst.CSTNode | None) -> Fact:
        if name in api.PROB_LAYERS:
            producer = api.PROB_LAYERS[name]
            return Fact(Kind.PROB, True, f"{producer} output", producer, origin=construction)
        if name in api.LOGPROB_LAYERS:
            return Fact(Kind.LOGPROB, description="log-probabilities", producer="log_softmax")
        if name in api.ZERO_PRODUCING_LAYERS:
            producer = api.ZERO_PRODUCING_LAYERS[name]
            return Fact(Kind.NONNEG, True, f"{producer} output", producer, origin=construction)
        if name == api.KERAS_ACTIVATION_LAYER:
            return self._activation_fact(positional_argument(construction, 0)
                                         or keyword_argument(construction, ("activation",)),
                                         construction, scope)
        if name in api.LOGITS_LAYERS:
            activation = keyword_argument(construction, ("activation",))
            if activation is None and name.startswith(api.KERAS_ACTIVATION_LAYERS_PREFIX):
                activation = positional_argument(construction, 1)
            if activation is None:
                return Fact(Kind.LOGITS, description="raw scores", producer="linear layer")
            return self._activation_fact(activation, construction, scope)
        if name in api.SEQUENTIAL_CLASSES:
            return self._stack_call(construction, scope, statement)
        if name in api.KERAS_MODEL_CLASSES:
            outputs = (keyword_argument(construction, ("outputs",))
                       or positional_argument(construction, 1))
            if outputs is None:
                return UNKNOWN
            return self.fact(outputs, scope, statement)
        return self._exported(name, "c")

    def _activation_fact(self, activation: cst.BaseExpression | None, origin: cst.CSTNode,
                         scope: "Scope") -> Fact:
        if isinstance(activation, cst.SimpleString):
            text = activation.evaluated_value
            known = api.KERAS_ACTIVATIONS.get(text if isinstance(text, str) else "")
            if known is None:
                return UNKNOWN
            kind = Kind[known[0]]
            zero = kind in (Kind.PROB, Kind.NONNEG)
            description = "raw scores" if kind is Kind.LOGITS else f"{known[1]} output"
            return Fact(kind, zero, description, known[1], origin=origin)
        if isinstance(activation, cst.Name) and activation.value == "None":
            return Fact(Kind.LOGITS, description="raw scores", producer="linear layer")
        if activation is not None:
            for name in self.model.resolve(activation):
                if name in api.PROB_FUNCTIONS:
                    producer = api.PROB_FUNCTIONS[name]
                    return Fact(Kind.PROB, True, f"{producer} output", producer, origin=origin)
        return UNKNOWN

    def _stack_call(self, construction: cst.Call, scope: "Scope",
                    statement: cst.CSTNode | None) -> Fact:
        layers: list[cst.BaseExpression] = []
        for arg in construction.args:
            if arg.keyword is not None or arg.star:
                continue
            if isinstance(arg.value, (cst.List, cst.Tuple)):
                layers.extend(element.value for element in arg.value.elements
                              if not isinstance(element, cst.StarredElement))
            else:
                layers.append(arg.value)
        for layer in reversed(layers):
            if isinstance(layer, cst.Call) and self.model.resolve(layer.func) & \
                    api.TRANSPARENT_LAYERS:
                continue
            if isinstance(layer, cst.Call) and _is_dropout(self.model, layer.func):
                continue
            return self._object_value_call(layer, scope, statement)
        return UNKNOWN

    # -- functions and classes ---------------------------------------------------------------
    def _function_returns(self, function: cst.FunctionDef) -> Fact:
        """The fact of what `function` returns (joined over its return statements)."""
        key = (id(function), -1, None)
        return self._guarded(key, lambda: self._returns_fact(function, calls=False),
                             self._calls)

    def _function_object(self, function: cst.FunctionDef) -> Fact:
        """What calling the object `function` returns yields (`build_model()(x)`)."""
        key = (id(function), -2, None)
        return self._guarded(key, lambda: self._returns_fact(function, calls=True),
                             self._calls)

    def _returns_fact(self, function: cst.FunctionDef, calls: bool,
                      index: int | None = None) -> Fact:
        scope = self.model.scope_of(function)
        if scope.node is not function or not scope.returns:
            return UNKNOWN
        statements = self.index(scope).return_statements
        facts = []
        for value in scope.returns:
            statement = statements.get(id(value))
            if index is not None:
                if not isinstance(value, (cst.Tuple, cst.List)):
                    return UNKNOWN
                elements = value.elements
                if index >= len(elements):
                    return UNKNOWN
                value = elements[index].value
            if calls:
                facts.append(self._object_value_call(value, scope, statement))
            else:
                facts.append(self.fact(value, scope, statement))
        return join(facts)

    def _returned_element(self, call: cst.Call, index: int, scope: "Scope",
                          statement: cst.CSTNode | None, calls: bool) -> Fact:
        """Element `index` of what `call` returns (calls=True: what calling it returns)."""
        func = call.func
        names = self.model.resolve(func)
        if names:
            facts = [self._exported(name, f"i{index}{'c' if calls else 'r'}")
                     for name in sorted(names)]
            return join(facts)
        if isinstance(func, cst.Name):
            function = self.model.functions.get(func.value)
            if function is not None:
                key = (id(function), -3 - 2 * index - int(calls), None)
                return self._guarded(
                    key, lambda: self._returns_fact(function, calls, index), self._calls)
        return UNKNOWN

    def class_call(self, info: "ClassInfo") -> Fact:
        """What calling an instance of the local class `info` returns."""
        key = (id(info.node), -1, None)
        return self._guarded(key, lambda: self._class_call(info, set()), self._calls)

    def _class_call(self, info: "ClassInfo", seen: set[str]) -> Fact:
        for method_name in api.FORWARD_METHODS:
            method = info.methods.get(method_name)
            if method is not None:
                return self._function_returns(method)
        for base in info.bases:
            local = self.model.classes.get(base)
            if local is not None and base not in seen:
                seen.add(base)
                return self._class_call(local, seen)
            if local is None:
                exported = self._exported(base, "c")
                if exported.kind is not Kind.UNKNOWN:
                    return exported
        return UNKNOWN

    def _exported(self, canonical: str, slot: str) -> Fact:
        project = self.model.project
        if project is None:
            return UNKNOWN
        text = project.exported_fact(canonical, "values", self.model)
        if not text:
            return UNKNOWN
        return decode_fact(json.loads(text).get(slot))


def _named(fact: Fact, model: "ModuleModel", callee: cst.BaseExpression) -> Fact:
    """Name the called object in the description: "sigmoid output of `D`"."""
    if fact.kind is Kind.UNKNOWN:
        return fact
    base = fact.description.split(" of `")[0]
    return replace(fact, description=f"{base} of `{_short(model, callee)}`")


def _is_dropout(model: "ModuleModel", func: cst.BaseExpression) -> bool:
    return any(name.rpartition(".")[2].startswith(("Dropout", "AlphaDropout"))
               for name in model.resolve(func))


def _receiver_name(function: cst.FunctionDef) -> str | None:
    params = (*function.params.posonly_params, *function.params.params)
    return params[0].name.value if params else None


def _binding_target(binding: "Binding") -> cst.BaseExpression | None:
    statement = binding.statement
    if isinstance(statement, (cst.SimpleStatementLine, cst.SimpleStatementSuite)):
        for small in statement.body:
            if isinstance(small, cst.AugAssign) and small.value is binding.value:
                return small.target
    return None


def _parameter_default(scope: "Scope", name: str) -> cst.BaseExpression | None:
    function = scope.node
    if not isinstance(function, cst.FunctionDef):
        return None
    params = function.params
    for param in (*params.posonly_params, *params.params, *params.kwonly_params):
        if param.name.value == name:
            return param.default
    return None


def _arithmetic(operator: cst.BaseBinaryOp, left: float, right: float) -> float | None:
    if isinstance(operator, cst.Add):
        return left + right
    if isinstance(operator, cst.Subtract):
        return left - right
    if isinstance(operator, cst.Multiply):
        return left * right
    if isinstance(operator, cst.Divide) and right != 0:
        return left / right
    if isinstance(operator, cst.Power) and abs(right) < 400 and left > 0:
        return left ** right
    return None


# -- exp patterns shared by the softmax and log-sum-exp checks ---------------------------------
def exp_argument(model: "ModuleModel", expr: cst.BaseExpression, scope: "Scope",
                 statement: cst.CSTNode | None, evaluator: "_Evaluator | None" = None
                 ) -> cst.BaseExpression | None:
    """X when `expr` is `exp(X)` (function or method form, or a name bound only to one)."""
    if isinstance(expr, cst.Call):
        func = expr.func
        names = model.resolve(func)
        if names:
            if names <= api.EXP_FUNCTIONS:
                return positional_argument(expr, 0)
            return None
        if isinstance(func, cst.Attribute) and func.attr.value == "exp" and not expr.args:
            return func.value
        return None
    if isinstance(expr, cst.Name):
        evaluator = evaluator or _evaluator(model)
        single = single_value(model, expr, scope, statement)
        if single is None:
            return None
        return exp_argument(model, *single, evaluator)
    return None


def summed_exp_argument(model: "ModuleModel", expr: cst.BaseExpression, scope: "Scope",
                        statement: cst.CSTNode | None,
                        evaluator: "_Evaluator | None" = None) -> cst.BaseExpression | None:
    """X when `expr` is a sum of `exp(X)` (`exp(X).sum()`, `np.sum(exp(X))`, a name of one)."""
    summed = summed_operand(model, expr)
    if summed is not None:
        return exp_argument(model, summed, scope, statement, evaluator)
    if isinstance(expr, cst.Name):
        evaluator = evaluator or _evaluator(model)
        single = single_value(model, expr, scope, statement)
        inner = summed_operand(model, single[0]) if single is not None else None
        if inner is None:
            return None
        return exp_argument(model, inner, single[1], single[2], evaluator)
    return None


def summed_operand(model: "ModuleModel", expr: cst.BaseExpression) -> cst.BaseExpression | None:
    """Y when `expr` is a sum reduction of Y (`Y.sum(...)`, `torch.sum(Y)`, `reduce_sum(Y)`)."""
    if not isinstance(expr, cst.Call):
        return None
    func = expr.func
    names = model.resolve(func)
    if names:
        return positional_argument(expr, 0) if names <= api.SUM_FUNCTIONS else None
    if isinstance(func, cst.Attribute) and func.attr.value in api.SUM_METHODS:
        return func.value
    return None


def single_value(model: "ModuleModel", name: cst.Name, scope: "Scope",
                 statement: cst.CSTNode | None):
    """(value, its scope, its statement) when exactly one plain binding of `name` reaches."""
    found = _evaluator(model).reaching(name.value, scope, statement)
    if found is None or len(found[1]) != 1:
        return None
    owner, (binding,) = found
    if (binding is _PARAMETER or binding.value is None or binding.index is not None
            or binding.augmented is not None):
        return None
    return binding.value, owner, binding.statement


# -- summaries: what other modules of the tree learn ----------------------------------------------
def encode_fact(fact: Fact) -> list | None:
    if fact.kind is Kind.UNKNOWN:
        return None
    return [fact.kind.name, fact.can_be_zero, fact.producer, fact.description]


def decode_fact(data: object) -> Fact:
    if not isinstance(data, list) or len(data) != 4 or data[0] not in Kind.__members__:
        return UNKNOWN
    return Fact(Kind[data[0]], bool(data[1]), str(data[3]), str(data[2]))


@register_summariser
def _summarise_values(model: "ModuleModel", summary: "ModuleSummary") -> None:
    """Export what each function returns and what calling each class's instances returns."""
    evaluator = _evaluator(model)
    for name, function in model.functions.items():
        slots = {"r": encode_fact(evaluator._function_returns(function)),
                 "c": encode_fact(evaluator._function_object(function))}
        scope = model.scope_of(function)
        width = {len(value.elements) for value in scope.returns
                 if isinstance(value, (cst.Tuple, cst.List))}
        if len(width) == 1 and len(scope.returns) >= 1:
            for position in range(min(width.pop(), 8)):
                slots[f"i{position}r"] = encode_fact(
                    evaluator._returns_fact(function, False, position))
                slots[f"i{position}c"] = encode_fact(
                    evaluator._returns_fact(function, True, position))
        _store(summary, name, slots)
    for name, info in model.classes.items():
        _store(summary, name, {"c": encode_fact(evaluator.class_call(info))})


def _store(summary: "ModuleSummary", name: str, slots: dict) -> None:
    known = {slot: value for slot, value in slots.items() if value is not None}
    if known:
        summary.facts[f"values:{name}"] = json.dumps(known, sort_keys=True)
