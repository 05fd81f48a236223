"""Reasoning about dropout: keep probabilities vs drop rates, masks, calls, evaluation code.

Everything here reads expressions the rules hand over and the statement-level records of
ModuleModel (bindings, class attributes); nothing walks a subtree. Answers that need a
scope's bindings are memoised in `model.memo["dropout"]`.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TYPE_CHECKING, Iterable

import libcst as cst

from nnlint.analysis.api.dropout import (
    BERNOULLI_FUNCTIONS, BERNOULLI_METHODS, DROPOUT_APIS, GRAD_SWITCH_CONTEXTS,
    NO_GRAD_CONTEXTS, TORCH_MODULE_BASES, UNIFORM_RANDOM_FUNCTIONS, UNIFORM_RANDOM_METHODS,
    DropoutApi,
)
from nnlint.analysis.names import dotted_name

if TYPE_CHECKING:
    from nnlint.analysis.model import ClassInfo, ModuleModel
    from nnlint.analysis.walk import WalkContext

KEEP = "keep"
DROP = "drop"

_WORD = re.compile(r"[A-Z]+(?![a-z])|[A-Z]?[a-z]+|\d+")

#: words that name a keep probability (`keep_prob`, `keepRate`, `retain_p`) (common practice)
KEEP_WORDS = frozenset({"keep", "keeping", "kept", "retain", "retention"})
#: words that name a drop rate (`drop_rate`, `dropout`, `hidden_dropout_prob`)
DROP_WORDS = frozenset({"drop", "dropout", "dropping", "pdrop"})
#: bare rate spellings (`self.p`, `rate`): read as a drop rate only next to a dropout
RATE_WORDS = DROP_WORDS | {"p", "rate"}
#: words that make a keep-named value something other than a probability (`keep_mask`)
NOT_A_PROBABILITY = frozenset({
    "mask", "masks", "idx", "index", "indices", "ids", "dims", "dim", "list", "set", "count",
    "num", "n", "top", "k", "topk", "size", "len", "shape", "tokens", "best", "last", "first",
    "checkpoint", "checkpoints", "files", "alive", "going", "cols", "columns", "keys",
})

#: words of functions that evaluate, test or predict (`eval_epoch`, `run_validation`)
EVALUATION_WORDS = frozenset({
    "test", "testing", "eval", "evaluate", "evaluation", "evaluating", "validate",
    "validation", "valid", "val", "predict", "prediction", "predictions", "infer",
    "inference", "score", "scoring",
})
#: words of training code; a name with both (`train_and_evaluate`) is not evaluation code
TRAINING_WORDS = frozenset({"train", "training", "fit"})
#: words that announce Monte-Carlo dropout (Gal and Ghahramani 2016, "Dropout as a Bayesian
#: approximation"), where dropout stays on at prediction on purpose
MONTE_CARLO_WORDS = frozenset({
    "mc", "monte", "montecarlo", "carlo", "uncertainty", "uncertainties", "bayesian", "bayes",
    "stochastic", "epistemic", "mcdropout", "variational",
})
#: words of loop counts that repeat stochastic passes (`range(n_samples)`)
SAMPLE_WORDS = frozenset({"sample", "samples", "passes", "draws", "mc", "repeats",
                          "repetitions", "forward_passes"})
#: words a boolean flag name may hold besides its train/eval word (`is_training`, `train_mode`)
_FLAG_FILLER = frozenset({"is", "in", "do", "mode", "self", "use", "apply", "enable",
                          "enabled", "on", "flag", "phase", "model", "module", "run", "now"})
_TRAIN_FLAG_WORDS = frozenset({"train", "training"})
_EVAL_FLAG_WORDS = frozenset({"eval", "evaluation", "evaluating", "inference", "test",
                              "testing", "predict", "predicting", "deterministic", "val"})
_CAST_METHODS = frozenset({"astype", "float", "double", "half", "to", "type", "int", "bool"})


def identifier_words(name: str) -> frozenset[str]:
    """Lower-case words of an identifier: `keepProb_v2` -> {keep, prob, v, 2}."""
    return frozenset(word.lower() for word in _WORD.findall(name))


def expression_name(expr: cst.BaseExpression) -> str | None:
    """The name a value is known by: `keep`, `self.keep` -> keep, `cfg["keep"]` -> keep."""
    if isinstance(expr, cst.Name):
        return expr.value
    if isinstance(expr, cst.Attribute):
        return expr.attr.value
    if isinstance(expr, cst.Subscript) and len(expr.slice) == 1:
        index = expr.slice[0].slice
        if isinstance(index, cst.Index) and isinstance(index.value, cst.SimpleString):
            return _string(index.value)
    if (isinstance(expr, cst.Call) and isinstance(expr.func, cst.Attribute)
            and expr.func.attr.value == "get" and expr.args
            and isinstance(expr.args[0].value, cst.SimpleString)):
        return _string(expr.args[0].value)
    return None


def _string(node: cst.SimpleString) -> str | None:
    value = node.evaluated_value
    return value if isinstance(value, str) else None


def one_minus(expr: cst.BaseExpression) -> cst.BaseExpression | None:
    """`X` when `expr` is `1 - X` (or `1.0 - X`), else None."""
    if (isinstance(expr, cst.BinaryOperation) and isinstance(expr.operator, cst.Subtract)
            and literal_number(expr.left) == 1.0):
        return expr.right
    return None


def probability_kind(expr: cst.BaseExpression,
                     rate_words: frozenset[str] = DROP_WORDS) -> str | None:
    """KEEP or DROP when the expression's name says which it is (`1 - keep` is DROP)."""
    inner = one_minus(expr)
    if inner is not None:
        kind = probability_kind(inner, rate_words)
        return {KEEP: DROP, DROP: KEEP}.get(kind) if kind else None
    name = expression_name(expr)
    if name is None:
        return None
    words = identifier_words(name)
    if words & NOT_A_PROBABILITY:
        return None
    if words & KEEP_WORDS:
        return KEEP
    if words & rate_words:
        return DROP
    return None


