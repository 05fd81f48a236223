"""Training iterations: what one pass of a loop body does to gradients, and in which order.

A statement-level scan (like model.py it reads statements, and only the call chains of their
values, never a whole expression subtree) lists the gradient events of a loop body: backward
passes, optimizer steps, gradient resets, and calls it cannot see into. Helpers defined in
the same file are followed: functions and closures in scope, methods of the enclosing class
(`self.train_step(batch)`) and closures handed to `optimizer.step(closure)`. Every result is
memoised in `model.memo`, so a function is scanned once however many loops call it.
"""
from __future__ import annotations

import builtins
import re
from dataclasses import dataclass, replace
from enum import Enum
from typing import TYPE_CHECKING

import libcst as cst

from nnlint.analysis.api import EXTERNAL_PACKAGES
from nnlint.analysis.api.loops import (
    ACCUMULATING_PACKAGES, BACKWARD_METHODS, BACKWARD_RUNNERS, DETACHING_ATTRIBUTES,
    DETACHING_BUILTINS, DETACHING_METHODS, GRAD_CLEARING_METHODS, GRAD_DISABLING_CONTEXTS,
    GRAD_SCALERS, GRAD_SWITCH_CONTEXT, NOT_OPTIMIZER_PREFIXES, NUMBER_REDUCING_BUILTINS,
    NUMBER_SINK_BUILTINS, OPTIMIZER_PREFIX, RESET_METHODS, RESET_WORDS,
)
from nnlint.analysis.names import dotted_name

if TYPE_CHECKING:
    from nnlint.analysis.model import ClassInfo, ModuleModel

#: how deep the scan follows call chains and arguments inside one statement's value
MAX_EXPRESSION_DEPTH = 8  # common practice: `scaler.scale(loss / k).backward()` is depth 3

_BUILTINS = frozenset(dir(builtins))


class EventKind(Enum):
    BACKWARD = "backward"
    STEP = "step"
    RESET = "reset"
    #: a call the scan cannot see into (imported from the tree, a method of an unknown object)
    OPAQUE = "opaque"


class Role(Enum):
    """What a receiver of `.step()` is."""

    OPTIMIZER = "optimizer"
    SCALER = "scaler"
    OTHER = "other"


@dataclass(frozen=True, eq=False)
class Event:
    """One gradient-relevant call in a training iteration."""

    kind: EventKind
    #: the call (an Assign for `param.grad = None`, an Attribute for an uncalled zero_grad)
    node: cst.CSTNode
    #: the function whose body holds the call (None: module level)
    function: cst.FunctionDef | None
    #: True when it may not run in every iteration (a branch, a handler, a nested loop)
    conditional: bool = False
    #: True when it sits in a loop nested inside the scanned body (or in a helper's loop)
    nested: bool = False
    #: True when the call's result is thrown away (an expression statement)
    discarded: bool = False
    #: the optimizer a step applies or a reset clears; None when not an optimizer
    target: cst.BaseExpression | None = None

    @property
    def callee(self) -> str:
        """The last name of the called function or method ('' when there is none)."""
        if isinstance(self.node, cst.Call):
            return _callee_name(self.node.func) or ""
        return ""


@dataclass(frozen=True)
class Iteration:
    """The events of one pass through a loop body, in source order."""

    events: tuple[Event, ...]
    #: names assigned anywhere in the body (not in helpers)
    assigned: frozenset[str]

    def of_kind(self, kind: EventKind) -> list[Event]:
        return [event for event in self.events if event.kind is kind]


def uses_accumulating_framework(model: "ModuleModel") -> bool:
    """True when the file imports a framework whose backward() adds into `.grad`."""
    return any(module.lstrip(".").split(".")[0] in ACCUMULATING_PACKAGES
               for module in model.names.imported_modules)


