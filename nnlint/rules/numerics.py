"""Numerical-stability rules (NNL3xx): log of zero, vanishing epsilons, exp overflow."""
from __future__ import annotations

import libcst as cst

from nnlint.analysis.api import numerics as api
from nnlint.analysis.model import shorten
from nnlint.analysis.precision import FloatLimits, limits
from nnlint.analysis.stability import (active_limits, enclosing_statement, is_masked,
                                       log_argument, may_be_large)
from nnlint.analysis.stable_forms import (Rewrite, log_probability_fix, logsumexp_fix,
                                          softmax_fix)
from nnlint.analysis.values import (Fact, constant_value, exp_argument, fact_of,
                                    keyword_argument, positional_argument,
                                    summed_exp_argument, summed_operand)
from nnlint.finding import Severity
from nnlint.rules.base import Fix, Rule, register

#: limits of each format, computed by precision.py (numpy finfo; bfloat16 from its layout)
_F16, _BF16, _F32, _F64 = (limits(name) for name in ("float16", "bfloat16", "float32", "float64"))

#: producer -> (when the value is exactly 0, the fix); {limits} is the active format's
_ZERO_CAUSES = {
    "softmax": ("for a score {underflow:.1f} below the row max in {dtype}", "use log_softmax"),
    "sigmoid": ("below x = -{underflow:.1f} in {dtype}", "use logsigmoid(x)"),
    "1 - sigmoid": ("above x = {saturation:.1f} in {dtype}", "use logsigmoid(-x)"),
    "1 - softmax": ("once a probability rounds to 1 in {dtype}", "use log1p(-p) on log_softmax"),
    "1 - probability": ("once it rounds to 1 in {dtype}", "clamp it below 1 - eps"),
    "ReLU": ("for every negative input", "add an eps or use softplus"),
    "hard sigmoid": ("for every input below -3", "add an eps or use logsigmoid"),
    "count": ("for a count of 0", "add a positive constant (e.g. counts + 1)"),
    "sparse": ("outside its support", "mask the zeros (where) before the log"),
}
_DEFAULT_CAUSE = ("for some inputs", "clamp(min=eps) first")


def _as_fix(rewrite: Rewrite | None) -> Fix | None:
    return None if rewrite is None else Fix(*rewrite)


def _zero_cause(fact: Fact, bounds: FloatLimits) -> tuple[str, str]:
    when, fix = _ZERO_CAUSES.get(fact.producer, _DEFAULT_CAUSE)
    if fact.producer.startswith("1 - ") and fact.producer not in _ZERO_CAUSES:
        when, fix = _ZERO_CAUSES["1 - probability"]
    return when.format(underflow=-bounds.exp_underflow, saturation=bounds.sigmoid_saturation,
                       dtype=bounds.name), fix