def literal_number(expr: cst.BaseExpression) -> float | None:
    """The value of a numeric literal (`0.5`, `-1`, `1 - 0.2`), else None."""
    if isinstance(expr, (cst.Integer, cst.Float)):
        return float(expr.evaluated_value)
    if isinstance(expr, cst.UnaryOperation) and isinstance(expr.operator, cst.Minus):
        inner = literal_number(expr.expression)
        return -inner if inner is not None else None
    if isinstance(expr, cst.BinaryOperation) and isinstance(expr.operator, cst.Subtract):
        left, right = literal_number(expr.left), literal_number(expr.right)
        if left is not None and right is not None:
            return left - right
    return None


def number_value(model: "ModuleModel", expr: cst.BaseExpression,
                 function: cst.FunctionDef | None, depth: int = 0) -> float | None:
    """The number `expr` holds when a literal reaches it through names, defaults, attributes.

    Follows a name with exactly one binding, a parameter's default, and `self.attr` bound
    once in the class; None when anything is uncertain.
    """
    if depth > 4:
        return None
    value = literal_number(expr)
    if value is not None:
        return value
    inner = one_minus(expr)
    if inner is not None:
        rest = number_value(model, inner, function, depth + 1)
        return None if rest is None else 1.0 - rest
    if isinstance(expr, cst.Name):
        found = model.lookup(expr.value, model.scope_of(function))
        if found is None:
            return None
        scope, bindings = found
        if not bindings:
            default = _parameter_default(scope.node, expr.value)
            return None if default is None else literal_number(default)
        if len(bindings) == 1 and bindings[0].value is not None and bindings[0].index is None:
            owner = scope.node if isinstance(scope.node, cst.FunctionDef) else None
            return number_value(model, bindings[0].value, owner, depth + 1)
        return None
    if isinstance(expr, cst.Attribute) and isinstance(expr.value, cst.Name):
        info = model.class_of_method(function)
        if info is None or expr.value.value != _first_parameter_name(function):
            return None
        bindings = info.attributes.get(expr.attr.value, [])
        if len(bindings) == 1 and bindings[0][0].value is not None:
            binding, method = bindings[0]
            return number_value(model, binding.value, method, depth + 1)
    return None


def _parameter_default(node: cst.CSTNode, name: str) -> cst.BaseExpression | None:
    if not isinstance(node, cst.FunctionDef):
        return None
    params = node.params
    for param in (*params.posonly_params, *params.params, *params.kwonly_params):
        if param.name.value == name:
            return param.default
    return None