def iteration(model: "ModuleModel", loop: cst.For | cst.While,
              function: cst.FunctionDef | None) -> Iteration:
    """The gradient events of one pass through `loop`, which sits in `function`."""
    memo = model.memo.setdefault("loops.iteration", {})
    found = memo.get(id(loop))
    if found is None:
        scanner = _Scanner(model)
        events: list[Event] = []
        scanner.block(loop.body, function, False, False, events)
        found = Iteration(tuple(events), frozenset(scanner.assigned))
        memo[id(loop)] = found
    return found


def function_events(model: "ModuleModel", function: cst.FunctionDef | None) -> tuple[Event, ...]:
    """The gradient events of a whole function body (the module's top level for None)."""
    return _Scanner(model).function(function)


def step_role(model: "ModuleModel", receiver: cst.BaseExpression,
              function: cst.FunctionDef | None) -> Role | None:
    """What the receiver of a `.step()` call is; None when nothing says."""
    while isinstance(receiver, cst.Subscript):
        receiver = receiver.value
    roles = {_role_of_value(model, value) for value in bound_values(model, receiver, function)}
    if len(roles) == 1 and None not in roles:
        return roles.pop()
    if isinstance(receiver, cst.Call):
        receiver = receiver.func
    name = _callee_name(receiver)
    return _role_by_name(name) if name else None


def bound_values(model: "ModuleModel", expr: cst.BaseExpression,
                 function: cst.FunctionDef | None) -> list[cst.BaseExpression]:
    """The values assigned to a name or to `self.attr`, seen from `function`."""
    if isinstance(expr, cst.Name):
        found = model.lookup(expr.value, model.scope_of(function))
        if found is None:
            return []
        return [binding.value for binding in found[1]
                if binding.value is not None and binding.augmented is None]
    if (isinstance(expr, cst.Attribute) and isinstance(expr.value, cst.Name)
            and function is not None and expr.value.value == first_parameter(function)):
        info = model.class_of_method(function)
        if info is None:
            return []
        return [binding.value for binding, _ in info.attributes.get(expr.attr.value, [])
                if binding.value is not None and binding.augmented is None]
    return []


def first_parameter(function: cst.FunctionDef) -> str | None:
    params = (*function.params.posonly_params, *function.params.params)
    return params[0].name.value if params else None


def is_grad_disabling(model: "ModuleModel", item: cst.WithItem) -> bool:
    """True for `with torch.no_grad():`, `inference_mode()`, `set_grad_enabled(False)`."""
    call = item.item
    if not isinstance(call, cst.Call):
        return False
    names = model.resolve(call.func)
    if names and names <= GRAD_DISABLING_CONTEXTS:
        return True
    if names == {GRAD_SWITCH_CONTEXT} and call.args:
        flag = call.args[0].value
        return isinstance(flag, cst.Name) and flag.value == "False"
    return False


# -- running totals (what a loss total holds) ------------------------------------------------
def graph_carrier(expr: cst.BaseExpression) -> cst.Name | None:
    """The name whose tensor `expr` passes on with its autograd history, if any.

    `loss`, `loss * batch_size`, `loss.mean()` pass `loss` on; `loss.item()`,
    `loss.detach()`, `float(loss)`, `loss.data` do not (None).
    """
    for _ in range(MAX_EXPRESSION_DEPTH):
        if isinstance(expr, cst.Name):
            return expr
        if isinstance(expr, cst.BinaryOperation):
            left = graph_carrier(expr.left)
            return left if left is not None else graph_carrier(expr.right)
        if isinstance(expr, cst.UnaryOperation):
            expr = expr.expression
        elif isinstance(expr, cst.Call) and isinstance(expr.func, cst.Attribute):
            # only methods known to keep the history pass it on (`.item()` does not)
            if expr.func.attr.value not in _HISTORY_KEEPING_METHODS:
                return None
            expr = expr.func.value
        else:
            return None
    return None


#: tensor methods whose result keeps its input's autograd history (common practice)
_HISTORY_KEEPING_METHODS = frozenset({"mean", "sum", "clone", "float", "double", "to", "cpu",
                                      "cuda", "squeeze", "view", "reshape"})