@register
class LogOfMaybeZero(Rule):
    code = "NNL301"
    name = "log-of-maybe-zero"
    # error: log(0) = -inf and its gradient is inf; the loss turns NaN for inputs that occur
    severity = Severity.ERROR
    summary = "log of a value that can be exactly 0 in floating point"
    message = "log of {what}: exactly 0 {when}; {fix}"
    rationale = (
        "log(0) is -inf (IEEE 754-2019, 9.2.1) and its gradient 1/x is inf, so one zero turns "
        "the loss and then every weight into NaN. Probabilities reach exactly 0 long before "
        "their inputs look extreme. Softmax gives a score "
        f"{-_F32.exp_underflow:.1f} below its row maximum probability 0 in float32, and a "
        f"score {-_F16.exp_underflow:.1f} below it in float16 (e**-x under half the smallest "
        "subnormal, numpy finfo). Sigmoid is 0 below x = "
        f"{_F32.exp_underflow:.1f} in float32 (PyTorch and scipy.special.expit already below "
        f"{-_F32.log_max:.1f}, where exp(-x) overflows) and rounds to 1 above x = "
        f"{_F32.sigmoid_saturation:.1f} ({_F16.sigmoid_saturation:.1f} in float16), so "
        "`log(1 - sigmoid(x))` is log(0). ReLU outputs, counts and sparse probability maps "
        "are 0 by design. The stable forms work in log space: log_softmax, logsigmoid(x), "
        "logsigmoid(-x) for log(1 - sigmoid(x)), xlogy for p*log(p). An epsilon guard "
        "(`p + eps`, clamp(min=eps)) or a where-mask silences this rule; whether the epsilon "
        "survives the precision is NNL302's job."
    )
    bad = "probs = torch.softmax(scores, dim=-1)\nloss = -torch.log(probs)[labels].mean()"
    good = "loss = -torch.log_softmax(scores, dim=-1)[labels].mean()"
    rewrite = ("replaces log(softmax(x)) by log_softmax(x), log(sigmoid(x)) by logsigmoid(x) "
               "and log(1 - sigmoid(x)) by logsigmoid(-x), written out in one call")
    references = (
        "IEEE 754-2019, 9.2.1: log(0) is -infinity (divideByZero)",
        "numpy.finfo: smallest_subnormal and epsneg of float16/float32",
        "PyTorch documentation: torch.nn.functional.log_softmax, logsigmoid, torch.xlogy",
    )

    def visit_Call(self, node: cst.Call) -> None:
        argument = log_argument(self.model, node)
        if argument is None:
            return
        statement = enclosing_statement(self.context)
        fact = fact_of(self.model, argument, self.context.function, statement)
        if not fact.can_be_zero:
            return
        if is_masked(self.model, node, self.context):
            return
        bounds = active_limits(self.model, self.context.function, fact)
        when, fix = _zero_cause(fact, bounds)
        rewrite = log_probability_fix(self.model, node, self.model.scope_of(self.context.function))
        self.report(node, what=shorten(fact.description or "a value", 40), when=when, fix=fix,
                    autofix=_as_fix(rewrite))