def _first_parameter_name(function: cst.FunctionDef | None) -> str | None:
    if function is None:
        return None
    ordered = (*function.params.posonly_params, *function.params.params)
    return ordered[0].name.value if ordered else None


def expression_key(model: "ModuleModel", expr: cst.BaseExpression) -> str:
    """A spelling-insensitive key of an expression: `1.0 - self.p` and `1 - self.p` agree."""
    inner = one_minus(expr)
    if inner is not None:
        return "1-" + expression_key(model, inner)
    written = dotted_name(expr)
    if written is not None:
        return written
    text = model.module.code_for_node(expr)
    return re.sub(r"\s+", "", text).strip("()")


def keep_key(model: "ModuleModel", expr: cst.BaseExpression) -> str | None:
    """The key of a keep probability (`keep`, `self.keep`, `1 - self.p`), else None."""
    if probability_kind(expr, RATE_WORDS) != KEEP:
        return None
    return expression_key(model, expr)


def rate_keep_key(model: "ModuleModel", rate: cst.BaseExpression, is_keep: bool) -> str:
    """The keep-probability key of a dropout's rate argument (`p` gives `1-p`)."""
    if is_keep:
        return expression_key(model, rate)
    inner = one_minus(rate)
    if inner is not None:
        return expression_key(model, inner)
    return "1-" + expression_key(model, rate)


# -- framework dropout calls ----------------------------------------------------------------
@dataclass(frozen=True)
class DropoutCall:
    """A call that constructs or applies a framework dropout."""

    api: DropoutApi
    canonical: str
    #: the call holding the rate (the layer construction, or the function call itself)
    configuration: cst.Call
    #: the call applying dropout to inputs (None for a layer constructed but not applied here)
    application: cst.Call | None


def dropout_call(model: "ModuleModel", call: cst.Call,
                 function: cst.FunctionDef | None) -> DropoutCall | None:
    """The framework dropout `call` is, if any: `F.dropout(x)`, `Dropout(r)(x)`, `self.drop(x)`."""
    canonical = model.canonical(call.func)
    if canonical is not None and canonical in DROPOUT_APIS:
        api = DROPOUT_APIS[canonical]
        return DropoutCall(api, canonical, call, None if api.is_layer else call)
    construction = _layer_construction(model, call.func, function)
    if construction is None:
        return None
    canonical = model.canonical(construction.func)
    if canonical is None:
        return None
    return DropoutCall(DROPOUT_APIS[canonical], canonical, construction, call)


def _layer_construction(model: "ModuleModel", func: cst.BaseExpression,
                        function: cst.FunctionDef | None) -> cst.Call | None:
    """The dropout-layer construction `func` denotes (inline, a local, or `self.attr`)."""
    candidates: list[cst.BaseExpression | None] = []
    if isinstance(func, cst.Call):
        candidates = [func]
    elif isinstance(func, cst.Name):
        found = model.lookup(func.value, model.scope_of(function))
        if found is not None:
            candidates = [binding.value for binding in found[1]]
    elif isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name):
        method = enclosing_method(model, function)
        if method is not None and func.value.value == _first_parameter_name(method):
            info = model.class_of_method(method)
            if info is not None:
                candidates = [binding.value for binding, _ in info.attributes.get(
                    func.attr.value, [])]
    if not candidates or not all(isinstance(value, cst.Call) for value in candidates):
        return None
    kinds = {model.canonical(value.func) for value in candidates}  # type: ignore[union-attr]
    if len(kinds) != 1:
        return None
    kind = next(iter(kinds))
    if kind is None or kind not in DROPOUT_APIS or not DROPOUT_APIS[kind].is_layer:
        return None
    return candidates[0]  # type: ignore[return-value]


def enclosing_method(model: "ModuleModel",
                     function: cst.FunctionDef | None) -> cst.FunctionDef | None:
    """`function` when it is a method, else None (nested functions are handled by callers)."""
    if function is not None and model.class_of_method(function) is not None:
        return function
    return None