def is_detaching_value(expr: cst.BaseExpression) -> bool:
    """True when `expr` is `x.item()`, `x.detach()...`, `float(x)`, `x.data` and the like."""
    for _ in range(MAX_EXPRESSION_DEPTH):
        if isinstance(expr, cst.Call):
            func = expr.func
            if isinstance(func, cst.Name):
                return func.value in DETACHING_BUILTINS
            if not isinstance(func, cst.Attribute):
                return False
            if func.attr.value in DETACHING_METHODS:
                return True
            expr = func.value
        elif isinstance(expr, cst.Attribute):
            if expr.attr.value in DETACHING_ATTRIBUTES:
                return True
            expr = expr.value
        else:
            return False
    return False


def mentioned_names(expr: cst.BaseExpression, depth: int = 0) -> set[str]:
    """Dotted names read by `expr` (`torch.stack(self.losses).sum()` reads `self.losses`)."""
    if depth > MAX_EXPRESSION_DEPTH:
        return set()
    written = dotted_name(expr)
    if written is not None:
        # `self.losses` also reads `self`; a total matches by its full dotted name
        parts = written.split(".")
        return {".".join(parts[:end]) for end in range(1, len(parts) + 1)}
    found: set[str] = set()
    children: list[cst.BaseExpression] = []
    if isinstance(expr, cst.Call):
        func = expr.func
        # the receiver of a method call is read; the method's name is not a value
        receiver = func.value if isinstance(func, cst.Attribute) else func
        children = [receiver, *(arg.value for arg in expr.args)]
    elif isinstance(expr, (cst.Attribute, cst.Subscript)):
        children = [expr.value]
    elif isinstance(expr, cst.BinaryOperation):
        children = [expr.left, expr.right]
    elif isinstance(expr, cst.UnaryOperation):
        children = [expr.expression]
    elif isinstance(expr, (cst.Tuple, cst.List)):
        children = [element.value for element in expr.elements]
    for child in children:
        found |= mentioned_names(child, depth + 1)
    return found


def backward_inputs(model: "ModuleModel", events: tuple[Event, ...] | list[Event],
                    function: cst.FunctionDef | None) -> set[str]:
    """Names whose values reach a backward() of `events` in `function`, one assignment deep.

    `loss = ce + kl; loss.backward()` gives {loss, ce, kl}.
    """
    direct: set[str] = set()
    for event in events:
        if event.kind is EventKind.BACKWARD and event.function is function:
            direct |= mentioned_names(event.node)
    reached = set(direct)
    for name in direct:
        if "." in name:
            continue
        for value in bound_values(model, cst.Name(name), function):
            reached |= mentioned_names(value)
    return reached


