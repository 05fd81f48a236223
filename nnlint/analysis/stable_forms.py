"""Rewrites of naive numerics into the framework's stable function, for `nnlint fix`.

`log(softmax(x))` -> log_softmax, `log(sigmoid(x))` -> logsigmoid, `log(1 - sigmoid(x))` ->
logsigmoid(-x), `exp(x) / sum(exp(x))` -> softmax, `log(sum(exp(x)))` -> logsumexp. Only the
exact nested forms are rewritten (a value reaching through a name may have changed on the
way), only with arguments the stable function takes alike, and only on one line without
comments, so a fix changes nothing but the bug. Anything else returns None: the finding stays,
without a fix. Names are spelled with the file's own imports; an import is added only when no
alias fits and the name it binds is free.
"""
from __future__ import annotations

import re
from typing import TYPE_CHECKING

import libcst as cst

from nnlint.analysis.api import stable_forms as api
from nnlint.analysis.names import dotted_name

if TYPE_CHECKING:
    from nnlint.analysis.model import ModuleModel, Scope

_MEMO = "stable_forms.top_level_imports"

#: (node to replace, its replacement, imports the replacement needs); rules wrap it in a Fix
Rewrite = tuple[cst.CSTNode, cst.CSTNode, tuple[str, ...]]


# -- spelling a canonical name with the file's imports ------------------------------------------
def _top_level_imports(model: "ModuleModel") -> list[tuple[str, str]]:
    """(local name, module it makes reachable) for the module's own top-level imports.

    Imports inside functions are left out: the flow-insensitive name table resolves them
    everywhere, but they are out of scope elsewhere. `import a.b` gives ("a", "a.b") as
    well as ("a", "a"): the submodule is loaded and reachable as `a.b`.
    """
    memo = model.memo.setdefault(_MEMO, {})
    if "names" not in memo:
        names: list[tuple[str, str]] = []
        for statement in model.module.body:
            if not isinstance(statement, cst.SimpleStatementLine):
                continue
            for small in statement.body:
                names.extend(_bound_names(small))
        memo["names"] = names
    return memo["names"]


def _bound_names(small: cst.BaseSmallStatement) -> list[tuple[str, str]]:
    if isinstance(small, cst.Import):
        found = []
        for alias in small.names:
            module = dotted_name(alias.name) or ""
            if alias.asname is not None and isinstance(alias.asname.name, cst.Name):
                found.append((alias.asname.name.value, ""))
            else:
                found.append((module.split(".")[0], module))
        return found
    if isinstance(small, cst.ImportFrom) and not small.relative and \
            not isinstance(small.names, cst.ImportStar):
        return [(alias.asname.name.value if alias.asname is not None
                 and isinstance(alias.asname.name, cst.Name) else alias.name.value, "")
                for alias in small.names if isinstance(alias.name, cst.Name)]
    return []


def _attributes(base: cst.BaseExpression, dotted: str) -> cst.BaseExpression:
    for part in dotted.split(".") if dotted else ():
        base = cst.Attribute(value=base, attr=cst.Name(part))
    return base


def _prefixes(expr: cst.BaseExpression):
    """`a.b.c`, `a.b`, `a` for a dotted expression (each a node of the original tree)."""
    while isinstance(expr, (cst.Attribute, cst.Name)):
        yield expr
        if isinstance(expr, cst.Name):
            return
        expr = expr.value


def _is_free(model: "ModuleModel", name: str) -> bool:
    """No bare use of `name` anywhere in the file (an added import must not shadow anything);
    `import name.x` and `from name import x` do not bind `name` to anything else."""
    pattern = rf"(?<![\w.])(?<!from ){re.escape(name)}(?![\w])(?!\s*\.)"
    return re.search(pattern, model.source) is None