def rate_argument(api: DropoutApi, call: cst.Call) -> tuple[cst.BaseExpression, bool] | None:
    """(the rate or keep argument, True when it is a keep probability), or None if absent."""
    for arg in call.args:
        if arg.keyword is None:
            continue
        if arg.keyword.value == api.rate_keyword:
            return arg.value, False
        if arg.keyword.value == api.keep_keyword:
            return arg.value, True
    positional = _positional(call, api.position)
    if positional is not None:
        return positional, api.position_is_keep
    return None


def switch_argument(api: DropoutApi, call: cst.Call) -> cst.Arg | None:
    """The argument that switches dropping on or off (`training=`), None when absent."""
    for arg in call.args:
        if arg.keyword is not None and arg.keyword.value == api.switch_keyword:
            return arg
    if api.switch_position is None:
        return None
    positional = [arg for arg in call.args if arg.keyword is None and not arg.star]
    if len(positional) > api.switch_position:
        return positional[api.switch_position]
    return None


def has_unpacked_arguments(call: cst.Call) -> bool:
    """True for `f(*args)` / `f(**kwargs)`: what they hold is unknown."""
    return any(arg.star for arg in call.args)


def _positional(call: cst.Call, position: int | None) -> cst.BaseExpression | None:
    if position is None:
        return None
    for index, arg in enumerate(call.args):
        if arg.keyword is not None or arg.star:
            return None
        if index == position:
            return arg.value
    return None


def is_literal_bool(expr: cst.BaseExpression, value: bool) -> bool:
    return isinstance(expr, cst.Name) and expr.value == ("True" if value else "False")


# -- hand-written masks ----------------------------------------------------------------------
def is_mask_expression(model: "ModuleModel", expr: cst.BaseExpression, depth: int = 0) -> bool:
    """True for a random keep mask: `rng.random(shape) < keep`, `bernoulli(key, keep, shape)`."""
    if depth > 3:
        return False
    if isinstance(expr, cst.Call):
        func = expr.func
        if isinstance(func, cst.Attribute) and func.attr.value in _CAST_METHODS:
            return is_mask_expression(model, func.value, depth + 1)
        return _is_draw(model, expr, BERNOULLI_FUNCTIONS, BERNOULLI_METHODS)
    if isinstance(expr, cst.Comparison):
        sides = [expr.left, *(target.comparator for target in expr.comparisons)]
        return any(isinstance(side, cst.Call)
                   and _is_draw(model, side, UNIFORM_RANDOM_FUNCTIONS, UNIFORM_RANDOM_METHODS)
                   for side in sides)
    if isinstance(expr, cst.BinaryOperation) and isinstance(expr.operator, cst.Multiply):
        return (is_mask_expression(model, expr.left, depth + 1)
                or is_mask_expression(model, expr.right, depth + 1))
    return False


def _is_draw(model: "ModuleModel", call: cst.Call, functions: frozenset[str],
             methods: frozenset[str]) -> bool:
    canonical = model.canonical(call.func)
    if canonical is not None:
        return canonical in functions
    return isinstance(call.func, cst.Attribute) and call.func.attr.value in methods


def function_has_mask(model: "ModuleModel", function: cst.FunctionDef | None) -> bool:
    """True when the function binds a random keep mask to a name or attribute."""
    if function is None:
        return False
    memo = model.memo.setdefault("dropout.mask", {})
    key = id(function)
    if key not in memo:
        values = [binding.value for bindings in model.scope_of(function).bindings.values()
                  for binding in bindings]
        info = model.class_of_method(function)
        if info is not None:
            values += [binding.value for bindings in info.attributes.values()
                       for binding, method in bindings if method is function]
        memo[key] = any(value is not None and is_mask_expression(model, value)
                        for value in values)
    return memo[key]


def mentions_mask(model: "ModuleModel", expr: cst.BaseExpression) -> bool:
    """True when a product holds a mask inline (`h * (rng.random(h.shape) < keep)`)."""
    if is_mask_expression(model, expr):
        return True
    if isinstance(expr, cst.BinaryOperation) and isinstance(expr.operator, cst.Multiply):
        return mentions_mask(model, expr.left) or mentions_mask(model, expr.right)
    return False