# -- the scan ----------------------------------------------------------------------------------
class _Scanner:
    def __init__(self, model: "ModuleModel") -> None:
        self.model = model
        self.assigned: set[str] = set()
        self._memo = model.memo.setdefault("loops.function", {})

    def function(self, function: cst.FunctionDef | None) -> tuple[Event, ...]:
        key = id(function) if function is not None else id(self.model.module)
        if key in self._memo:
            return self._memo[key]
        self._memo[key] = ()  # a call cycle sees the function as doing nothing
        events: list[Event] = []
        scanner = _Scanner(self.model)
        if function is None:
            scanner.statements(self.model.module.body, None, False, False, events)
        else:
            scanner.block(function.body, function, False, False, events)
        self._memo[key] = tuple(events)
        return self._memo[key]

    def block(self, block: cst.BaseSuite, function: cst.FunctionDef | None,
              conditional: bool, nested: bool, out: list[Event]) -> None:
        if isinstance(block, cst.IndentedBlock):
            self.statements(block.body, function, conditional, nested, out)
        elif isinstance(block, cst.SimpleStatementSuite):
            for small in block.body:
                self.small(small, function, conditional, nested, out)

    def statements(self, body, function, conditional: bool, nested: bool,
                   out: list[Event]) -> None:
        for statement in body:
            self.statement(statement, function, conditional, nested, out)

    def statement(self, statement: cst.CSTNode, function, conditional: bool, nested: bool,
                  out: list[Event]) -> None:
        if isinstance(statement, cst.SimpleStatementLine):
            for small in statement.body:
                self.small(small, function, conditional, nested, out)
        elif isinstance(statement, cst.If):
            self.block(statement.body, function, True, nested, out)
            if statement.orelse is not None:
                self.statement(statement.orelse, function, True, nested, out)
        elif isinstance(statement, cst.Else):
            self.block(statement.body, function, True, nested, out)
        elif isinstance(statement, (cst.For, cst.While)):
            if isinstance(statement, cst.For):
                self._assign_targets(statement.target)
            self.block(statement.body, function, True, True, out)
            if statement.orelse is not None:
                self.block(statement.orelse.body, function, True, nested, out)
        elif isinstance(statement, cst.With):
            self.block(statement.body, function, conditional, nested, out)
        elif isinstance(statement, (cst.Try, cst.TryStar)):
            self.block(statement.body, function, conditional, nested, out)
            for handler in statement.handlers:
                self.block(handler.body, function, True, nested, out)
            if statement.orelse is not None:
                self.block(statement.orelse.body, function, True, nested, out)
            if statement.finalbody is not None:
                self.block(statement.finalbody.body, function, conditional, nested, out)
        elif isinstance(statement, cst.Match):
            for case in statement.cases:
                self.block(case.body, function, True, nested, out)

    def small(self, small: cst.BaseSmallStatement, function, conditional: bool, nested: bool,
              out: list[Event]) -> None:
        flags = (function, conditional, nested)
        if isinstance(small, cst.Expr):
            value = small.value
            if isinstance(value, cst.Attribute) and value.attr.value in RESET_METHODS:
                # `optimizer.zero_grad` without the call: NNL403's finding, not a missing reset
                out.append(Event(EventKind.RESET, value, *flags, target=value.value))
            else:
                self.expression(value, flags, out, 0, discarded=True)
        elif isinstance(small, cst.Assign):
            for target in small.targets:
                self._assign_targets(target.target)
                if isinstance(target.target, cst.Attribute) and target.target.attr.value == "grad":
                    out.append(Event(EventKind.RESET, small, *flags))
            self.expression(small.value, flags, out, 0)
        elif isinstance(small, (cst.AugAssign, cst.AnnAssign, cst.Return)):
            if isinstance(small, cst.AnnAssign):
                self._assign_targets(small.target)
            if small.value is not None:
                self.expression(small.value, flags, out, 0)

    def _assign_targets(self, target: cst.BaseExpression) -> None:
        if isinstance(target, cst.Name):
            self.assigned.add(target.value)
        elif isinstance(target, (cst.Tuple, cst.List)):
            for element in target.elements:
                self._assign_targets(element.value)
        elif isinstance(target, cst.StarredElement):
            self._assign_targets(target.value)

    def expression(self, expr: cst.BaseExpression, flags: tuple, out: list[Event],
                   depth: int, discarded: bool = False) -> None:
        if depth > MAX_EXPRESSION_DEPTH:
            return
        if isinstance(expr, cst.Call):
            self.call(expr, flags, out, depth, discarded)
        elif isinstance(expr, (cst.Attribute, cst.Subscript)):
            self.expression(expr.value, flags, out, depth + 1)
        elif isinstance(expr, cst.BinaryOperation):
            self.expression(expr.left, flags, out, depth + 1)
            self.expression(expr.right, flags, out, depth + 1)
        elif isinstance(expr, cst.UnaryOperation):
            self.expression(expr.expression, flags, out, depth + 1)
        elif isinstance(expr, cst.Await):
            self.expression(expr.expression, flags, out, depth + 1, discarded)
        elif isinstance(expr, (cst.Tuple, cst.List)):
            for element in expr.elements:
                self.expression(element.value, flags, out, depth + 1)

    def call(self, call: cst.Call, flags: tuple, out: list[Event], depth: int,
             discarded: bool) -> None:
        function = flags[0]
        func = call.func
        if isinstance(func, cst.Attribute):
            self.expression(func.value, flags, out, depth + 1)
        method = func.attr.value if isinstance(func, cst.Attribute) else None
        for arg in call.args:
            if method == "step":
                self._closure(arg.value, flags, out)
            self.expression(arg.value, flags, out, depth + 1)
        event = self._classify(call, method, function)
        if event is not None:
            if event[0] is EventKind.STEP:
                custom = self._local_step(call.func.value, function)  # type: ignore
                if custom is not None:  # a hand-written optimizer: what its step() does
                    out.extend(_inlined(self.function(custom), flags))
            out.append(Event(event[0], call, *flags, discarded=discarded, target=event[1]))
            return
        if method is None and not isinstance(func, cst.Name):
            return
        helper = self._helper(func, function)
        if helper is not None:
            out.extend(_inlined(self.function(helper), flags))
            return
        if self._is_known_call(func):
            return
        out.append(Event(EventKind.OPAQUE, call, *flags, discarded=discarded))

    def _classify(self, call: cst.Call, method: str | None,
                  function) -> tuple[EventKind, cst.BaseExpression | None] | None:
        if method is None:
            return None
        receiver = call.func.value  # type: ignore[union-attr]
        if method in BACKWARD_METHODS:
            return EventKind.BACKWARD, None
        if method in RESET_METHODS:
            return EventKind.RESET, receiver
        if method in GRAD_CLEARING_METHODS and _is_grad_tensor(receiver):
            return EventKind.RESET, None
        if method == "step":
            role = step_role(self.model, receiver, function)
            if role is Role.OPTIMIZER:
                return EventKind.STEP, receiver
            if role is Role.SCALER and call.args:
                return EventKind.STEP, call.args[0].value
        return None

    def _closure(self, arg: cst.BaseExpression, flags: tuple, out: list[Event]) -> None:
        """A closure given to `optimizer.step(closure)` runs inside the step, before it."""
        if isinstance(arg, cst.Name):
            helper = self._helper(arg, flags[0])
            if helper is not None:
                out.extend(_inlined(self.function(helper), flags))
        elif isinstance(arg, cst.Lambda):
            self.expression(arg.body, flags, out, 1)

    def _helper(self, func: cst.BaseExpression, function) -> cst.FunctionDef | None:
        """The function of this file that `func(...)` runs, when it is certain."""
        model = self.model
        if isinstance(func, cst.Name):
            found = model.lookup(func.value, model.scope_of(function))
            if found is None or len(found[1]) != 1:
                return None
            statement = found[1][0].statement
            if isinstance(statement, cst.FunctionDef) and statement.name.value == func.value:
                return statement
            return None
        if (isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name)
                and function is not None and func.value.value == first_parameter(function)):
            info = model.class_of_method(function)
            if info is not None:
                return _method(model, info, func.attr.value, set())
        return None

    def _local_step(self, receiver: cst.BaseExpression, function) -> cst.FunctionDef | None:
        """The `step` method of the class of this file that `receiver` is an instance of."""
        values = bound_values(self.model, receiver, function)
        classes = {value.func.value for value in values
                   if isinstance(value, cst.Call) and isinstance(value.func, cst.Name)}
        if len(classes) != 1 or len(values) != 1:
            return None
        info = self.model.classes.get(classes.pop())
        return _method(self.model, info, "step", set()) if info is not None else None

    def _is_known_call(self, func: cst.BaseExpression) -> bool:
        """True for builtins and functions of installed libraries (they reset nothing)."""
        names = self.model.resolve(func)
        if names:
            return all(name.split(".")[0] in EXTERNAL_PACKAGES for name in names)
        return isinstance(func, cst.Name) and func.value in _BUILTINS and \
            self.model.lookup(func.value, self.model.module_scope) is None