def spell(model: "ModuleModel", canonical: str, sites: tuple[cst.BaseExpression, ...],
          scope: "Scope", may_import: bool = True
          ) -> tuple[cst.BaseExpression, tuple[str, ...]] | None:
    """An expression naming `canonical` at the site, and the imports it needs.

    Tried in turn: a prefix of a name written at the site (`torch` of `torch.sigmoid`), a
    top-level import alias not shadowed in `scope`; the most specific one wins (`F.logsigmoid`
    over `torch.nn.functional.logsigmoid`). With neither, an import from api.IMPORTS is added
    when `may_import` and the name it binds is free. None: no safe spelling.
    """
    module = canonical.rpartition(".")[0]
    reachable = {module, *api.REACHABLE_FROM.get(module, ())}
    best: tuple[int, cst.BaseExpression] | None = None

    def consider(base: cst.BaseExpression, meaning: str | None) -> None:
        nonlocal best
        if meaning is None or not (meaning == canonical or meaning in reachable):
            return
        rest = canonical[len(meaning) + 1:]
        if best is None or len(meaning) > best[0]:
            best = (len(meaning), _attributes(base, rest))

    for site in sites:
        for prefix in _prefixes(site):
            consider(prefix, model.canonical(prefix))
    for local, loaded in _top_level_imports(model):
        candidates = model.names.candidates(local)
        if len(candidates) != 1 or model.lookup(local, scope) is not None:
            continue
        meaning = next(iter(candidates))
        consider(cst.Name(local), meaning)
        if loaded.startswith(meaning + "."):  # `import scipy.special` reaches scipy.special
            consider(_attributes(cst.Name(local), loaded[len(meaning) + 1:]), loaded)
    if best is not None:
        return best[1], ()
    if not may_import:
        return None
    final = canonical.rpartition(".")[2]
    for statement, local, inside in api.IMPORTS.get(module, ()):
        if _is_free(model, local):
            return _attributes(cst.Name(local), f"{inside}.{final}" if inside else final), \
                (statement,)
    return None


# -- recognising the pieces ---------------------------------------------------------------------
def _family(canonical: str) -> str | None:
    return api.FAMILIES.get(canonical.rpartition(".")[0])


def _imports_torch(model: "ModuleModel") -> bool:
    return any(module.split(".")[0] == "torch" for module in model.names.imported_modules)


def _one_line(model: "ModuleModel", node: cst.CSTNode) -> bool:
    """The rewritten node sits on one line with no comment, so nothing but it changes."""
    code = model.module.code_for_node(node)
    return "\n" not in code and "#" not in code


def _natural_log(model: "ModuleModel", call: cst.Call):
    """(family, argument) when `call` is a natural log of one argument, else None."""
    names = model.resolve(call.func)
    if names:
        if len(names) != 1 or next(iter(names)) not in api.NATURAL_LOGS:
            return None
        if len(call.args) != 1 or call.args[0].keyword is not None or call.args[0].star:
            return None
        return _family(next(iter(names))), call.args[0].value
    func = call.func
    if isinstance(func, cst.Attribute) and func.attr.value == "log" and not call.args \
            and _imports_torch(model):
        return api.METHOD_FAMILY, func.value
    return None


def _arguments_fit(call: cst.Call, signature: api.Signature) -> bool:
    positional = 0
    for arg in call.args:
        if arg.star:
            return False
        if arg.keyword is None:
            positional += 1
        elif arg.keyword.value not in signature.keywords:
            return False
    return positional <= signature.positional


def _only_argument(call: cst.Call) -> cst.Arg | None:
    if len(call.args) == 1 and call.args[0].keyword is None and not call.args[0].star:
        return call.args[0]
    return None


def _is_one(expr: cst.BaseExpression) -> bool:
    return isinstance(expr, (cst.Integer, cst.Float)) and expr.evaluated_value == 1


def _negated(expr: cst.BaseExpression) -> cst.UnaryOperation:
    atoms = (cst.Name, cst.Attribute, cst.Call, cst.Subscript, cst.Integer, cst.Float)
    if not isinstance(expr, atoms) and not expr.lpar:
        expr = expr.with_changes(lpar=[cst.LeftParen()], rpar=[cst.RightParen()])
    return cst.UnaryOperation(operator=cst.Minus(), expression=expr)


