"""Train/eval mode and training-step rules (NNL4xx)."""
from __future__ import annotations

import libcst as cst

from nnlint.analysis.api.modes import BACKWARD_FUNCTIONS, UNCALLED_METHOD_CONSEQUENCES
from nnlint.analysis.model import shorten
from nnlint.analysis.modes import ModeAnalysis, computed_inside, no_grad_region
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
    rewrite = "adds the missing call parentheses"
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


def _severity_for(layers: str) -> Severity | None:
    """Known dropout or batch norm make the wrong mode certain to change the numbers."""
    return Severity.ERROR if layers else None


@register
class EvalInTrainMode(Rule):
    code = "NNL401"
    name = "eval-in-train-mode"
    severity = Severity.WARNING
    summary = "a model runs in evaluation code while it may still be in training mode"
    message = ("evaluation {where}runs `{model}` in training mode{layers};"
               " call `{model}.eval()` first")
    rationale = (
        "`torch.no_grad()` only stops gradient recording; it does not change how layers "
        "behave. Until `model.eval()` (or `train(False)`) is called, dropout keeps zeroing "
        "a fraction p of activations and scaling the rest by 1/(1-p), and batch "
        "normalization normalizes with the statistics of the current batch and updates its "
        "running mean and variance with validation data (PyTorch documentation, Module.eval, "
        "Dropout, BatchNorm1d; checked with PyTorch in tests/test_modes_references.py). The "
        "metrics are noisy and lower than the model's real ones, and the running statistics "
        "the model will use at inference drift toward the validation set. Modules are "
        "constructed in training mode and stay in the last mode set, so an evaluation pass "
        "after `model.train()` (in a caller, or an earlier loop iteration) needs its own "
        "`eval()`. Reported as an error when the model is known to contain dropout or batch "
        "normalization, a warning otherwise; silent when it is known to contain neither, for "
        "hooks a framework switches the mode for (Lightning `validation_step`, Hugging Face "
        "`Trainer`, Keras `evaluate`), and for helpers every caller prepares with `eval()`."
    )
    bad = (
        "class Net(nn.Module):\n"
        "    def __init__(self):\n"
        "        super().__init__()\n"
        "        self.body = nn.Sequential(nn.Linear(8, 8), nn.Dropout(0.3), nn.Linear(8, 2))\n"
        "\n"
        "    def forward(self, x):\n"
        "        return self.body(x)\n"
        "\n"
        "def validate(model, loader):\n"
        "    with torch.no_grad():\n"
        "        return [model(x).argmax(-1) for x in loader]\n"
        "\n"
        "def main(loader):\n"
        "    model = Net()\n"
        "    return validate(model, loader)"
    )
    good = bad.replace("    with torch.no_grad():", "    model.eval()\n    with torch.no_grad():")
    references = (
        "PyTorch documentation, torch.nn.Module.eval and torch.nn.Module.train",
        "PyTorch documentation, torch.no_grad (\"does not affect the module's mode\")",
        "Ioffe and Szegedy 2015, Batch Normalization, section 3.1 (inference uses population "
        "statistics)",
        "Srivastava et al. 2014, Dropout, section 4 (no dropout at test time)",
    )

    def visit_Call(self, node: cst.Call) -> None:
        for found in ModeAnalysis.of(self.model).findings_at(node, self.code):
            where = f"in `{found.callee}` " if found.callee else ""
            layers = f" ({found.layers} active)" if found.layers else ""
            self.report(node, severity=_severity_for(found.layers), model=found.model,
                        where=where, layers=layers)


@register
class TrainModeNotRestored(Rule):
    code = "NNL402"
    name = "train-mode-not-restored"
    severity = Severity.ERROR
    summary = "training steps run while the model is left in eval mode"
    message = "`{model}` trains in eval mode left by {cause}; call `{model}.train()` first"
    rationale = (
        "`model.eval()` stays in force until `model.train()` is called. When an evaluation "
        "pass switches the model to eval mode and the next epoch's training steps start "
        "without `train()`, every later step trains with dropout off and batch "
        "normalization frozen on its running statistics: the run loses its regularization "
        "and its normalization statistics stop following the data, silently (PyTorch "
        "documentation, Module.train). The same happens to a model loaded with Hugging Face "
        "`from_pretrained`, which returns it in eval mode (from memory: the loader calls "
        "`model.eval()` after loading the weights), when the loop never calls `train()`. "
        "The analysis follows epoch loops round: a second iteration starts in the mode the "
        "first one ended in."
    )
    bad = (
        "def fit(model, train_loader, val_loader, optimizer, epochs):\n"
        "    for _ in range(epochs):\n"
        "        for x, y in train_loader:\n"
        "            optimizer.zero_grad()\n"
        "            loss = F.cross_entropy(model(x), y)\n"
        "            loss.backward()\n"
        "            optimizer.step()\n"
        "        model.eval()\n"
        "        with torch.no_grad():\n"
        "            scores = [model(x) for x, _ in val_loader]"
    )
    good = bad.replace("        for x, y in train_loader:",
                       "        model.train()\n        for x, y in train_loader:")
    references = (
        "PyTorch documentation, torch.nn.Module.train and torch.nn.Module.eval",
        "Hugging Face Transformers documentation, PreTrainedModel.from_pretrained (the model "
        "is returned in evaluation mode; from memory)",
    )

    def visit_Call(self, node: cst.Call) -> None:
        for found in ModeAnalysis.of(self.model).findings_at(node, self.code):
            self.report(node, model=found.model, cause=found.cause)