def _inlined(events: tuple[Event, ...], flags: tuple) -> list[Event]:
    _, conditional, nested = flags
    if not conditional and not nested:
        return list(events)
    return [replace(event, conditional=event.conditional or conditional,
                    nested=event.nested or nested) for event in events]


def _method(model: "ModuleModel", info: "ClassInfo", name: str,
            seen: set[str]) -> cst.FunctionDef | None:
    if name in info.methods:
        return info.methods[name]
    seen.add(info.name)
    for base in info.bases:
        local = model.classes.get(base)
        if local is not None and local.name not in seen:
            found = _method(model, local, name, seen)
            if found is not None:
                return found
    return None


def _is_grad_tensor(expr: cst.BaseExpression) -> bool:
    """`param.grad` or `param.grad.data`."""
    if isinstance(expr, cst.Attribute) and expr.attr.value in DETACHING_ATTRIBUTES:
        expr = expr.value
    return isinstance(expr, cst.Attribute) and expr.attr.value == "grad"


def _callee_name(func: cst.BaseExpression) -> str | None:
    if isinstance(func, cst.Attribute):
        return func.attr.value
    if isinstance(func, cst.Name):
        return func.value
    return None


def _role_of_value(model: "ModuleModel", value: cst.BaseExpression) -> Role | None:
    if not isinstance(value, cst.Call):
        return None
    names = model.resolve(value.func)
    if not names:
        return None
    if all(name.startswith(OPTIMIZER_PREFIX) and not name.startswith(NOT_OPTIMIZER_PREFIXES)
           for name in names):
        return Role.OPTIMIZER
    if names <= GRAD_SCALERS:
        return Role.SCALER
    if all(name.split(".")[0] in EXTERNAL_PACKAGES for name in names):
        return Role.OTHER
    return None