def _framed(replacement: cst.BaseExpression, target: cst.BaseExpression) -> cst.BaseExpression:
    """`replacement` wearing the target's own parentheses."""
    return replacement.with_changes(lpar=target.lpar, rpar=target.rpar)


# -- NNL301: log of softmax / sigmoid -------------------------------------------------------------
def log_probability_fix(model: "ModuleModel", log_call: cst.Call, scope: "Scope") -> Rewrite | None:
    """The fix of `log(softmax(..))`, `log(sigmoid(x))` or `log(1 - sigmoid(x))`, or None."""
    found = _natural_log(model, log_call)
    if found is None or not _one_line(model, log_call):
        return None
    family, argument = found
    complement = False
    if isinstance(argument, cst.BinaryOperation) and \
            isinstance(argument.operator, cst.Subtract):
        if not _is_one(argument.left):
            return None
        argument, complement = argument.right, True
    if not isinstance(argument, cst.Call):
        return None
    built = None
    if not complement:
        built = _log_softmax(model, argument, family, log_call, scope)
    if built is None:
        built = _log_sigmoid(model, argument, family, log_call, scope, complement)
    if built is None:
        return None
    replacement, imports = built
    return log_call, _framed(replacement, log_call), imports


def _log_softmax(model, call: cst.Call, family: str, log_call: cst.Call, scope):
    names = model.resolve(call.func)
    if names:
        name = next(iter(names)) if len(names) == 1 else None
        entry = api.LOG_SOFTMAX.get(name or "")
        if entry is None or _family(name) != family or not _arguments_fit(call, entry[1]):
            return None
        spelled = spell(model, entry[0], (call.func, log_call.func), scope)
        if spelled is None:
            return None
        return call.with_changes(func=spelled[0], lpar=(), rpar=()), spelled[1]
    method, stable, signature = api.LOG_SOFTMAX_METHOD
    func = call.func
    if isinstance(func, cst.Attribute) and func.attr.value == method \
            and family == api.METHOD_FAMILY and _arguments_fit(call, signature):
        return call.with_changes(func=func.with_changes(attr=cst.Name(stable)),
                                 lpar=(), rpar=()), ()
    return None


def _log_sigmoid(model, call: cst.Call, family: str, log_call: cst.Call, scope,
                 complement: bool):
    names = model.resolve(call.func)
    func = call.func
    if names:
        name = next(iter(names)) if len(names) == 1 else None
        stable = api.LOG_SIGMOID.get(name or "")
        argument = _only_argument(call)
        if stable is None or _family(name) != family or argument is None:
            return None
    elif isinstance(func, cst.Attribute) and func.attr.value == api.LOG_SIGMOID_METHOD[0] \
            and not call.args and family == api.METHOD_FAMILY:
        stable, argument = api.LOG_SIGMOID_METHOD[1], cst.Arg(func.value)
    else:
        return None
    if complement:
        argument = argument.with_changes(value=_negated(argument.value))
    spelled = spell(model, stable, (func, log_call.func), scope)
    if spelled is None:
        return None
    return cst.Call(func=spelled[0], args=[argument]), spelled[1]


# -- NNL303 / NNL304: exp, sum, and their stable forms -------------------------------------------
def _exp_call(model: "ModuleModel", expr: cst.BaseExpression):
    """(family, X, exp function or None for `X.exp()`) when `expr` is exp(X) written out."""
    if not isinstance(expr, cst.Call):
        return None
    names = model.resolve(expr.func)
    if names:
        family = api.EXP_FUNCTIONS.get(next(iter(names))) if len(names) == 1 else None
        argument = _only_argument(expr)
        if family is None or argument is None:
            return None
        return family, argument.value, expr.func
    func = expr.func
    if isinstance(func, cst.Attribute) and func.attr.value == "exp" and not expr.args \
            and _imports_torch(model):
        return api.METHOD_FAMILY, func.value, None
    return None