@register
class EpsilonVanishes(Rule):
    code = "NNL302"
    name = "epsilon-vanishes"
    # warning: certain for the active precision, but that precision is inferred from evidence
    severity = Severity.WARNING
    summary = "a guard epsilon that is 0 or has no effect in the active precision"
    message = "guard `{eps}` {effect} in {dtype} ({limit}); use {suggestion}"
    rationale = (
        "A guard epsilon only guards if the format can hold it. In float16 the smallest "
        f"subnormal is {_F16.smallest_subnormal:.1e} (numpy finfo), so 1e-8 rounds to 0 and "
        "`log(p + 1e-8)` is log(0) again; bfloat16 (smallest subnormal "
        f"{_BF16.smallest_subnormal:.1e}) and float32 hold it. Near 1 the gap below 1 "
        f"(finfo.epsneg) is what matters: {_F32.epsneg:.2e} in float32, so `clamp(p, 1e-8, "
        "1 - 1e-8)` leaves p = 1 and `log(1 - p)` is log(0); the gap is "
        f"{_F16.epsneg:.2e} in float16 and {_BF16.epsneg:.2e} in bfloat16. The smallest "
        "additive epsilon suggested is the smallest normal number, because GPUs may flush "
        "subnormals to zero. The precision is float32 unless the `precision` setting or the "
        "file (half(), float16 dtypes, autocast, mixed-precision policies) says otherwise; "
        "files that use only NumPy/SciPy default to float64, NumPy's default dtype."
    )
    bad = "probs = torch.sigmoid(scores).half()\nrisk = torch.log(probs.clamp(min=1e-8))"
    good = "probs = torch.sigmoid(scores).half()\nrisk = torch.log(probs.clamp(min=1e-4))"
    references = (
        "IEEE 754-2019, table 3.5: binary16 and binary32 parameters",
        "numpy.finfo: smallest_subnormal, smallest_normal, epsneg",
    )

    def visit_Call(self, node: cst.Call) -> None:
        argument = log_argument(self.model, node)
        if argument is not None:
            self._check_sum(argument)
            self._check_one_minus(argument, None)
            return
        bounds = self._clamp_bounds(node)
        if bounds is None:
            return
        subject, lower, upper = bounds
        if lower is not None:
            self._check_floor(lower, subject)
        if upper is not None:
            self._check_one_minus(upper, subject)

    def visit_BinaryOperation(self, node: cst.BinaryOperation) -> None:
        if isinstance(node.operator, cst.Divide):
            self._check_sum(node.right)

    def _clamp_bounds(self, node: cst.Call):
        func = node.func
        if isinstance(func, cst.Attribute) and func.attr.value not in api.CLAMP_FINAL_NAMES:
            return None
        names = self.model.resolve(func)
        if names:
            if len(names) != 1:
                return None
            name = next(iter(names))
            if name in api.CLAMP_FUNCTIONS:
                lower_names, upper_names = api.CLAMP_FUNCTIONS[name]
                return (positional_argument(node, 0),
                        keyword_argument(node, lower_names) or positional_argument(node, 1),
                        keyword_argument(node, upper_names) or positional_argument(node, 2))
            if name in api.MAXIMUM_FUNCTIONS:
                return positional_argument(node, 0), positional_argument(node, 1), None
            return None
        if isinstance(func, cst.Attribute) and func.attr.value in api.CLAMP_METHODS:
            lower_names, upper_names = api.CLAMP_METHODS[func.attr.value]
            upper = None
            if upper_names:
                upper = keyword_argument(node, upper_names) or positional_argument(node, 1)
            lower = keyword_argument(node, lower_names) or positional_argument(node, 0)
            return func.value, lower, upper
        return None

    def _limits(self, subject: cst.BaseExpression | None) -> FloatLimits:
        """The format `subject` is computed in (float32 for softmax inside autocast)."""
        function = self.context.function
        fact = None
        if subject is not None:
            fact = fact_of(self.model, subject, function, enclosing_statement(self.context))
        return active_limits(self.model, function, fact)

    def _constant(self, expr: cst.BaseExpression) -> float | None:
        return constant_value(self.model, expr, self.context.function,
                              enclosing_statement(self.context))

    def _check_sum(self, expr: cst.BaseExpression) -> None:
        if not (isinstance(expr, cst.BinaryOperation) and isinstance(expr.operator, cst.Add)):
            return
        for part, subject in ((expr.right, expr.left), (expr.left, expr.right)):
            if self._check_floor(part, subject):
                return

    def _check_floor(self, expr: cst.BaseExpression, subject: cst.BaseExpression | None) -> bool:
        value = self._constant(expr)
        if value is None or value <= 0:
            return False
        bounds = self._limits(subject)
        if not bounds.rounds_to_zero(value):
            return False
        self.report(expr, eps=self._spelling(expr, value), effect="rounds to 0",
                    dtype=bounds.name, limit=f"smallest subnormal {bounds.smallest_subnormal:.1e}",
                    suggestion=f">= {bounds.smallest_normal:.1e}")
        return True

    def _check_one_minus(self, expr: cst.BaseExpression,
                         subject: cst.BaseExpression | None) -> None:
        if not (isinstance(expr, cst.BinaryOperation) and isinstance(expr.operator, cst.Subtract)):
            return
        if self._constant(expr.left) != 1.0:
            return
        value = self._constant(expr.right)
        if value is None or value <= 0:
            return
        bounds = self._limits(subject)
        if not bounds.one_minus_is_one(value):
            return
        self.report(expr.right, eps=self._spelling(expr.right, value),
                    effect="makes 1 - eps == 1", dtype=bounds.name,
                    limit=f"gap below 1: {bounds.epsneg:.2e}",
                    suggestion=f">= {bounds.epsneg:.2e}")

    def _spelling(self, expr: cst.BaseExpression, value: float) -> str:
        if isinstance(expr, (cst.Integer, cst.Float)):
            return expr.value
        return f"{self.model.quote(expr, 20)} = {value:g}"


class _ExpOverflow(Rule):
    """Shared by NNL303 and NNL304: is an exp argument unbounded, and the overflow limit."""

    def _unbounded(self, argument: cst.BaseExpression) -> bool:
        scope = self.model.scope_of(self.context.function)
        return may_be_large(self.model, argument, scope, enclosing_statement(self.context))

    def _overflow_fields(self) -> dict[str, str]:
        bounds = active_limits(self.model, self.context.function, float32_under_autocast=True)
        return {"limit": f"{bounds.log_max:.1f}", "dtype": bounds.name}


