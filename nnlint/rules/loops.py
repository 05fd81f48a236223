"""Training-loop rules (NNL6xx)."""
from __future__ import annotations

import libcst as cst

from nnlint.analysis.api.loops import NON_TORCH_TENSOR_PACKAGES, SCALAR_PRESERVING_METHODS
from nnlint.analysis.call_edits import with_method_call
from nnlint.analysis.loops import (
    DERIVED_TOTAL, LIST_TOTAL, NUMBER_TOTAL, Event, EventKind, Iteration, Role,
    backward_inputs, bound_values, function_events, graph_carrier, is_detaching_value,
    is_grad_disabling, is_scalar_loss, iteration, may_backward, may_reset, number_totals,
    reads_as_number, step_role, uses_accumulating_framework,
)
from nnlint.analysis.names import dotted_name
from nnlint.finding import Severity
from nnlint.rules.base import Fix, Rule, register

_LOOPS = (cst.For, cst.While)
_SCOPES = (cst.FunctionDef, cst.ClassDef, cst.Lambda)


class _LoopRule(Rule):
    """Shared plumbing: the iteration of each loop of a PyTorch file."""

    def visit_For(self, node: cst.For) -> None:
        self._loop(node)

    def visit_While(self, node: cst.While) -> None:
        self._loop(node)

    def _loop(self, node: cst.For | cst.While) -> None:
        if not uses_accumulating_framework(self.model):
            return
        found = iteration(self.model, node, self.context.function)
        if found.of_kind(EventKind.STEP):
            self.check(found)

    def check(self, found: Iteration) -> None:
        raise NotImplementedError

    def source(self, node: cst.CSTNode) -> str:
        return self.model.module.code_for_node(node)


@register
class GradientsNeverReset(_LoopRule):
    code = "NNL601"
    name = "gradients-never-reset"
    severity = Severity.ERROR
    summary = "a loop calls backward() and an optimizer step but never resets the gradients"
    message = "`{step}` applies a running sum of gradients, never reset; call `{reset}`"
    rationale = (
        "PyTorch adds each backward() into `.grad` instead of overwriting it, so that "
        "gradients can be accumulated on purpose. In a loop that never calls `zero_grad()` "
        "(or sets `param.grad = None`), the step of iteration n applies g_1 + ... + g_n: "
        "after 100 iterations the update is about 100 times the intended size and points "
        "along the average of stale gradients; training diverges or stalls. Gradient "
        "accumulation that resets every k steps is correct and is not flagged, and neither "
        "is a reset done by a helper of the same file that the loop calls."
    )
    bad = ("optimizer = torch.optim.SGD(model.parameters(), lr=0.1)\n"
           "for crops, grades in loader:\n"
           "    loss = F.cross_entropy(model(crops), grades)\n"
           "    loss.backward()\n"
           "    optimizer.step()")
    good = ("optimizer = torch.optim.SGD(model.parameters(), lr=0.1)\n"
            "for crops, grades in loader:\n"
            "    optimizer.zero_grad()\n"
            "    loss = F.cross_entropy(model(crops), grades)\n"
            "    loss.backward()\n"
            "    optimizer.step()")
    references = (
        "PyTorch documentation, torch.optim: 'How to use an optimizer' (zero_grad before "
        "backward)",
        "PyTorch documentation, torch.Tensor.backward: gradients are accumulated in leaves",
    )

    def check(self, found: Iteration) -> None:
        if found.of_kind(EventKind.RESET) or not found.of_kind(EventKind.BACKWARD):
            return
        steps = found.of_kind(EventKind.STEP)
        optimizers = {self.source(step.target) for step in steps if step.target is not None}
        if any(may_reset(event, optimizers, self.model) for event in found.events):
            return
        step = steps[0]
        target = step.target
        head = dotted_name(target).split(".")[0] if dotted_name(target) else None
        if head is not None and head in found.assigned:
            return  # a fresh optimizer (and model) every iteration has fresh gradients
        reset = f"{self.source(target)}.zero_grad()" if target is not None else "zero_grad()"
        self.report(step.node, step=self.source(step.node), reset=reset)