#: `opt`, `opt_g`, `d_opt`, `optD`, `opt2` (common practice for optimizer variables)
_OPTIMIZER_NAME = re.compile(r"(?:[a-z0-9]*_)?opt(?:_[a-z0-9]*|[a-z]?\d*)")


def _role_by_name(name: str) -> Role | None:
    lowered = name.lower()
    if "sched" in lowered:
        return Role.OTHER
    if "scaler" in lowered:
        return Role.SCALER
    if "optim" in lowered or _OPTIMIZER_NAME.fullmatch(lowered):
        return Role.OPTIMIZER
    return None


def may_reset(event: Event, optimizers: set[str], model: "ModuleModel") -> bool:
    """True when an opaque call might reset gradients itself (we cannot see inside)."""
    if event.kind is not EventKind.OPAQUE:
        return False
    callee = event.callee.lower()
    if any(word in callee for word in RESET_WORDS):
        return True
    node = event.node
    if isinstance(node, cst.Call):
        given = {model.module.code_for_node(arg.value) for arg in node.args}
        return bool(given & optimizers)
    return False


def may_backward(event: Event) -> bool:
    """True when an opaque call might run a backward pass itself."""
    if event.kind is not EventKind.OPAQUE:
        return False
    return event.discarded or "backward" in event.callee.lower()


# -- running totals that `nnlint fix` may turn into Python numbers -------------------------------
#: what a running total starts as: a Python number (`0.0`) or an empty list (`[]`)
NUMBER_TOTAL = "number"
LIST_TOTAL = "list"
#: a name computed from number totals by arithmetic (`average = total / len(loader)`)
DERIVED_TOTAL = "derived"


def number_totals(model: "ModuleModel", function: cst.FunctionDef | None) -> dict[str, str]:
    """Names of `function`'s own scope that only ever hold a running total of numbers.

    Every binding is a number literal (`total = 0.0`), an addition to the name itself
    (`total += x`, `total = total + x`), or for a list an empty list (`seen = []`).
    Name -> NUMBER_TOTAL or LIST_TOTAL; names computed from number totals by arithmetic
    alone (`average = total / len(loader)`) are DERIVED_TOTAL.
    """
    memo = model.memo.setdefault("loops.number_totals", {})
    scope = model.scope_of(function)
    found = memo.get(id(scope))
    if found is None:
        found = {}
        for name, bindings in scope.bindings.items():
            if name in scope.outer_names or name in scope.parameters:
                continue
            kinds = {_total_kind(name, binding) for binding in bindings}
            if len(kinds) == 1 and None not in kinds:
                found[name] = kinds.pop()
        for name, bindings in scope.bindings.items():
            if name not in found and name not in scope.outer_names and \
                    name not in scope.parameters and bindings and all(
                        binding.augmented is None and binding.index is None
                        and _is_arithmetic_of_totals(binding.value, found)
                        for binding in bindings):
                found[name] = DERIVED_TOTAL
        memo[id(scope)] = found
    return found