@register
class NaiveSoftmaxOverflow(_ExpOverflow):
    code = "NNL303"
    name = "naive-softmax-overflow"
    # warning: it overflows only once a score passes log(max); bounded scores are safe
    severity = Severity.WARNING
    summary = "softmax written as exp(x) / sum(exp(x)) without subtracting the max"
    message = ("`exp(x) / sum(exp(x))` is inf/inf = nan once a score passes {limit} in "
               "{dtype}; subtract the max or call softmax")
    rationale = (
        f"exp(x) overflows to inf for x above ln(max float): {_F32.log_max:.1f} in float32, "
        f"{_F16.log_max:.1f} in float16, {_F64.log_max:.1f} in float64 (ln of numpy "
        "finfo.max). Softmax computed as exp(x) / sum(exp(x)) is then inf/inf = nan: numpy "
        "gives nan for [1000, 0] in float32. Softmax is unchanged by subtracting a constant, "
        "so subtracting the row maximum first keeps every exp in (0, 1] and the sum in "
        "[1, n]; the library softmax functions do this."
    )
    bad = "weights = np.exp(scores)\nshares = weights / weights.sum(axis=-1, keepdims=True)"
    good = ("weights = np.exp(scores - scores.max(axis=-1, keepdims=True))\n"
            "shares = weights / weights.sum(axis=-1, keepdims=True)")
    rewrite = ("replaces exp(x) / sum(exp(x), axis, keepdims=True) by the framework's softmax "
               "over that axis, written out in one expression")
    references = (
        "IEEE 754-2019, 7.4: overflow returns infinity under round to nearest",
        "scipy.special.softmax documentation (computes the shifted form)",
        "numpy.finfo: max of float16/float32/float64",
    )

    def visit_BinaryOperation(self, node: cst.BinaryOperation) -> None:
        if not isinstance(node.operator, cst.Divide):
            return
        function = self.context.function
        scope = self.model.scope_of(function)
        statement = enclosing_statement(self.context)
        numerator = exp_argument(self.model, node.left, scope, statement)
        if numerator is None:
            return
        denominator = summed_exp_argument(self.model, node.right, scope, statement)
        if denominator is None or not self._same_exp(node, numerator, denominator):
            return
        if self._unbounded(numerator):
            self.report(node, autofix=_as_fix(softmax_fix(self.model, node, scope)),
                        **self._overflow_fields())

    def _same_exp(self, node: cst.BinaryOperation, numerator: cst.BaseExpression,
                  denominator: cst.BaseExpression) -> bool:
        if numerator.deep_equals(denominator):
            return True
        summed = summed_operand(self.model, node.right)
        return summed is not None and summed.deep_equals(node.left)


@register
class NaiveLogSumExp(_ExpOverflow):
    code = "NNL304"
    name = "naive-logsumexp"
    # warning: like NNL303, it overflows only for scores above log(max)
    severity = Severity.WARNING
    summary = "log(sum(exp(x))) computed without the max shift"
    message = "`log(sum(exp(x)))` is inf once a score passes {limit} in {dtype}; use logsumexp"
    rationale = (
        "log(sum(exp(x))) overflows as soon as one exp(x) does, for x above ln(max float): "
        f"{_F32.log_max:.1f} in float32, {_F16.log_max:.1f} in float16 (numpy finfo), and it "
        "is log(0) = -inf when every x is below "
        f"{_F32.exp_underflow:.1f} in float32. The log-sum-exp identity "
        "log(sum(exp(x))) = m + log(sum(exp(x - m))) with m = max(x) keeps every term in "
        "(0, 1]; torch.logsumexp, scipy.special.logsumexp, jax.nn.logsumexp and "
        "tf.reduce_logsumexp implement it."
    )
    bad = "log_norm = torch.log(torch.exp(scores).sum(dim=-1))"
    good = "log_norm = torch.logsumexp(scores, dim=-1)"
    rewrite = ("replaces log(sum(exp(x), axis)) by the framework's logsumexp over that axis, "
               "written out in one call")
    references = (
        "scipy.special.logsumexp documentation",
        "numpy.finfo: max of float16/float32/float64",
    )

    def visit_Call(self, node: cst.Call) -> None:
        argument = log_argument(self.model, node)
        if argument is None:
            return
        scope = self.model.scope_of(self.context.function)
        statement = enclosing_statement(self.context)
        inner = summed_exp_argument(self.model, argument, scope, statement)
        if inner is not None and self._unbounded(inner):
            self.report(node, autofix=_as_fix(logsumexp_fix(self.model, node, scope)),
                        **self._overflow_fields())
