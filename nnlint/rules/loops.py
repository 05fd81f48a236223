"""Training-loop rules (NNL6xx)."""
from __future__ import annotations

import libcst as cst

from nnlint.analysis.loops import (
    Event, EventKind, Iteration, Role, backward_inputs, bound_values, function_events,
    graph_carrier, is_detaching_value, is_grad_disabling, iteration, may_backward, may_reset,
    step_role, uses_accumulating_framework,
)
from nnlint.analysis.names import dotted_name
from nnlint.finding import Severity
from nnlint.rules.base import Rule, register

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
    references = (
        "PyTorch documentation, Frequently Asked Questions: 'Don't accumulate history across "
        "your training loop'",
    )

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
        self.report(node, statement=self.model.module.code_for_node(node).strip(),
                    loss=loss.value)
