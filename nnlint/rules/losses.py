"""Loss-pairing rules (NNL5xx)."""
from __future__ import annotations

import libcst as cst

from nnlint.analysis.api.losses import KERAS_EPSILON, Expects
from nnlint.analysis.losses import (
    LossUse, class_count, double_sigmoid_range, double_softmax_ceiling, double_softmax_floor,
    edits_layer_stacks, inline_normaliser_input, keras_clip_floor_loss, keras_compiled_loss,
    loss_of_call,
)
from nnlint.analysis.values import Fact, Kind, call_result, fact_of
from nnlint.finding import Severity
from nnlint.rules.base import Fix, Rule, register

_STATEMENTS = (cst.SimpleStatementLine, cst.SimpleStatementSuite, cst.BaseCompoundStatement)


class _LossRule(Rule):
    """Shared plumbing: every loss computation with the fact of its input."""

    def visit_Call(self, node: cst.Call) -> None:
        function = self.context.function
        use = loss_of_call(self.model, node, function)
        if use is not None and use.prediction is not None:
            fact = fact_of(self.model, use.prediction, function, self._statement())
            self.judge(node, use, fact, f"`{self._short(use.prediction)}`")
            return
        compiled = keras_compiled_loss(self.model, node, function)
        if compiled is not None:
            use, compiled_model, argument = compiled
            fact = call_result(self.model, compiled_model, function, self._statement())
            self.judge(argument, use, fact, f"the output of `{self._short(compiled_model)}`")

    def judge(self, node: cst.CSTNode, use: LossUse, fact: Fact, subject: str) -> None:
        """Decide on one loss computation; `subject` names its input for the message."""
        raise NotImplementedError

    def _statement(self) -> cst.CSTNode | None:
        for ancestor in reversed(self.context.ancestors):
            if isinstance(ancestor, _STATEMENTS):
                return ancestor
        return None

    def _short(self, expr: cst.CSTNode) -> str:
        text = self.model.module.code_for_node(expr).strip()
        return text if len(text) <= 30 and "\n" not in text else "the prediction"


@register
class ProbabilitiesIntoLogitLoss(_LossRule):
    code = "NNL501"
    name = "probabilities-into-logit-loss"
    severity = Severity.ERROR
    summary = "a softmax/sigmoid output is fed to a loss that applies softmax/sigmoid itself"
    message = ("{loss} applies {activation} again to {subject} ({producer} output): "
               "{consequence}; {fix}")
    rationale = (
        "Losses that take logits (CrossEntropyLoss, BCEWithLogitsLoss, tf.nn.*_with_logits, "
        "optax's cross-entropies, Keras losses with from_logits=True) apply softmax or "
        "sigmoid themselves. Given probabilities, they normalise a second time. Inputs in "
        "[0, 1] differ by at most 1, so a second softmax over C classes gives the top class "
        f"at most e/(e+C-1): for 10 classes {double_softmax_ceiling(10):.3f}, so the "
        f"cross-entropy can never fall below {double_softmax_floor(10):.2f}, and its gradient "
        "shrinks by the softmax Jacobian (both checked with numpy and scipy in "
        "tests/test_losses_references.py). A second sigmoid maps every prediction into "
        f"[{double_sigmoid_range()[0]:.1f}, {double_sigmoid_range()[1]:.3f}]. Training runs, "
        "the loss plateaus high, and confident predictions are never rewarded."
    )
    bad = ("scores = head(features)\n"
           "probs = torch.softmax(scores, dim=-1)\n"
           "loss = F.cross_entropy(probs, labels)")
    good = ("scores = head(features)\n"
            "loss = F.cross_entropy(scores, labels)")
    rewrite = ("removes a softmax/sigmoid written inside the loss call when it is the loss's own "
               "activation over the loss's class axis")
    references = (
        "PyTorch documentation, torch.nn.CrossEntropyLoss: 'The input is expected to contain "
        "the unnormalized logits for each class'",
        "Keras documentation, keras.losses.SparseCategoricalCrossentropy: from_logits",
        "Bridle 1990, softmax normalisation of network outputs (definition of softmax)",
    )

    def judge(self, node: cst.CSTNode, use: LossUse, fact: Fact, subject: str) -> None:
        if use.expects is not Expects.LOGITS or fact.kind is not Kind.PROB:
            return
        if use.spec.activation == "softmax":
            classes = class_count(self.model, fact, self.context.function, use.prediction)
            if classes is not None:
                consequence = (f"p <= {double_softmax_ceiling(classes):.3f} over {classes} "
                               f"classes, loss >= {double_softmax_floor(classes):.2f}")
            else:
                consequence = "no class can get near probability 1"
        else:
            low, high = double_sigmoid_range()
            consequence = f"predictions stuck in [{low:.1f}, {high:.3f}]"
        fix = "drop the final activation" if use.prediction is None else "pass logits"
        autofix = None
        if isinstance(node, cst.Call) and use.prediction is not None:
            logits = inline_normaliser_input(self.model, use, node)
            if logits is not None:
                autofix = Fix(use.prediction, logits)
        self.report(node, loss=use.label, activation=use.spec.activation, subject=subject,
                    producer=fact.producer or "probability", consequence=consequence, fix=fix,
                    autofix=autofix)