def _is_arithmetic_of_totals(expr: cst.BaseExpression | None, totals: dict[str, str],
                             depth: int = 0) -> bool:
    """`total / len(loader)`, `-total`: arithmetic whose only names are number totals."""
    if depth > MAX_EXPRESSION_DEPTH or expr is None:
        return False
    if isinstance(expr, cst.BinaryOperation) and not isinstance(expr.operator,
                                                                cst.MatrixMultiply):
        return _is_arithmetic_of_totals(expr.left, totals, depth + 1) and \
            _is_arithmetic_of_totals(expr.right, totals, depth + 1) and \
            _mentions_total(expr, totals)
    if isinstance(expr, cst.UnaryOperation):
        return _is_arithmetic_of_totals(expr.expression, totals, depth + 1)
    if isinstance(expr, cst.Name):
        return totals.get(expr.value) == NUMBER_TOTAL
    if isinstance(expr, (cst.Integer, cst.Float)):
        return True
    # `len(loader)` is a count (the call is judged as a builtin where the total is read)
    return isinstance(expr, cst.Call) and isinstance(expr.func, cst.Name) and \
        expr.func.value == "len"


def _mentions_total(expr: cst.BaseExpression, totals: dict[str, str]) -> bool:
    return any(totals.get(name) == NUMBER_TOTAL for name in mentioned_names(expr))


def _total_kind(name: str, binding) -> str | None:
    value = binding.value
    if binding.augmented is not None:
        return NUMBER_TOTAL if isinstance(binding.augmented, cst.AddAssign) else None
    if isinstance(value, (cst.Integer, cst.Float)):
        return NUMBER_TOTAL
    if isinstance(value, cst.List) and not value.elements:
        return LIST_TOTAL
    if isinstance(value, cst.BinaryOperation) and isinstance(value.operator, cst.Add) and any(
            isinstance(side, cst.Name) and side.value == name
            for side in (value.left, value.right)):
        return NUMBER_TOTAL
    return None


def reads_as_number(model: "ModuleModel", name: cst.Name, ancestors: list[cst.CSTNode],
                    kind: str, scope) -> bool | str:
    """True when this read of a total would behave the same if it held Python floats.

    Climbs from the name through arithmetic (and, for lists, indexing and sum/min/max) to
    what consumes the value: an f-string, print/str/float/len, a comparison, the total's own
    accumulation, or an expression statement. A number total assigned by arithmetic to
    another name gives that name (str): its own reads decide. Anything else (a return, a
    method call, a torch function) may need the tensor: False.
    """
    current: cst.CSTNode = name
    for depth, ancestor in enumerate(reversed(ancestors)):
        if depth > MAX_EXPRESSION_DEPTH:
            return False
        if isinstance(ancestor, cst.BinaryOperation):
            if isinstance(ancestor.operator, cst.MatrixMultiply):
                return False
        elif isinstance(ancestor, cst.UnaryOperation):
            pass
        elif isinstance(ancestor, (cst.Comparison, cst.ComparisonTarget,
                                   cst.FormattedStringExpression, cst.Expr)):
            return True
        elif isinstance(ancestor, cst.Arg):
            if ancestor.star or ancestor.value is not current:
                return False
        elif isinstance(ancestor, cst.Call):
            builtin = _builtin_name(model, ancestor.func, scope)
            if builtin in NUMBER_SINK_BUILTINS:
                return True
            if builtin not in NUMBER_REDUCING_BUILTINS:
                return False
        elif isinstance(ancestor, cst.Subscript) and kind == LIST_TOTAL and \
                ancestor.value is current:
            pass
        elif isinstance(ancestor, cst.Attribute) and kind == LIST_TOTAL and \
                ancestor.value is current:
            return ancestor.attr.value == "append"
        elif isinstance(ancestor, cst.Assign):
            if ancestor.value is not current:
                return False
            if _is_accumulation(ancestor, name.value):
                return True
            targets = ancestor.targets
            if kind == NUMBER_TOTAL and len(targets) == 1 and \
                    isinstance(targets[0].target, cst.Name):
                return targets[0].target.value  # `average = total / n`: judged by its reads
            return False
        else:
            return False
        current = ancestor
    return False


