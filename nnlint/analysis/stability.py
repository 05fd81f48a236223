"""Shapes the numerical-stability rules look for: log calls, their guards, exp overflow.

Built on value facts (values.py); nothing here walks a subtree: the questions look at a
node, its recorded ancestors (WalkContext) and the bindings of the names it uses.
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import libcst as cst

from nnlint.analysis.api import numerics as api
from nnlint.analysis.precision import FloatLimits, is_autocast_only, limits, precision_of
from nnlint.analysis.values import Fact, Kind, fact_of, positional_argument, single_value

if TYPE_CHECKING:
    from nnlint.analysis.model import ModuleModel, Scope
    from nnlint.analysis.walk import WalkContext

_STATEMENTS = (cst.SimpleStatementLine, cst.SimpleStatementSuite, cst.BaseCompoundStatement)


def enclosing_statement(context: "WalkContext") -> cst.CSTNode | None:
    """The innermost statement around the node being visited (for fact_of's kills)."""
    for node in reversed(context.ancestors):
        if isinstance(node, _STATEMENTS):
            return node
    return None


def active_limits(model: "ModuleModel", function: cst.FunctionDef | None,
                  fact: Fact | None = None, float32_under_autocast: bool = False
                  ) -> FloatLimits:
    """Limits of the format a value is computed in.

    Inside autocast-only files, values made by ops autocast runs in float32 (softmax, exp,
    sums) are float32; `fact` names the producer, `float32_under_autocast` says so directly.
    """
    if float32_under_autocast or (fact is not None
                                  and fact.producer in api.AUTOCAST_FLOAT32_PRODUCERS):
        if is_autocast_only(model):
            return limits("float32")
    return limits(precision_of(model, function))


def log_argument(model: "ModuleModel", call: cst.Call) -> cst.BaseExpression | None:
    """X when `call` is `log(X)`, `log2(X)`, `log10(X)` or `X.log()` (every candidate)."""
    func = call.func
    # cheapest test first: an attribute not named log* is neither form (a bare name may be
    # an alias such as `from numpy import log as ln`, so names are always resolved)
    if isinstance(func, cst.Attribute) and func.attr.value not in api.LOG_METHODS:
        return None
    names = model.resolve(func)
    if names:
        return positional_argument(call, 0) if names <= api.LOG_FUNCTIONS else None
    if isinstance(func, cst.Attribute) and func.attr.value in api.LOG_METHODS and not call.args:
        return func.value
    return None


def is_masked(model: "ModuleModel", call: cst.Call, context: "WalkContext") -> bool:
    """The log is masked or its -inf handled: `where(...)` around it, `where=`, errstate."""
    if any(arg.keyword is not None and arg.keyword.value == "where" for arg in call.args):
        return True
    for node in context.ancestors:
        if isinstance(node, cst.Call) and model.resolve(node.func) & api.WHERE_FUNCTIONS:
            return True
    for block in context.enclosing(cst.With):
        for item in block.items:
            target = item.item
            if isinstance(target, cst.Call) and model.resolve(target.func) & \
                    api.ERRSTATE_CONTEXTS:
                return True
    return False


def may_be_large(model: "ModuleModel", expr: cst.BaseExpression, scope: "Scope",
                 statement: cst.CSTNode | None, depth: int = 0) -> bool:
    """True unless `expr` is visibly bounded above: shifted by a subtraction, negated,
    a constant, a log-probability or a log. Unknown inputs (parameters, data) may be large.
    """
    if depth > 6:
        return False
    if isinstance(expr, (cst.Integer, cst.Float)):
        return False
    if isinstance(expr, cst.UnaryOperation):
        return not isinstance(expr.operator, cst.Minus) and may_be_large(
            model, expr.expression, scope, statement, depth + 1)
    if isinstance(expr, cst.BinaryOperation):
        operator = expr.operator
        if isinstance(operator, cst.Subtract):
            return False
        if isinstance(operator, (cst.Multiply, cst.Divide)):
            parts = [expr.left, expr.right]
            if any(isinstance(part, cst.UnaryOperation) for part in parts):
                return False
            return all(isinstance(part, (cst.Integer, cst.Float))
                       or may_be_large(model, part, scope, statement, depth + 1)
                       for part in parts)
        if isinstance(operator, cst.Add):
            return any(may_be_large(model, part, scope, statement, depth + 1)
                       for part in (expr.left, expr.right))
        return True
    if isinstance(expr, cst.Name):
        single = single_value(model, expr, scope, statement)
        if single is not None:
            value, owner, binding_statement = single
            return may_be_large(model, value, owner, binding_statement, depth + 1)
        return _fact_kind(model, expr, scope, statement) not in (Kind.LOGPROB,)
    if isinstance(expr, cst.Call):
        if log_argument(model, expr) is not None:
            return False
    return _fact_kind(model, expr, scope, statement) not in (Kind.LOGPROB, Kind.PROB)


def _fact_kind(model: "ModuleModel", expr: cst.BaseExpression, scope: "Scope",
               statement: cst.CSTNode | None) -> Kind:
    function = scope.node if isinstance(scope.node, cst.FunctionDef) else None
    return fact_of(model, expr, function, statement).kind