@register
class LogitsIntoProbabilityLoss(_LossRule):
    code = "NNL502"
    name = "logits-into-probability-loss"
    severity = Severity.ERROR
    summary = "raw scores are fed to a loss that expects probabilities or log-probabilities"
    message = "{loss} expects {expects}, but {subject} is raw scores: {consequence}; {fix}"
    rationale = (
        "BCELoss/binary_cross_entropy take probabilities: PyTorch raises a RuntimeError for "
        "any input outside [0, 1] and silently computes a wrong loss for scores that happen to "
        "fall inside (checked with torch in tests/test_losses_references.py). NLLLoss and "
        "KLDivLoss take log-probabilities: on raw scores NLLLoss is just -score[target], "
        "unbounded below, so the model lowers the loss by inflating one score. Keras "
        "cross-entropies with from_logits=False (the default, and every "
        f"`compile(loss=\"...\")` string) clip y_pred to [{KERAS_EPSILON:g}, "
        f"1 - {KERAS_EPSILON:g}] (keras.backend.epsilon()): every score outside that range "
        f"costs up to -log({KERAS_EPSILON:g}) = {keras_clip_floor_loss():.1f} with zero "
        "gradient."
    )
    bad = ("scores = nn.Linear(64, 1)(features).squeeze(-1)\n"
           "loss = F.binary_cross_entropy(scores, seals)")
    good = ("scores = nn.Linear(64, 1)(features).squeeze(-1)\n"
            "loss = F.binary_cross_entropy_with_logits(scores, seals)")
    references = (
        "PyTorch documentation, torch.nn.BCELoss, torch.nn.NLLLoss and torch.nn.KLDivLoss "
        "(input is expected to be probabilities / log-probabilities)",
        "Keras documentation, keras.losses: from_logits defaults to False; keras.backend.epsilon",
    )

    def judge(self, node: cst.CSTNode, use: LossUse, fact: Fact, subject: str) -> None:
        if use.expects is Expects.LOGITS or fact.kind is not Kind.LOGITS:
            return
        if edits_layer_stacks(self.model):
            return  # a layer appended later (an activation?) may end the model
        if use.spec.has_from_logits:
            consequence = (f"clipped to [{KERAS_EPSILON:g}, 1 - {KERAS_EPSILON:g}], up to "
                           f"{keras_clip_floor_loss():.1f} loss with zero gradient")
            fix = "pass from_logits=True"
        elif use.expects is Expects.PROB:
            consequence = "RuntimeError outside [0, 1], a wrong loss inside"
            fix = "use its with-logits form"
        else:
            consequence = "unbounded below, it drops as any score grows"
            fix = "apply log_softmax first"
        self.report(node, loss=use.label, expects=use.expects.value, subject=subject,
                    consequence=consequence, fix=fix)
