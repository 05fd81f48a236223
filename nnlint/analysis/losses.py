"""Loss pairing: which loss a call computes, what it expects, and what it is given.

A loss is recognised three ways: a loss function called directly (`F.cross_entropy(x, y)`,
`optax.softmax_cross_entropy(logits, labels)`), a criterion object called (`criterion(x, y)`
with `criterion = nn.CrossEntropyLoss()`, `self.loss_fn = keras.losses...`, followed through
the bindings of ModuleModel), and a Keras `model.compile(loss=...)` (an object, a function or
a string). The consequence numbers of feeding a loss the wrong kind of input are computed here
(with `math`, from the formulas cited beside each) so the rules only format them.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import libcst as cst

from nnlint.analysis.api.losses import (
    INLINE_NORMALISER_METHODS, INLINE_NORMALISER_MODULES, INLINE_NORMALISERS, LOSS_CLASS_AXIS,
    Normaliser, CLASS_COUNT_ARGUMENTS, KERAS_COMPILE, KERAS_COMPILE_LOSS_POSITION, KERAS_EPSILON,
    KERAS_LOSS_CLASSES, KERAS_LOSS_STRINGS, LAYER_PREFIXES, LOSS_CLASSES, LOSS_FUNCTIONS,
    STACK_EDIT_METHODS, Expects, LossSpec,
)
from nnlint.analysis.api.numerics import FORWARD_METHODS, MODULE_PRESERVING_METHODS
from nnlint.analysis.loops import bound_values
from nnlint.analysis.summary import register_summariser
from nnlint.analysis.values import Fact, Kind, constant_value, fact_of, reaching_values

if TYPE_CHECKING:
    from nnlint.analysis.model import ClassInfo, ModuleModel
    from nnlint.analysis.summary import ModuleSummary

#: packages whose files may compile a Keras model
KERAS_PACKAGES = frozenset({"tensorflow", "keras", "tf_keras"})


@dataclass(frozen=True)
class LossUse:
    """One computation of a loss: what it expects and which argument is the prediction."""

    spec: LossSpec
    #: what the prediction must be, after Keras's `from_logits`
    expects: Expects
    #: the prediction argument (None for `compile`, where the model's output is the input)
    prediction: cst.BaseExpression | None
    #: the loss as a reader knows it: `CrossEntropyLoss`, `F.cross_entropy`, ...
    label: str
    #: True when Keras's from_logits was left at its default (False)
    from_logits_default: bool = False
    #: the call that configures the loss: the function call, or the loss object's construction
    configured: cst.Call | None = None
    #: canonical name of the loss function or class (`torch.nn.CrossEntropyLoss`)
    canonical: str = ""


def loss_of_call(model: "ModuleModel", call: cst.Call,
                 function: cst.FunctionDef | None) -> LossUse | None:
    """The loss `call` computes, or None (unknown callee, or a from_logits we cannot read)."""
    func = call.func
    names = model.resolve(func)
    if names:
        specs = {LOSS_FUNCTIONS.get(name) for name in names}
        if len(specs) != 1 or None in specs:
            return None
        spec = specs.pop()
        label = model.module.code_for_node(func)
        return _use(spec, call, call, label, constructed=False, canonical=min(names))
    built = _constructions(model, func, function)
    if built is None:
        return None
    uses = []
    for spec, construction in built:
        label = model.module.code_for_node(construction.func).rpartition(".")[2]
        uses.append(_use(spec, construction, call, label, constructed=True,
                         canonical=min(model.resolve(construction.func))))
    if None in uses or len({(use.spec, use.expects) for use in uses}) != 1:
        return None  # bound to different losses, or configured differently
    return uses[0]


def keras_compiled_loss(model: "ModuleModel", call: cst.Call,
                        function: cst.FunctionDef | None
                        ) -> tuple[LossUse, cst.BaseExpression, cst.BaseExpression] | None:
    """(loss, the model compiled, the loss argument) of a Keras `model.compile(loss=...)`."""
    func = call.func
    if not isinstance(func, cst.Attribute) or func.attr.value != KERAS_COMPILE:
        return None
    if not any(module.split(".")[0] in KERAS_PACKAGES for module in model.names.imported_modules):
        return None
    argument = _argument(call, KERAS_COMPILE_LOSS_POSITION, ("loss",))
    if argument is None:
        return None
    value = argument
    for _ in range(3):  # a name bound to the loss, itself perhaps bound to a name
        values = bound_values(model, value, function) if isinstance(
            value, (cst.Name, cst.Attribute)) and not model.resolve(value) else []
        if len(values) != 1:
            break
        value = values[0]
    use = _compiled(model, value, function)
    if use is None:
        return None
    return use, func.value, argument


def _compiled(model: "ModuleModel", value: cst.BaseExpression,
              function: cst.FunctionDef | None) -> LossUse | None:
    if isinstance(value, cst.SimpleString):
        text = value.evaluated_value
        spec = KERAS_LOSS_STRINGS.get(text) if isinstance(text, str) else None
        if spec is None:
            return None
        return LossUse(spec, Expects.PROB, None, f'loss="{text}"', from_logits_default=True)
    if isinstance(value, cst.Call):
        names = model.resolve(value.func)
        specs = {KERAS_LOSS_CLASSES.get(name) for name in names}
        if len(specs) != 1 or None in specs:
            return None
        spec = specs.pop()
        label = model.module.code_for_node(value.func).rpartition(".")[2]
        return _use(spec, value, None, label, constructed=True)
    names = model.resolve(value)
    specs = {LOSS_FUNCTIONS.get(name) for name in names}
    if len(specs) == 1 and None not in specs:
        spec = specs.pop()
        if spec.has_from_logits:  # a function passed by reference runs with its defaults
            label = model.module.code_for_node(value)
            return LossUse(spec, spec.expects, None, label, from_logits_default=True)
    return None


def _constructions(model: "ModuleModel", func: cst.BaseExpression,
                   function: cst.FunctionDef | None) -> list[tuple[LossSpec, cst.Call]] | None:
    """(spec, construction) of every value `func` may hold, when each is a loss object."""
    if isinstance(func, cst.Call):
        built = [func]
    elif isinstance(func, (cst.Name, cst.Attribute)):
        built = bound_values(model, func, function)
    else:
        return None
    if not built:
        return None
    found = []
    for value in built:
        if not isinstance(value, cst.Call):
            return None
        specs = {LOSS_CLASSES.get(name) for name in model.resolve(value.func)}
        if len(specs) != 1 or None in specs:
            return None
        found.append((specs.pop(), value))
    return found


def _use(spec: LossSpec, configured: cst.Call, call: cst.Call | None, label: str,
         constructed: bool, canonical: str = "") -> LossUse | None:
    """The LossUse of `call`, with from_logits read from `configured` (None: unreadable).

    `configured` is the loss object's construction (`constructed`) or the function call.
    """
    prediction = _argument(call, spec.position, spec.keywords) if call is not None else None
    if call is not None and prediction is None:
        return None
    if not spec.has_from_logits:
        return LossUse(spec, spec.expects, prediction, label, configured=configured,
                       canonical=canonical)
    flag = _from_logits(configured, spec, constructed)
    if flag is None:
        return None
    value, is_default = flag
    expects = Expects.LOGITS if value else spec.expects
    if value:
        label = f"{label}(from_logits=True)"
    return LossUse(spec, expects, prediction, label, from_logits_default=is_default,
                   configured=configured, canonical=canonical)


def _from_logits(call: cst.Call, spec: LossSpec,
                 constructed: bool) -> tuple[bool, bool] | None:
    """(from_logits, left at its default) of a Keras loss call; None when not a literal.

    A construction takes from_logits among its own parameters, a function after y_pred.
    """
    position = spec.class_from_logits_position if constructed else spec.from_logits_position
    positional = 0
    for arg in call.args:
        if arg.star:
            return None  # `**config` may set it
        if arg.keyword is None:
            if positional == position:
                return _literal_bool(arg.value)
            positional += 1
        elif arg.keyword.value == "from_logits":
            return _literal_bool(arg.value)
    return False, True


def _literal_bool(expr: cst.BaseExpression) -> tuple[bool, bool] | None:
    if isinstance(expr, cst.Name) and expr.value in ("True", "False"):
        return expr.value == "True", False
    return None


def _argument(call: cst.Call, position: int,
              keywords: tuple[str, ...]) -> cst.BaseExpression | None:
    index = 0
    for arg in call.args:
        if arg.star:
            return None
        if arg.keyword is not None:
            if arg.keyword.value in keywords:
                return arg.value
            continue
        if index == position:
            return arg.value
        index += 1
    return None


def edits_layer_stacks(model: "ModuleModel") -> bool:
    """True when some statement of the file appends a layer to a built model.

    Value facts read a stack's last layer from its constructor; `model.add(Activation(...))`
    later makes that reading wrong, so raw-score verdicts on models are not trusted here.
    """
    memo = model.memo.setdefault("losses", {})
    if "edits" not in memo:
        memo["edits"] = _edits_in(model, model.module.body, 0)
    return memo["edits"]


def _edits_in(model: "ModuleModel", body, depth: int) -> bool:
    if depth > 20:  # common practice: real code nests far less; deeper means "unknown"
        return True
    for statement in body:
        if isinstance(statement, cst.SimpleStatementLine):
            for small in statement.body:
                if isinstance(small, cst.Expr) and _is_stack_edit(model, small.value):
                    return True
        elif isinstance(statement, cst.BaseCompoundStatement):
            for block in _blocks(statement):
                if isinstance(block, cst.IndentedBlock) and _edits_in(model, block.body,
                                                                      depth + 1):
                    return True
    return False


def _blocks(statement: cst.BaseCompoundStatement) -> list[cst.BaseSuite]:
    blocks = [statement.body]
    if isinstance(statement, (cst.Try, cst.TryStar)):
        blocks += [handler.body for handler in statement.handlers]
        blocks += [part.body for part in (statement.orelse, statement.finalbody) if part]
    elif isinstance(statement, (cst.For, cst.While)) and statement.orelse is not None:
        blocks.append(statement.orelse.body)
    elif isinstance(statement, cst.If):
        orelse = statement.orelse
        while orelse is not None:
            blocks.append(orelse.body)
            orelse = orelse.orelse if isinstance(orelse, cst.If) else None
    elif isinstance(statement, cst.Match):
        blocks += [case.body for case in statement.cases]
    return blocks


def _is_stack_edit(model: "ModuleModel", expr: cst.BaseExpression) -> bool:
    if not isinstance(expr, cst.Call) or not isinstance(expr.func, cst.Attribute):
        return False
    if expr.func.attr.value not in STACK_EDIT_METHODS:
        return False
    for arg in expr.args:
        value = arg.value
        if isinstance(value, cst.Call) and any(name.startswith(LAYER_PREFIXES)
                                               for name in model.resolve(value.func)):
            return True
    return False


# -- consequences ------------------------------------------------------------------------------
def double_softmax_ceiling(classes: int) -> float:
    """Largest probability softmax can give to inputs that all lie in [0, 1].

    The spread of the inputs is at most 1, so the top class gets at most
    e / (e + (C - 1)) (softmax definition; checked with numpy in the reference tests).
    """
    return math.e / (math.e + classes - 1)


def double_softmax_floor(classes: int) -> float:
    """The smallest cross-entropy a second softmax allows: -log of the ceiling."""
    return -math.log(double_softmax_ceiling(classes))


def double_sigmoid_range() -> tuple[float, float]:
    """sigmoid of a probability lies in [sigmoid(0), sigmoid(1)] = [0.5, 0.731]."""
    return 0.5, 1.0 / (1.0 + math.exp(-1.0))


def keras_clip_floor_loss() -> float:
    """-log(eps): the loss of a clipped prediction on the wrong side, with zero gradient."""
    return -math.log(KERAS_EPSILON)


# -- how many classes a probability covers -----------------------------------------------------
def class_count(model: "ModuleModel", fact: Fact, function: cst.FunctionDef | None,
                prediction: cst.BaseExpression | None = None) -> int | None:
    """The number of classes of a softmax output, when its layer's width is visible.

    Without the producing call (`fact.origin`: the softmax was applied in another module),
    `prediction` is followed to a model built from the tree and that module's summary.
    """
    origin = fact.origin
    if not isinstance(origin, cst.Call):
        return _exported_count(model, prediction, function) if prediction is not None else None
    owner = _owner_of(model, origin, function)
    width = _layer_width(model, origin, owner)
    if width is not None:
        return width
    scores = _softmax_input(model, origin)
    for _ in range(4):  # scores -> a name -> the layer call that made them
        if scores is None:
            return None
        if isinstance(scores, cst.Name):
            values = reaching_values(model, scores, owner)
            scores = values[0] if values and len(values) == 1 else None
            continue
        if isinstance(scores, cst.Call):
            layers = [scores.func] if isinstance(scores.func, cst.Call) else \
                bound_values(model, scores.func, owner)
            widths = {_layer_width(model, layer, owner) for layer in layers}
            if len(widths) == 1:
                return widths.pop()
        return None
    return None


def _softmax_input(model: "ModuleModel", call: cst.Call) -> cst.BaseExpression | None:
    if model.resolve(call.func):
        return _argument(call, 0, ("input", "x", "logits"))
    if isinstance(call.func, cst.Attribute):
        return call.func.value  # `scores.softmax(-1)`
    return None


def _layer_width(model: "ModuleModel", layer: cst.BaseExpression,
                 function: cst.FunctionDef | None) -> int | None:
    if not isinstance(layer, cst.Call):
        return None
    names = model.resolve(layer.func)
    places = {CLASS_COUNT_ARGUMENTS.get(name) for name in names}
    if len(places) != 1 or None in places:
        return None
    position, keyword = places.pop()
    width = _argument(layer, position, (keyword,))
    if width is None:
        return None
    return _count(model, width, function)


def _count(model: "ModuleModel", expr: cst.BaseExpression,
           function: cst.FunctionDef | None) -> int | None:
    value = constant_value(model, expr, function)
    if value is None and function is not None:
        value = constant_value(model, expr, None)
    if value is None and isinstance(expr, cst.Call) and isinstance(expr.func, cst.Name) \
            and expr.func.value == "len" and len(expr.args) == 1:
        listed = expr.args[0].value
        for scope_function in (function, None):
            if not isinstance(listed, cst.Name):
                break
            values = reaching_values(model, listed, scope_function)
            if values and len(values) == 1 and isinstance(values[0], (cst.Tuple, cst.List)):
                return len(values[0].elements)
    if value is None or value != int(value) or value < 2:
        return None
    return int(value)


def _owner_of(model: "ModuleModel", node: cst.CSTNode,
              function: cst.FunctionDef | None) -> cst.FunctionDef | None:
    """The function whose body returns or binds `node` directly (else `function`)."""
    candidates = [function, *model.functions.values(),
                  *(method for info in model.classes.values() for method in info.methods.values())]
    for candidate in candidates:
        scope = model.scope_of(candidate)
        if scope.node is not candidate and candidate is not None:
            continue
        if any(value is node for value in scope.returns):
            return candidate
        for bindings in scope.bindings.values():
            if any(binding.value is node for binding in bindings):
                return candidate
    return function


# -- class counts across modules -----------------------------------------------------------
def _instance_count(model: "ModuleModel", info: "ClassInfo") -> int | None:
    """The class count of what calling an instance of `info` returns (its forward)."""
    forward = next((info.methods[name] for name in FORWARD_METHODS if name in info.methods),
                   None)
    if forward is None:
        return None
    scope = model.scope_of(forward)
    counts = set()
    for value in scope.returns:
        fact = fact_of(model, value, forward)
        if fact.kind is not Kind.PROB:
            return None
        counts.add(class_count(model, fact, forward))
    return counts.pop() if len(counts) == 1 else None


def _constructed_class(model: "ModuleModel", expr: cst.BaseExpression) -> "ClassInfo | None":
    """The local class `expr` builds: `Net()`, `Net().to(device)`, `Net().eval()`."""
    for _ in range(4):
        if not isinstance(expr, cst.Call):
            return None
        func = expr.func
        if isinstance(func, cst.Attribute) and func.attr.value in MODULE_PRESERVING_METHODS:
            expr = func.value
            continue
        if isinstance(func, cst.Name):
            return model.classes.get(func.value)
        return None
    return None


@register_summariser
def _summarise_class_counts(model: "ModuleModel", summary: "ModuleSummary") -> None:
    """Export class counts: "c" for a class's instances, "i<k>c" for a function's results."""
    for name, info in model.classes.items():
        count = _instance_count(model, info)
        if count is not None:
            summary.facts[f"losses:{name}"] = json.dumps({"c": count})
    for name, function in model.functions.items():
        slots = {}
        for value in model.scope_of(function).returns:
            elements = value.elements if isinstance(value, (cst.Tuple, cst.List)) else None
            built = [element.value for element in elements] if elements else [value]
            for position, element in enumerate(built):
                info = _constructed_class(model, element)
                count = _instance_count(model, info) if info is not None else None
                if count is not None:
                    slots[f"i{position}c" if elements else "c"] = count
        if slots:
            summary.facts[f"losses:{name}"] = json.dumps(slots, sort_keys=True)


def _exported_count(model: "ModuleModel", prediction: cst.BaseExpression,
                    function: cst.FunctionDef | None) -> int | None:
    """Follow `probs = net(x)`, `net, _ = build()` to a summary of another tree module."""
    if model.project is None:
        return None
    if isinstance(prediction, cst.Name):
        values = reaching_values(model, prediction, function)
        if not values or len(values) != 1:
            return None
        prediction = values[0]
    if not isinstance(prediction, cst.Call) or not isinstance(prediction.func, cst.Name):
        return None
    found = model.lookup(prediction.func.value, model.scope_of(function))
    if found is None or len(found[1]) != 1 or found[1][0].value is None:
        return None
    binding = found[1][0]
    built = binding.value
    slot = "c" if binding.index is None else f"i{binding.index}c"
    while (isinstance(built, cst.Call) and isinstance(built.func, cst.Attribute)
           and built.func.attr.value in MODULE_PRESERVING_METHODS):
        built = built.func.value
    if not isinstance(built, cst.Call):
        return None
    canonical = model.canonical(built.func)
    if canonical is None:
        return None
    text = model.project.exported_fact(canonical, "losses", model)
    if not text:
        return None
    count = json.loads(text).get(slot)
    return count if isinstance(count, int) else None


# -- an inline softmax/sigmoid whose removal hands the loss its logits ---------------------------
def inline_normaliser_input(model: "ModuleModel", use: LossUse, call: cst.Call
                            ) -> cst.BaseExpression | None:
    """The logits inside `use.prediction` when it is the loss's own activation written inline.

    `F.cross_entropy(F.softmax(scores, dim=1), y)` gives `scores`: the loss applies that
    softmax itself, over the same axis, so passing `scores` computes what the code meant.
    The input is returned whatever it is (`scores / temperature` too: those are the
    logits the softmax normalised). None when the activation differs from the loss's, the
    frameworks differ, the axis is not the loss's class axis or cannot be read, the call has
    other arguments (`dtype=` would change the arithmetic), or the loss sets its own axis.
    """
    prediction = use.prediction
    framework = use.canonical.split(".")[0]
    if not isinstance(prediction, cst.Call) or framework not in LOSS_CLASS_AXIS:
        return None
    found = _normaliser_call(model, prediction)
    if found is None:
        return None
    normaliser, normaliser_framework, logits, axis = found
    if normaliser.activation != use.spec.activation or normaliser_framework != framework:
        return None
    if normaliser.axis_keyword is not None:
        number = normaliser.default_axis if axis is None else _literal_int(axis)
        if number is None or number != LOSS_CLASS_AXIS[framework]:
            return None
    if framework == "tensorflow" and not _loss_uses_last_axis(use, call):
        return None
    return logits


def _normaliser_call(model: "ModuleModel", call: cst.Call
                     ) -> tuple[Normaliser, str, cst.BaseExpression, cst.BaseExpression | None
                                ] | None:
    """(normaliser, framework, input, axis argument or None) of an inline softmax/sigmoid."""
    canonical = model.canonical(call.func)
    if canonical in INLINE_NORMALISERS:
        normaliser = INLINE_NORMALISERS[canonical]
        keywords = {keyword: 0 for keyword in normaliser.input_keywords}
        if normaliser.axis_keyword is not None:
            keywords[normaliser.axis_keyword] = 1
        arguments = _only_arguments(call, keywords)
        if arguments is None or 0 not in arguments:
            return None
        return normaliser, canonical.split(".")[0], arguments[0], arguments.get(1)
    func = call.func
    if isinstance(func, cst.Call) and model.canonical(func.func) in INLINE_NORMALISER_MODULES:
        normaliser = INLINE_NORMALISER_MODULES[model.canonical(func.func)]
        keywords = {normaliser.axis_keyword: 0} if normaliser.axis_keyword else {}
        built = _only_arguments(func, keywords)
        if built is None or len(call.args) != 1 or call.args[0].keyword is not None or \
                call.args[0].star:
            return None
        return normaliser, "torch", call.args[0].value, built.get(0)
    if isinstance(func, cst.Attribute) and func.attr.value in INLINE_NORMALISER_METHODS \
            and not model.resolve(func):
        normaliser = INLINE_NORMALISER_METHODS[func.attr.value]
        keywords = {normaliser.axis_keyword: 0} if normaliser.axis_keyword else {}
        arguments = _only_arguments(call, keywords)
        if arguments is None:
            return None
        return normaliser, "torch", func.value, arguments.get(0)
    return None


def _only_arguments(call: cst.Call,
                    keywords: dict[str, int]) -> dict[int, cst.BaseExpression] | None:
    """Position -> argument, when every argument is one of `keywords` (name -> position)."""
    found: dict[int, cst.BaseExpression] = {}
    positions = len(set(keywords.values()))
    positional = 0
    for arg in call.args:
        if arg.star:
            return None
        if arg.keyword is None:
            if positional >= positions:
                return None
            found[positional] = arg.value
            positional += 1
        elif arg.keyword.value in keywords and keywords[arg.keyword.value] not in found:
            found[keywords[arg.keyword.value]] = arg.value
        else:
            return None
    return found


def _literal_int(expr: cst.BaseExpression) -> int | None:
    if isinstance(expr, cst.Integer):
        return int(expr.value)
    if isinstance(expr, cst.UnaryOperation) and isinstance(expr.operator, cst.Minus) and \
            isinstance(expr.expression, cst.Integer):
        return -int(expr.expression.value)
    return None


def _loss_uses_last_axis(use: LossUse, call: cst.Call) -> bool:
    """True when a TensorFlow/Keras loss keeps its default axis (-1) for the classes.

    `axis=` must be absent or -1, and no positional argument may reach the place where an
    axis (or a label smoothing, which the softmax does not change but we do not judge) sits.
    """
    configured = use.configured
    if configured is None:
        return False
    spec = use.spec
    if spec.has_from_logits:
        last = spec.from_logits_position if configured is call else \
            spec.class_from_logits_position
    else:
        last = spec.position
    if last is None:
        return False
    for checked in {id(configured): configured, id(call): call}.values():
        for arg in checked.args:
            if arg.keyword is not None and arg.keyword.value == "axis" and \
                    _literal_int(arg.value) != -1:
                return False
    positional = [arg for arg in configured.args if arg.keyword is None]
    return not any(arg.star for arg in configured.args) and len(positional) <= last + 1