# -- where the code runs: train or eval path, evaluation functions, Monte-Carlo dropout -------
def flag_meaning(test: cst.BaseExpression) -> str | None:
    """"train" when a condition holds in training (`self.training`), "eval" for the reverse."""
    if isinstance(test, cst.UnaryOperation) and isinstance(test.operator, cst.Not):
        return _flip(flag_meaning(test.expression))
    if isinstance(test, cst.Comparison) and len(test.comparisons) == 1:
        target = test.comparisons[0]
        negated = isinstance(target.operator, (cst.IsNot, cst.NotEqual))
        if isinstance(target.operator, (cst.Is, cst.IsNot, cst.Equal, cst.NotEqual)):
            meaning = _compared_meaning(test.left, target.comparator)
            return _flip(meaning) if negated else meaning
        return None
    name = expression_name(test)
    if name is None or isinstance(test, cst.Call):
        return None
    words = identifier_words(name)
    if words & _TRAIN_FLAG_WORDS and words <= _FLAG_FILLER | _TRAIN_FLAG_WORDS:
        return "train"
    if words & _EVAL_FLAG_WORDS and words <= _FLAG_FILLER | _EVAL_FLAG_WORDS:
        return "eval"
    return None


def _compared_meaning(left: cst.BaseExpression, right: cst.BaseExpression) -> str | None:
    if is_literal_bool(right, True):
        return flag_meaning(left)
    if is_literal_bool(right, False):
        return _flip(flag_meaning(left))
    if isinstance(right, cst.SimpleString):
        text = _string(right) or ""
        words = identifier_words(text)
        if words & _TRAIN_FLAG_WORDS:
            return "train"
        if words & (_EVAL_FLAG_WORDS | {"valid", "validation"}):
            return "eval"
    return None


def _flip(meaning: str | None) -> str | None:
    return {"train": "eval", "eval": "train"}.get(meaning) if meaning else None


def branch_meanings(context: "WalkContext", node: cst.CSTNode) -> list[str]:
    """Meanings ("train"/"eval") of the branches `node` (being visited) sits in, in its function."""
    ancestors = [*context.ancestors, node]
    start = 0
    for index in range(len(ancestors) - 1, -1, -1):
        if isinstance(ancestors[index], (cst.FunctionDef, cst.Lambda)):
            start = index
            break
    meanings = []
    for index in range(start, len(ancestors) - 1):
        branch, child = ancestors[index], ancestors[index + 1]
        if not isinstance(branch, (cst.If, cst.IfExp)) or child is branch.test:
            continue
        meaning = flag_meaning(branch.test)
        if meaning is None:
            continue
        meanings.append(meaning if child is branch.body else _flip(meaning) or "")
    return meanings


def branch_path(context: "WalkContext", node: cst.CSTNode) -> tuple[tuple[int, bool], ...]:
    """(id of each enclosing if, True in its body / False in its else) in `node`'s function."""
    ancestors = [*context.ancestors, node]
    path: list[tuple[int, bool]] = []
    for index in range(len(ancestors) - 1):
        branch, child = ancestors[index], ancestors[index + 1]
        if isinstance(branch, (cst.FunctionDef, cst.Lambda)):
            path = []
        elif isinstance(branch, (cst.If, cst.IfExp)) and child is not branch.test:
            path.append((id(branch), child is branch.body))
    return tuple(path)


def is_evaluation_function(name: str) -> bool:
    """True for names of evaluation code: `evaluate`, `eval_epoch`, `run_validation`, `predict`."""
    words = identifier_words(name)
    return bool(words & EVALUATION_WORDS) and not words & TRAINING_WORDS


def is_test_case(function: cst.FunctionDef, class_name: str | None, path: str) -> bool:
    """True for unit tests (`test_*` in a test file or a `Test*` class): they force modes."""
    if not function.name.value.startswith("test_"):
        return False
    base = re.split(r"[\\/]", path)[-1]
    return (base.startswith("test_") or base.endswith("_test.py") or base == "tests.py"
            or (class_name or "").startswith("Test"))


def evaluation_function(model: "ModuleModel",
                        context: "WalkContext") -> cst.FunctionDef | None:
    """The enclosing function that is evaluation code (by name or no-grad decorator)."""
    for function in reversed(context.functions):
        info = model.class_of_method(function)
        if is_test_case(function, info.name if info else None, model.path):
            return None
        if is_evaluation_function(function.name.value) or any(
                _is_no_grad(model, decorator.decorator) for decorator in function.decorators):
            return function
    return None