@register
class StepBeforeBackward(_LoopRule):
    code = "NNL603"
    name = "step-before-backward"
    severity = Severity.ERROR
    summary = "an optimizer step runs after the gradient reset and before backward()"
    message = "`{step}` sees only the gradients `{reset}` cleared; move it after backward()"
    rationale = (
        "Within one iteration the order must be reset, backward, step. A step placed "
        "between the reset and the backward (or before a backward that is followed by the "
        "reset at the end of the iteration) always sees the gradients just cleared: with "
        "`zero_grad()` (set_to_none=True by default since PyTorch 2.0) every `.grad` is None "
        "and the optimizer skips every parameter, so the model never learns; with zeros, "
        "only momentum and weight decay move it. The loss stays flat while the run looks "
        "healthy. A step at the top of the iteration that applies the previous backward "
        "(step, reset, backward) is correct and is not flagged."
    )
    bad = ("for crops, grades in loader:\n"
           "    optimizer.zero_grad()\n"
           "    loss = F.cross_entropy(model(crops), grades)\n"
           "    optimizer.step()\n"
           "    loss.backward()")
    good = ("for crops, grades in loader:\n"
            "    optimizer.zero_grad()\n"
            "    loss = F.cross_entropy(model(crops), grades)\n"
            "    loss.backward()\n"
            "    optimizer.step()")
    references = (
        "PyTorch documentation, torch.optim.Optimizer.zero_grad (set_to_none defaults to "
        "True) and torch.optim.Optimizer.step",
    )

    def check(self, found: Iteration) -> None:
        backwards = found.of_kind(EventKind.BACKWARD)
        if not backwards:
            return
        events = found.events
        steps = found.of_kind(EventKind.STEP)
        optimizers = {self.source(step.target) for step in steps if step.target is not None}
        for index, step in enumerate(events):
            if step.kind is not EventKind.STEP or step.nested:
                continue
            # Walk back from the step, wrapping to the end of the previous iteration.
            before = [*reversed(events[:index]), *reversed(events[index + 1:])]
            for other in before:
                if other.kind is EventKind.BACKWARD or may_backward(other):
                    break
                if other.kind is EventKind.RESET and self._clears(other, step, optimizers):
                    self.report(step.node, step=self.source(step.node),
                                reset=self.source(other.node))
                    break

    def _clears(self, reset: Event, step: Event, optimizers: set[str]) -> bool:
        """True when the reset certainly ran and cleared what the step applies."""
        if reset.conditional or not isinstance(reset.node, (cst.Call, cst.Assign)):
            return False
        if reset.target is None:
            return len(optimizers) == 1
        if step.target is not None and self.source(reset.target) == self.source(step.target):
            return True
        role = step_role(self.model, reset.target, reset.function)
        return role is not Role.OPTIMIZER and len(optimizers) == 1


