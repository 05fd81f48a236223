"""Train/eval mode and training-step rules (NNL4xx)."""
from __future__ import annotations

import libcst as cst

from nnlint.analysis.api.modes import UNCALLED_METHOD_CONSEQUENCES
from nnlint.finding import Severity
from nnlint.rules.base import Fix, Rule, register


@register
class ModeSwitchNotCalled(Rule):
    code = "NNL403"
    name = "mode-switch-not-called"
    severity = Severity.ERROR
    summary = "a mode switch or training step is written without the call parentheses"
    message = "`{expression}` is only read, never called: {consequence}; write `{expression}()`"
    rationale = (
        "A statement that only names a bound method (`model.eval`) evaluates the attribute and "
        "throws it away: Python raises no error and nothing happens. The model stays in the "
        "mode it was in (dropout keeps dropping, batch norm keeps updating its running "
        "statistics during evaluation), gradients keep accumulating, or the optimizer never "
        "updates a parameter. The run looks normal and its numbers are wrong."
    )
    bad = "model.eval\nwith torch.no_grad():\n    scores = model(batch)"
    good = "model.eval()\nwith torch.no_grad():\n    scores = model(batch)"
    references = (
        "PyTorch documentation, torch.nn.Module.eval and torch.optim.Optimizer.zero_grad",
        "Python Language Reference, 7.1 Expression statements",
    )

    def visit_Expr(self, node: cst.Expr) -> None:
        target = node.value
        if not isinstance(target, cst.Attribute):
            return
        consequence = UNCALLED_METHOD_CONSEQUENCES.get(target.attr.value)
        if consequence is None:
            return
        expression = self.model.module.code_for_node(target)
        self.report(target, expression=expression, consequence=consequence,
                    autofix=Fix(target, cst.Call(func=target)))