@register
class EvalTracksGradients(Rule):
    code = "NNL404"
    name = "eval-tracks-gradients"
    severity = Severity.WARNING
    summary = "an evaluation loop calls the model with gradient recording on"
    message = ("`{model}` builds autograd graphs over `{data}`;"
               " wrap the loop in `with torch.no_grad():`")
    rationale = (
        "Outside `torch.no_grad()`/`torch.inference_mode()` every forward pass records the "
        "operations and keeps the activations autograd needs for a backward pass that an "
        "evaluation never makes. The pass is slower and holds the activations of the batch "
        "in memory (roughly as much as a training step's forward, PyTorch autograd "
        "mechanics notes); accumulating outputs across batches keeps every batch's graph "
        "alive until the loop ends, which is how evaluation runs out of GPU memory. Silent "
        "when the loop computes gradients itself (adversarial inputs, test-time "
        "adaptation), when gradients are switched by a flag (`set_grad_enabled(training)`), "
        "and for helpers called from inside a no-grad block."
    )
    bad = (
        "scorer = nn.Sequential(nn.Linear(8, 8), nn.ReLU(), nn.Linear(8, 2))\n"
        "scorer.eval()\n"
        "for x in val_loader:\n"
        "    print(scorer(x).max())"
    )
    good = (
        "scorer = nn.Sequential(nn.Linear(8, 8), nn.ReLU(), nn.Linear(8, 2))\n"
        "scorer.eval()\n"
        "with torch.no_grad():\n"
        "    for x in val_loader:\n"
        "        print(scorer(x).max())"
    )
    references = (
        "PyTorch documentation, torch.no_grad and torch.inference_mode",
        "PyTorch documentation, Autograd mechanics: locally disabling gradient computation",
    )

    def visit_Call(self, node: cst.Call) -> None:
        for found in ModeAnalysis.of(self.model).findings_at(node, self.code):
            self.report(node, model=found.model, data=shorten(found.data, 30))


@register
class BackwardUnderNoGrad(Rule):
    code = "NNL405"
    name = "backward-under-no-grad"
    severity = Severity.ERROR
    summary = "a backward pass starts from a tensor computed inside a no-grad block"
    message = "{operation} `{tensor}` made under `{context}` has no graph; compute it outside"
    rationale = (
        "Inside `torch.no_grad()`/`torch.inference_mode()` (block or decorator) and under "
        "`set_grad_enabled(False)`, operations record no graph, so a loss computed there has "
        "no `grad_fn`: `loss.backward()` raises `RuntimeError: element 0 of tensors does not "
        "require grad` (checked with PyTorch in tests/test_modes_references.py), or, with "
        "leaves that require grad, the gradient misses every operation done in the block. "
        "A graph built before the block is still differentiable inside it, so only tensors "
        "made inside the block are reported; `torch.enable_grad()` inside the block turns "
        "recording back on."
    )
    bad = (
        "with torch.no_grad():\n"
        "    loss = F.mse_loss(model(batch), target)\n"
        "    loss.backward()"
    )
    good = (
        "loss = F.mse_loss(model(batch), target)\n"
        "loss.backward()\n"
        "with torch.no_grad():\n"
        "    score = F.mse_loss(model(batch), target)"
    )
    references = (
        "PyTorch documentation, torch.no_grad, torch.enable_grad, torch.autograd.grad",
        "PyTorch documentation, Autograd mechanics: locally disabling gradient computation",
    )

    def visit_Call(self, node: cst.Call) -> None:
        func = node.func
        if isinstance(func, cst.Attribute) and func.attr.value == "backward":
            tensor = func.value
            if self.model.canonical(func) in BACKWARD_FUNCTIONS:
                tensor = node.args[0].value if node.args else None
        elif self.model.canonical(func) in BACKWARD_FUNCTIONS:
            tensor = node.args[0].value if node.args else None
        else:
            return
        if tensor is None:
            return
        region = no_grad_region(self.model, self.context.blocks)
        if region is None:
            return
        block, context_name = region
        if not computed_inside(self.model, block, tensor, self.context.function):
            return
        operation = ("backward of" if isinstance(func, cst.Attribute)
                     and func.attr.value == "backward" else "autograd.grad of")
        self.report(node, operation=operation,
                    tensor=self.model.quote(tensor, 24),
                    context=context_name)