def _sum_call(model: "ModuleModel", expr: cst.BaseExpression):
    """(operand, {"axis": Arg, "keep": Arg}, sum function or None, form) of a plain sum."""
    if not isinstance(expr, cst.Call):
        return None
    names = model.resolve(expr.func)
    args = list(expr.args)
    if names:
        if len(names) != 1:
            return None
        kind = next(iter(names))
        if not args or args[0].keyword is not None or args[0].star:
            return None  # the operand must be written first, as itself
        operand, args = args[0].value, args[1:]
        func = expr.func
    elif isinstance(expr.func, cst.Attribute) and expr.func.attr.value == "sum":
        kind, operand, func = "method", expr.func.value, None
    else:
        return None
    return operand, args, func, kind


def _reduction(form: api.SumForm, args: list[cst.Arg]) -> dict[str, cst.Arg] | None:
    """The sum's axis and keep-dims arguments by role, or None when it has any other."""
    roles: dict[str, cst.Arg] = {}
    for index, arg in enumerate(args):
        if arg.star:
            return None
        if arg.keyword is None:
            if index >= len(form.positional):
                return None
            role = form.positional[index]
        elif arg.keyword.value == form.axis:
            role = "axis"
        elif arg.keyword.value == form.keep:
            role = "keep"
        else:
            return None
        if role in roles:
            return None
        roles[role] = arg
    return roles


def _exp_sum(model: "ModuleModel", expr: cst.BaseExpression):
    """(family, X, exp function, sum function, roles) for `sum(exp(X), ...)` written out."""
    summed = _sum_call(model, expr)
    if summed is None:
        return None
    operand, args, sum_func, kind = summed
    exp = _exp_call(model, operand)
    if exp is None:
        return None
    family, inner, exp_func = exp
    form = api.SUM_FORMS.get((family, kind))
    if form is None:
        return None
    roles = _reduction(form, args)
    if roles is None:
        return None
    return family, inner, exp_func, sum_func, roles


def _is_none(arg: cst.Arg | None) -> bool:
    return arg is None or (isinstance(arg.value, cst.Name) and arg.value.value == "None")


def _is_true(arg: cst.Arg | None) -> bool:
    return arg is not None and isinstance(arg.value, cst.Name) and arg.value.value == "True"


def _plain_axis(arg: cst.Arg, tuples: bool) -> bool:
    """An axis we can pass on as written: an int, a name, (for reductions) a tuple of them."""
    value = arg.value
    if isinstance(value, cst.UnaryOperation) and isinstance(value.operator, cst.Minus):
        value = value.expression
    if isinstance(value, cst.Name):
        return value.value not in ("None", "True", "False")
    if tuples and isinstance(value, (cst.Tuple, cst.List)):
        return all(_plain_axis(element, False) for element in value.elements)
    return isinstance(value, (cst.Integer, cst.Attribute))


def _is_pure(expr: cst.BaseExpression, depth: int = 0) -> bool:
    """Names, attributes, numbers, subscripts and arithmetic: evaluating it twice gives the
    same value (a call could draw random numbers or run dropout), so one copy may replace two."""
    if depth > 8:
        return False
    if isinstance(expr, (cst.Name, cst.Integer, cst.Float)):
        return True
    if isinstance(expr, cst.Attribute):
        return _is_pure(expr.value, depth + 1)
    if isinstance(expr, cst.UnaryOperation):
        return _is_pure(expr.expression, depth + 1)
    if isinstance(expr, cst.BinaryOperation):
        return _is_pure(expr.left, depth + 1) and _is_pure(expr.right, depth + 1)
    if isinstance(expr, cst.Subscript):
        return _is_pure(expr.value, depth + 1) and all(
            isinstance(element.slice, cst.Index) and _is_pure(element.slice.value, depth + 1)
            for element in expr.slice)
    return False