@register
class LossHistoryKeepsGraph(Rule):
    code = "NNL602"
    name = "loss-history-keeps-graph"
    severity = Severity.WARNING
    summary = "a running loss total is accumulated as a tensor, keeping every step's graph alive"
    message = ("`{statement}` keeps every iteration's autograd graph of `{loss}`; "
               "add `{loss}.item()`")
    rationale = (
        "A loss tensor carries its autograd history (`grad_fn`). `total += loss` makes "
        "`total` a tensor whose history links to every iteration's loss, so nothing of those "
        "graphs can be freed until `total` dies: memory grows with each of the loop's "
        "iterations (one more node chain per step, measured with torch in "
        "tests/test_losses_references.py) and logging `total` later holds the whole epoch "
        "alive. `.item()`, `float()`, `.detach()` or `.cpu().numpy()` record the number "
        "without the history. A total that is itself backpropagated later is correct and is "
        "not flagged."
    )
    bad = ("epoch_loss = 0.0\n"
           "for crops, grades in loader:\n"
           "    optimizer.zero_grad()\n"
           "    loss = F.cross_entropy(model(crops), grades)\n"
           "    loss.backward()\n"
           "    optimizer.step()\n"
           "    epoch_loss += loss")
    good = ("epoch_loss = 0.0\n"
            "for crops, grades in loader:\n"
            "    optimizer.zero_grad()\n"
            "    loss = F.cross_entropy(model(crops), grades)\n"
            "    loss.backward()\n"
            "    optimizer.step()\n"
            "    epoch_loss += loss.item()")
    rewrite = ("adds `.item()` to a scalar loss summed into a number total (or appended to a "
               "list) that is only printed, compared or summed later")
    references = (
        "PyTorch documentation, Frequently Asked Questions: 'Don't accumulate history across "
        "your training loop'",
    )

    def __init__(self, model, context, sink) -> None:
        super().__init__(model, context, sink)
        #: findings whose fix waits for every read of their total (decided in leave_Module)
        self._pending: list[tuple[cst.CSTNode, dict, tuple[int, str] | None, Fix | None]] = []
        #: (id of scope, total name) read somewhere in a way that may need the tensor
        self._tensor_reads: set[tuple[int, str]] = set()
        #: names that are running totals of numbers in some scope seen so far (a cheap filter)
        self._total_names: set[str] = set()
        #: (id of scope, total name) -> names its value is assigned to by arithmetic
        self._flows: dict[tuple[int, str], set[str]] = {}
        #: id of scope -> its number totals (see number_totals)
        self._scope_totals: dict[int, dict[str, str]] = {}

    def visit_Module(self, node: cst.Module) -> None:
        self._totals_of(None)

    def visit_FunctionDef(self, node: cst.FunctionDef) -> None:
        self._totals_of(node)

    def _totals_of(self, function: cst.FunctionDef | None) -> None:
        totals = number_totals(self.model, function)
        self._scope_totals[id(self.model.scope_of(function))] = totals
        self._total_names |= set(totals)

    def visit_Name(self, node: cst.Name) -> None:
        if node.value not in self._total_names or not self._is_read(node):
            return
        found = self.model.lookup(node.value, self.model.scope_of(self.context.function))
        if found is None:
            return
        scope = found[0]
        kind = self._scope_totals.get(id(scope), {}).get(node.value)
        if kind is None:
            return
        verdict = reads_as_number(self.model, node, self.context.ancestors, kind,
                                  self.model.scope_of(self.context.function))
        if isinstance(verdict, str):
            self._flows.setdefault((id(scope), node.value), set()).add(verdict)
        elif not verdict:
            self._tensor_reads.add((id(scope), node.value))

    def _is_read(self, node: cst.Name) -> bool:
        """False where the name is a binding or not a variable (`x.total`, `f(total=1)`)."""
        parent = self.context.parent
        if isinstance(parent, (cst.AssignTarget, cst.Param, cst.FunctionDef, cst.ClassDef,
                               cst.ImportAlias, cst.AsName, cst.NameItem)):
            return False
        if isinstance(parent, (cst.For, cst.CompFor)):
            return parent.target is not node
        if isinstance(parent, cst.Attribute):
            return parent.attr is not node
        if isinstance(parent, cst.Arg):
            return parent.keyword is not node
        if isinstance(parent, (cst.AnnAssign, cst.AugAssign)):
            return parent.target is not node  # an accumulation is judged by number_totals
        return True

    def leave_Module(self, node: cst.Module) -> None:
        for reported, fields, total, fix in self._pending:
            if total is None or not self._reads_as_number(total):
                fix = None
            self.report(reported, autofix=fix, **fields)

    def _reads_as_number(self, total: tuple[int, str]) -> bool:
        """No read of the total, or of a name computed from it, may need the tensor."""
        scope, _ = total
        derived = self._flows.get(total, set())
        kinds = {self._scope_totals.get(scope, {}).get(name) for name in derived}
        return total not in self._tensor_reads and kinds <= {DERIVED_TOTAL} and not any(
            (scope, name) in self._tensor_reads or (scope, name) in self._flows
            for name in derived)

    def visit_AugAssign(self, node: cst.AugAssign) -> None:
        if isinstance(node.operator, cst.AddAssign):
            self._check(node, node.target, node.value)

    def visit_Assign(self, node: cst.Assign) -> None:
        value = node.value
        if len(node.targets) != 1 or not isinstance(value, cst.BinaryOperation):
            return
        if not isinstance(value.operator, cst.Add):
            return
        total = dotted_name(node.targets[0].target)
        if total is not None and dotted_name(value.left) == total:
            self._check(node, node.targets[0].target, value.right)
        elif total is not None and dotted_name(value.right) == total:
            self._check(node, node.targets[0].target, value.left)

    def visit_Call(self, node: cst.Call) -> None:
        func = node.func
        if not isinstance(func, cst.Attribute) or func.attr.value != "append":
            return
        if len(node.args) != 1 or not isinstance(self.context.parent, cst.Expr):
            return
        self._check(node, func.value, node.args[0].value)

    def _check(self, node: cst.CSTNode, total: cst.BaseExpression,
               value: cst.BaseExpression) -> None:
        loss = graph_carrier(value)
        if loss is None:
            return
        loop = next(iter(self.context.enclosing((*_LOOPS, *_SCOPES))), None)
        if not isinstance(loop, _LOOPS) or not uses_accumulating_framework(self.model):
            return
        for block in self.context.enclosing(cst.With):
            if any(is_grad_disabling(self.model, item) for item in block.items):
                return
        function = self.context.function
        events = [event for event in iteration(self.model, loop, function).events
                  if event.kind is EventKind.BACKWARD and not event.nested]
        if loss.value not in backward_inputs(self.model, events, function):
            return
        if any(is_detaching_value(bound) for bound in bound_values(self.model, loss, function)):
            return
        while isinstance(total, cst.Subscript):
            total = total.value
        key = dotted_name(total)
        if key is None:
            return
        backpropagated = backward_inputs(self.model, function_events(self.model, function),
                                         function)
        if any(name == key or name.startswith(key + ".") for name in backpropagated):
            return
        fields = {"statement": self.model.module.code_for_node(node).strip(),
                  "loss": loss.value}
        total_of_fix = self._total_of_fix(total, function)
        fix = None
        if total_of_fix is not None and is_scalar_loss(self.model, loss, events, function):
            fix = self._fix(value)
        self._pending.append((node, fields, total_of_fix, fix))

    def _total_of_fix(self, total: cst.BaseExpression,
                      function: cst.FunctionDef | None) -> tuple[int, str] | None:
        """(scope id, name) of a local running total of numbers that `.item()` may feed."""
        if not isinstance(total, cst.Name) or any(
                module.lstrip(".").split(".")[0] in NON_TORCH_TENSOR_PACKAGES
                for module in self.model.names.imported_modules):
            return None
        kind = number_totals(self.model, function).get(total.value)
        if kind not in (NUMBER_TOTAL, LIST_TOTAL):
            return None
        return id(self.model.scope_of(function)), total.value

    def _fix(self, value: cst.BaseExpression) -> Fix | None:
        """`value.item()` when `value` is the one-element loss, scaled by plain numbers."""
        if isinstance(value, cst.Name):
            return Fix(value, with_method_call(value, "item"))
        if isinstance(value, cst.Call) and isinstance(value.func, cst.Attribute) and \
                not value.args and value.func.attr.value in SCALAR_PRESERVING_METHODS and \
                isinstance(value.func.value, cst.Name):
            return Fix(value, with_method_call(value, "item"))
        if isinstance(value, cst.BinaryOperation) and isinstance(
                value.operator, (cst.Multiply, cst.Divide)):
            sides = (value.left, value.right)
            if any(isinstance(side, cst.Name) for side in sides) and all(
                    isinstance(side, cst.Name) or _is_plain_number(side) for side in sides) \
                    and not all(isinstance(side, cst.Name) for side in sides):
                return Fix(value, with_method_call(value, "item"))
        return None


def _is_plain_number(expr: cst.BaseExpression) -> bool:
    """A literal, `len(x)`, `x.size(0)` or `x.shape[0]`: a Python number, never a tensor."""
    if isinstance(expr, (cst.Integer, cst.Float)):
        return True
    if isinstance(expr, cst.Call) and len(expr.args) <= 1:
        func = expr.func
        if isinstance(func, cst.Name) and func.value == "len":
            return True
        if isinstance(func, cst.Attribute) and func.attr.value == "size" and \
                len(expr.args) == 1 and isinstance(expr.args[0].value, cst.Integer):
            return True
    if isinstance(expr, cst.Subscript) and isinstance(expr.value, cst.Attribute) and \
            expr.value.attr.value == "shape" and len(expr.slice) == 1:
        index = expr.slice[0].slice
        return isinstance(index, cst.Index) and isinstance(index.value, cst.Integer)
    return False