def _is_accumulation(statement: cst.Assign, name: str) -> bool:
    """`total = total + x`: the read feeds the total's own running sum."""
    return len(statement.targets) == 1 and isinstance(statement.targets[0].target, cst.Name) \
        and statement.targets[0].target.value == name \
        and isinstance(statement.value, cst.BinaryOperation) \
        and isinstance(statement.value.operator, cst.Add)


def _builtin_name(model: "ModuleModel", func: cst.BaseExpression, scope) -> str | None:
    if not isinstance(func, cst.Name) or func.value not in _BUILTINS:
        return None
    if model.lookup(func.value, scope) is not None or model.resolve(func):
        return None  # rebound or imported under a builtin's name
    return func.value


def is_scalar_loss(model: "ModuleModel", loss: cst.Name, events: list[Event],
                   function: cst.FunctionDef | None) -> bool:
    """True when some backward() of `events` runs on `loss` itself with no gradient argument.

    PyTorch raises "grad can be implicitly created only for scalar outputs" otherwise
    (torch.autograd.backward), so such a loss holds one element and `.item()` works.
    `loss.backward()`, `scaler.scale(loss).backward()` (a GradScaler keeps the shape) and
    `accelerator.backward(loss)` / `self.manual_backward(loss)` count.
    """
    for event in events:
        call = event.node
        if event.kind is not EventKind.BACKWARD or not isinstance(call, cst.Call) or \
                not isinstance(call.func, cst.Attribute):
            continue
        receiver = call.func.value
        positional = [arg for arg in call.args if arg.keyword is None]
        if any(arg.star for arg in call.args):
            continue
        if not positional and not any(arg.keyword.value == "gradient" for arg in call.args):
            if _is_name(receiver, loss.value):
                return True
            if (isinstance(receiver, cst.Call) and isinstance(receiver.func, cst.Attribute)
                    and receiver.func.attr.value == "scale" and len(receiver.args) == 1
                    and not receiver.args[0].keyword and not receiver.args[0].star
                    and _is_name(receiver.args[0].value, loss.value)
                    and step_role(model, receiver.func.value, function) is Role.SCALER):
                return True
        elif len(positional) == 1 and len(call.args) == 1 and \
                _is_name(positional[0].value, loss.value) and \
                _runs_backward_of_argument(model, call.func, function):
            return True
    return False


def _runs_backward_of_argument(model: "ModuleModel", func: cst.Attribute,
                               function: cst.FunctionDef | None) -> bool:
    """`self.manual_backward(loss)`, `torch.autograd.backward(loss)`, `accelerator.backward(loss)`.

    On a tensor, `out.backward(loss)` would pass `loss` as the gradient instead.
    """
    if func.attr.value == "manual_backward":
        return True
    if model.canonical(func) == "torch.autograd.backward":
        return True
    values = bound_values(model, func.value, function)
    return bool(values) and all(
        isinstance(value, cst.Call) and model.canonical(value.func) in BACKWARD_RUNNERS
        for value in values)


def _is_name(expr: cst.BaseExpression, name: str) -> bool:
    return isinstance(expr, cst.Name) and expr.value == name