def _stable_call(model, stable: api.Stable, family: str, inner: cst.BaseExpression, sites,
                 passed: list[cst.Arg], scope, method: bool):
    """`stable(inner, *passed)` spelled for the file, or `inner.method(*passed)` for torch."""
    if method and stable.method is not None:
        return cst.Call(func=cst.Attribute(value=inner, attr=cst.Name(stable.method)),
                        args=passed), ()
    spelled = spell(model, stable.name, tuple(site for site in sites if site is not None),
                    scope, may_import=family not in api.NO_NEW_IMPORTS)
    if spelled is None:
        return None
    return cst.Call(func=spelled[0], args=[cst.Arg(inner), *passed]), spelled[1]


def _keyword(name: str, value: cst.BaseExpression) -> cst.Arg:
    tight = cst.AssignEqual(cst.SimpleWhitespace(""), cst.SimpleWhitespace(""))
    return cst.Arg(value, keyword=cst.Name(name), equal=tight)


def _passed(roles: dict[str, cst.Arg], stable: api.Stable) -> list[cst.Arg]:
    """The sum's axis / keep arguments for the stable function. Every SumForm takes them in
    the stable function's order (axis, then keep), so positional ones stay positional until
    one is left out (an axis of None dropped); after that they become keywords, named as the
    stable function names them."""
    names = {"axis": stable.axis, "keep": stable.keep}
    passed: list[cst.Arg] = []
    in_order = True
    for role in ("axis", "keep"):
        arg = roles.get(role)
        if arg is None:
            in_order = False
        elif arg.keyword is None and in_order:
            passed.append(cst.Arg(arg.value))
        else:
            passed.append(_keyword(names[role], arg.value))
    return passed


def softmax_fix(model: "ModuleModel", division: cst.BinaryOperation, scope: "Scope"
                ) -> Rewrite | None:
    """The fix of `exp(X) / sum(exp(X), axis, keepdims=True)`, or None."""
    if not _one_line(model, division):
        return None
    numerator = _exp_call(model, division.left)
    denominator = _exp_sum(model, division.right)
    if numerator is None or denominator is None:
        return None
    family, inner, exp_func = numerator
    other_family, other_inner, _, sum_func, roles = denominator
    if family != other_family or not inner.deep_equals(other_inner) or not _is_pure(inner):
        return None
    stable = api.SOFTMAX[family]
    axis = roles.get("axis")
    if _is_none(axis):
        if stable.all_axes is None:
            return None
        passed = [_keyword(stable.axis, cst.Name(stable.all_axes))] if stable.all_axes else []
    elif _is_true(roles.get("keep")) and _plain_axis(axis, tuples=False):
        passed = _passed({"axis": axis}, stable)
    else:
        return None  # without keepdims the quotient broadcasts differently from softmax
    built = _stable_call(model, stable, family, inner, (exp_func, sum_func), passed, scope,
                         method=exp_func is None)
    if built is None:
        return None
    return division, _framed(built[0], division), built[1]


def logsumexp_fix(model: "ModuleModel", log_call: cst.Call, scope: "Scope") -> Rewrite | None:
    """The fix of `log(sum(exp(X), axis, keepdims))`, or None."""
    found = _natural_log(model, log_call)
    if found is None or not _one_line(model, log_call):
        return None
    family, argument = found
    summed = _exp_sum(model, argument)
    if summed is None:
        return None
    sum_family, inner, exp_func, sum_func, roles = summed
    if sum_family != family:
        return None
    stable = api.LOGSUMEXP[family]
    axis = roles.get("axis")
    if _is_none(axis):
        if stable.all_axes is None:
            return None
        roles = {role: arg for role, arg in roles.items() if role != "axis"}
    elif not _plain_axis(axis, tuples=True):
        return None
    built = _stable_call(model, stable, family, inner, (exp_func, sum_func, log_call.func),
                         _passed(roles, stable), scope,
                         method=exp_func is None and sum_func is None)
    if built is None:
        return None
    return log_call, _framed(built[0], log_call), built[1]