def no_grad_block(model: "ModuleModel", context: "WalkContext") -> cst.With | None:
    """The innermost enclosing `with torch.no_grad():` (or inference_mode) in the function."""
    for block in reversed(context.blocks):
        if isinstance(block, (cst.FunctionDef, cst.Lambda, cst.ClassDef)):
            return None
        if isinstance(block, cst.With) and any(_is_no_grad(model, item.item)
                                               for item in block.items):
            return block
    return None


def _is_no_grad(model: "ModuleModel", expr: cst.BaseExpression) -> bool:
    func = expr.func if isinstance(expr, cst.Call) else expr
    canonical = model.canonical(func)
    if canonical in NO_GRAD_CONTEXTS:
        return True
    return (canonical in GRAD_SWITCH_CONTEXTS and isinstance(expr, cst.Call)
            and bool(expr.args) and is_literal_bool(expr.args[0].value, False))


def is_monte_carlo_context(model: "ModuleModel", context: "WalkContext") -> bool:
    """True where Monte-Carlo dropout is evidently meant: MC names, loops of repeated passes."""
    names = [function.name.value for function in context.functions]
    names += [info.name.value for info in context.classes]
    for function in context.functions:
        params = function.params
        names += [param.name.value for param in (*params.params, *params.kwonly_params)
                  if identifier_words(param.name.value) & SAMPLE_WORDS]
    if any(identifier_words(name) & MONTE_CARLO_WORDS for name in names):
        return True
    if any(identifier_words(name) & SAMPLE_WORDS for name in names):
        return True
    return any(_is_sampling_loop(node) for node in context.ancestors)


def _is_sampling_loop(node: cst.CSTNode) -> bool:
    loops: Iterable[tuple[cst.BaseExpression, cst.BaseExpression]] = ()
    if isinstance(node, cst.For):
        loops = [(node.target, node.iter)]
    elif isinstance(node, (cst.ListComp, cst.GeneratorExp, cst.SetComp, cst.DictComp)):
        loops, clause = [], node.for_in
        while clause is not None:
            loops.append((clause.target, clause.iter))
            clause = clause.inner_for_in
    for target, iterable in loops:
        spelled = [expression_name(target) or ""]
        if isinstance(iterable, cst.Call) and expression_name(iterable.func) == "range":
            spelled += [expression_name(arg.value) or "" for arg in iterable.args]
        if any(identifier_words(name) & SAMPLE_WORDS for name in spelled):
            return True
    return False


def torch_module_method(model: "ModuleModel",
                        context: "WalkContext") -> tuple[cst.FunctionDef, "ClassInfo"] | None:
    """The method of a PyTorch module class the walk is in (nested functions included).

    The outermost function of the class body is the method: the model also files functions
    nested in a method under the class.
    """
    for function in context.functions:
        info = model.class_of_method(function)
        if info is None:
            continue
        if not _first_parameter_name(function) or any(
                dotted_name(decorator.decorator) in ("staticmethod", "classmethod")
                for decorator in function.decorators):
            return None
        if model.is_subclass_of(info, TORCH_MODULE_BASES):
            return function, info
        return None
    return None


def self_name_at(model: "ModuleModel", context: "WalkContext",
                 method: cst.FunctionDef) -> str | None:
    """The name the walk's position reaches `method`'s instance by (its first parameter).

    None when the method rebinds it, or a nested function or lambda on the way shadows it.
    """
    name = _first_parameter_name(method)
    if name is None or model.scope_of(method).bindings.get(name):
        return None
    inside = False
    for block in context.blocks:
        if block is method:
            inside = True
        elif inside and isinstance(block, (cst.FunctionDef, cst.Lambda)):
            params = block.params
            shadowing = {param.name.value for param in (
                *params.posonly_params, *params.params, *params.kwonly_params)}
            shadowing |= {star.name.value for star in (params.star_arg, params.star_kwarg)
                          if isinstance(star, cst.Param)}
            if name in shadowing or (isinstance(block, cst.FunctionDef)
                                     and model.scope_of(block).bindings.get(name)):
                return None
    return name if inside else None
