"""Layer stacks read from a module's records, for the step-0 simulation of signal.py.

Where a network's structure is visible statically it becomes a `signal.Stack`:
`nn.Sequential(...)` / Keras `Sequential([...])` literals (nested, or built from a list),
module classes whose `__init__` (or `setup`) defines layers and whose `forward` (`__call__`,
`call`) chains them, Flax `nn.Dense(...)(x)` chains, Keras functional chains, and
hand-written NumPy/JAX MLPs (`x @ self.W1 + self.b1`, `np.dot`). The forward body is read
statement by statement by a small symbolic evaluator: a value is either the flowing tensor
(derived from the input through the layers applied so far) or something else; anything
that merges two flows (a residual sum, a concatenation, a gate) or applies a layer
conditionally ends the attempt, and the network gets no stack. Inits come from the layer
defaults (api/init.py), `kernel_initializer=`/`kernel_init=`, array constructors, and
init statements: `nn.init.*_(...)`, `w.data.zero_()`/`fill_`, `self.apply(fn)` or
`model.apply(fn)` with `isinstance` guards, `for m in self.modules()` loops.

Where no stack can be read, `WeightGroup`s list the weights a class or function creates,
for the rules' cautious fallback.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable

import libcst as cst

from nnlint.analysis.api import init as api
from nnlint.analysis.init_values import ArrayInit, Values, argument, keyword_argument, string_value
from nnlint.analysis.model import ClassInfo, FunctionNode, ModuleModel, Scope
from nnlint.analysis.signal import Init, Layer, MeanField, Stack, StepZero, is_modelled

MEMO_KEY = "signal.stacks"
_MAX_UNROLL = 64


@dataclass
class WeightGroup:
    """The weights one class or function creates, when no stack could be read from it."""

    label: str
    #: (label, init, node, is_layer) of each 2-D+ weight; is_layer: a framework layer's
    #: weight (nn.Linear, Dense), as opposed to a bare array
    weights: list[tuple[str, Init, cst.CSTNode, bool]]


@dataclass
class StackIndex:
    stacks: list[Stack] = field(default_factory=list)
    groups: list[WeightGroup] = field(default_factory=list)


def stacks_of(model: ModuleModel) -> StackIndex:
    """Every stack and fallback weight group of the module (memoised in model.memo)."""
    memo = model.memo.setdefault(MEMO_KEY, {})
    if "index" not in memo:
        memo["index"] = _Extractor(model).run()
    return memo["index"]


# -- values of the evaluator ----------------------------------------------------------------
class _NotAChain(Exception):
    """The code is not a plain chain of layers (a merge, a branch, an unknown loop)."""


@dataclass
class _Flow:
    #: -1: the input; k: the output of the k-th layer application
    source: int
    #: elementwise operations applied since `source` ("tanh", "neg", "exp", "unknown", ...)
    ops: tuple[str, ...] = ()
    #: directly after a matmul: an added vector is that layer's bias
    fresh: bool = False


@dataclass(eq=False)
class _Array:
    """A weight (2-D+) or bias (1-D) array bound to a name or attribute."""

    label: str
    array: ArrayInit

    @property
    def is_weight(self) -> bool:
        return self.array.shape is not None and len(self.array.shape) >= 2


@dataclass(eq=False)
class _LayerTemplate:
    """A weight-layer module (`nn.Linear(8, 4)`, `layers.Dense(4)`) before it is applied."""

    label: str
    spec: api.LayerSpec
    canonical: str
    units: int | None
    in_width: int | None
    kernel_elements: int | None
    weight: Init
    weight_node: cst.CSTNode
    bias: Init | None
    bias_node: cst.CSTNode | None
    activation: str = "linear"
    #: the label is only the constructor's spelling (an inline `layers.Dense(64)(x)`)
    anonymous: bool = False


@dataclass(eq=False)
class _Activation:
    name: str


@dataclass(eq=False)
class _Sequence:
    elements: list[object]
    node: cst.CSTNode
    label: str = ""


class _Marker:
    def __init__(self, name: str) -> None:
        self.name = name


@dataclass(eq=False)
class _InputWidth:
    """`keras.Input(shape=(n,))` as the first element of a Sequential."""

    width: int | None


_PASS = _Marker("pass")
_RESCALE = _Marker("rescale")
#: a module we know nothing about (a local class, a pretrained backbone)
_OPAQUE_MODULE = _Marker("module")


def activation_of(ops: tuple[str, ...]) -> str:
    """The activation a run of elementwise operations amounts to ('unknown' if none fits)."""
    if not ops:
        return "linear"
    if len(ops) == 1 and is_modelled(ops[0]):
        return ops[0]
    return "unknown"


# -- the evaluator ---------------------------------------------------------------------------
class _Chain:
    """Symbolic evaluation of a forward body: which layers the input flows through."""

    def __init__(self, extractor: "_Extractor", values: Values, members: dict[str, object],
                 self_name: str | None, inputs: Iterable[str], free: dict[str, object]) -> None:
        self.extractor = extractor
        self.model = extractor.model
        self.values = values
        self.members = members
        self.self_name = self_name
        self.env: dict[str, object] = {name: _Flow(-1) for name in inputs}
        self.free = free
        self.applications: list[tuple[Layer, _Flow]] = []
        #: layers and arrays applied so far, by id (kept alive so ids stay unique)
        self.used: dict[int, object] = {}
        self.scale_is_modelled = True
        self.input_width: int | None = None
        self.result: object = None
        self.returned = False

    # statements
    def run(self, statements: Iterable[cst.BaseStatement], depth: int = 0) -> None:
        if depth > 6:
            raise _NotAChain
        for statement in statements:
            if isinstance(statement, cst.SimpleStatementLine):
                for small in statement.body:
                    self._small(small)
            elif isinstance(statement, cst.If):
                self._branch(statement, depth)
            elif isinstance(statement, cst.With):
                self._suite(statement.body, depth)
            elif isinstance(statement, cst.For):
                self._loop(statement, depth)
            elif isinstance(statement, (cst.FunctionDef, cst.ClassDef)):
                continue
            else:
                raise _NotAChain

    def _suite(self, suite: cst.BaseSuite, depth: int) -> None:
        if isinstance(suite, cst.IndentedBlock):
            self.run(suite.body, depth + 1)
        else:
            for small in suite.body:
                self._small(small)

    def _small(self, small: cst.BaseSmallStatement) -> None:
        if self.returned:
            return
        if isinstance(small, (cst.Assign, cst.AnnAssign)):
            if small.value is None:
                return
            targets = ([target.target for target in small.targets]
                       if isinstance(small, cst.Assign) else [small.target])
            if len(targets) == 1 and isinstance(targets[0], cst.Name) and isinstance(
                    self.free.get(targets[0].value), (_Array, _LayerTemplate, _Sequence)):
                # the defining assignment of a weight, layer or sequence of this scope
                self.env[targets[0].value] = self.free[targets[0].value]
                return
            value = self.value(small.value)
            for target in targets:
                self._bind(target, value)
        elif isinstance(small, cst.AugAssign):
            left = self.value(small.target)
            value = self._combine(small.operator, left, self.value(small.value))
            self._bind(small.target, value)
        elif isinstance(small, cst.Return):
            self.result = self.value(small.value) if small.value is not None else None
            self.returned = True
        elif isinstance(small, cst.Expr):
            self.value(small.value)

    def _bind(self, target: cst.BaseExpression, value: object) -> None:
        if isinstance(target, cst.Name):
            self.env[target.value] = value
        elif isinstance(target, (cst.Tuple, cst.List)):
            if isinstance(value, _Flow):
                raise _NotAChain
            for element in target.elements:
                self._bind(element.value, None)

    def _branch(self, statement: cst.If, depth: int) -> None:
        before_env, before_count = dict(self.env), len(self.applications)
        self._suite(statement.body, depth)
        body_env, body_returned = self.env, self.returned
        self.env, self.returned = dict(before_env), False
        if statement.orelse is not None:
            orelse = statement.orelse
            if isinstance(orelse, cst.If):
                self._branch(orelse, depth + 1)
            else:
                self._suite(orelse.body, depth)
        if len(self.applications) != before_count or body_returned or self.returned:
            raise _NotAChain  # a layer applied, or a value returned, on one path only
        merged = {}
        for name in set(body_env) | set(self.env):
            first, second = body_env.get(name), self.env.get(name)
            if first is second:
                merged[name] = first
            elif isinstance(first, _Flow) and isinstance(second, _Flow) and (
                    first.source, first.ops) == (second.source, second.ops):
                merged[name] = _Flow(first.source, first.ops)
            elif isinstance(first, _Flow) or isinstance(second, _Flow):
                raise _NotAChain
            else:
                merged[name] = None
        self.env = merged

    def _loop(self, statement: cst.For, depth: int) -> None:
        iterated = self.value(statement.iter)
        if not isinstance(iterated, _Sequence) or not isinstance(statement.target, cst.Name):
            raise _NotAChain
        if len(iterated.elements) > _MAX_UNROLL or statement.orelse is not None:
            raise _NotAChain
        for element in iterated.elements:
            self.env[statement.target.value] = element
            self._suite(statement.body, depth)

    # expressions
    def value(self, expr: cst.BaseExpression) -> object:
        if isinstance(expr, cst.Name):
            if expr.value in self.env:
                return self.env[expr.value]
            return self.free.get(expr.value)
        if isinstance(expr, cst.Attribute):
            return self._attribute(expr)
        if isinstance(expr, cst.Call):
            return self._call(expr)
        if isinstance(expr, cst.BinaryOperation):
            return self._combine(expr.operator, self.value(expr.left), self.value(expr.right))
        if isinstance(expr, cst.UnaryOperation):
            inner = self.value(expr.expression)
            if isinstance(inner, _Flow):
                operation = "neg" if isinstance(expr.operator, cst.Minus) else "unknown"
                return _Flow(inner.source, inner.ops + (operation,))
            return None
        if isinstance(expr, cst.Subscript):
            return self._subscript(expr)
        if isinstance(expr, (cst.List, cst.Tuple)):
            elements = [self.value(element.value) for element in expr.elements]
            if any(isinstance(element, _Flow) for element in elements):
                raise _NotAChain  # a flow packed with others (concatenation, stacking)
            return None
        if isinstance(expr, cst.IfExp):
            if any(isinstance(self.value(part), _Flow) for part in (expr.body, expr.orelse)):
                raise _NotAChain
        return None

    def _attribute(self, expr: cst.Attribute) -> object:
        receiver = expr.value
        if isinstance(receiver, cst.Name) and receiver.value == self.self_name:
            return self.members.get(expr.attr.value)
        base = self.value(receiver)
        if isinstance(base, _Flow):
            if expr.attr.value in ("shape", "ndim", "dtype", "device", "size"):
                return None
            return _Flow(base.source, base.ops + ("unknown",))
        return None

    def _subscript(self, expr: cst.Subscript) -> object:
        base = self.value(expr.value)
        if isinstance(base, _Sequence) and len(expr.slice) == 1:
            element = expr.slice[0].slice
            if isinstance(element, cst.Index):
                position = self.values.number(element.value)
                if position is not None and position == int(position):
                    index = int(position)
                    if -len(base.elements) <= index < len(base.elements):
                        return base.elements[index]
        if isinstance(base, _Flow):
            self.scale_is_modelled = False
            return _Flow(base.source, base.ops)
        return None

    def _call(self, expr: cst.Call) -> object:
        func = expr.func
        canonical = self.model.canonical(func)
        if canonical is not None:
            return self._framework_call(expr, canonical)
        if isinstance(func, cst.Attribute):
            receiver = func.value
            is_member = isinstance(receiver, cst.Name) and receiver.value == self.self_name
            if not is_member:
                base = self.value(receiver)
                if isinstance(base, _Flow):
                    return self._method(base, func.attr.value, expr)
                if isinstance(base, _Array) and func.attr.value == "dot":
                    raise _NotAChain  # W.dot(x): orientation unclear, do not guess
        callee = self.extractor.template(func, self.values) if isinstance(func, cst.Call) \
            else self.value(func)
        return self._apply(callee, expr)

    def _arguments(self, expr: cst.Call) -> list[object]:
        return [self.value(arg.value) for arg in expr.args]

    def _single_flow(self, values: list[object]) -> _Flow | None:
        flows = [value for value in values if isinstance(value, _Flow)]
        if len(flows) > 1:
            raise _NotAChain
        return flows[0] if flows else None

    def _apply(self, callee: object, expr: cst.Call) -> object:
        arguments = self._arguments(expr)
        flow = self._single_flow(arguments)
        if isinstance(callee, (_LayerTemplate, _Array, _Sequence)) and flow is None:
            if self.applications or not arguments:
                raise _NotAChain
            flow = _Flow(-1)  # the first layer's argument is the input
        if flow is None:
            return None
        if isinstance(callee, _LayerTemplate):
            return self._apply_layer(callee, flow)
        if isinstance(callee, _Sequence):
            for element in callee.elements:
                flow = self._apply_element(element, flow)
            return flow
        if isinstance(callee, (_Activation, _Marker)):
            return self._apply_element(callee, flow)
        return _Flow(flow.source, flow.ops + ("unknown",))

    def _apply_element(self, element: object, flow: _Flow) -> _Flow:
        if isinstance(element, _LayerTemplate):
            return self._apply_layer(element, flow)
        if isinstance(element, _Activation):
            return _Flow(flow.source, flow.ops + (element.name,))
        if isinstance(element, _Sequence):
            for inner in element.elements:
                flow = self._apply_element(inner, flow)
            return flow
        if element is _PASS:
            return flow
        if isinstance(element, _InputWidth) and not self.applications:
            self.input_width = element.width
            return flow
        if element is _RESCALE:
            self.scale_is_modelled = False
            return flow
        return _Flow(flow.source, flow.ops + ("unknown",))

    def _apply_layer(self, template: _LayerTemplate, flow: _Flow) -> _Flow:
        if id(template) in self.used:
            raise _NotAChain  # a layer applied twice (weight tying): not a plain chain
        self.used[id(template)] = template
        in_width = template.in_width
        if in_width is None:
            in_width = (self.applications[-1][0].units if self.applications
                        else self.input_width)
        kernel = template.kernel_elements
        fan_in = in_width * kernel if in_width is not None and kernel is not None else None
        fan_out = template.units * kernel if template.units is not None and kernel else None
        label = template.label
        if template.anonymous:
            label = f"{label} #{len(self.applications) + 1}"
        layer = Layer(label, fan_in, fan_out, template.weight, template.bias,
                      node=template.weight_node, units=template.units)
        self.applications.append((layer, flow))
        result = _Flow(len(self.applications) - 1)
        if template.activation != "linear":
            result = _Flow(result.source, (template.activation,))
        return result

    def _matmul(self, flow: _Flow, weight: _Array, transposed: bool) -> _Flow:
        if id(weight) in self.used or not weight.is_weight:
            raise _NotAChain
        self.used[id(weight)] = weight
        shape = weight.array.shape
        if len(shape) != 2:
            raise _NotAChain
        fan_in, fan_out = (shape[1], shape[0]) if transposed else (shape[0], shape[1])
        layer = Layer(weight.label, fan_in, fan_out, weight.array.init, None,
                      node=weight.array.node, units=fan_out)
        self.applications.append((layer, flow))
        return _Flow(len(self.applications) - 1, fresh=True)

    def _framework_call(self, expr: cst.Call, canonical: str) -> object:
        if canonical in api.KERAS_INPUTS:
            shape = self.values.shape(argument(expr, 0, "shape"))
            self.input_width = shape[-1] if shape else None
            return _Flow(-1)
        if canonical in api.KERAS_MODELS:
            outputs = argument(expr, 1, "outputs")
            return self.value(outputs) if outputs is not None else None
        if canonical in api.MATMUL_FUNCTIONS and len(expr.args) == 2:
            left, right = (self.value(arg.value) for arg in expr.args)
            return self._combine(cst.MatrixMultiply(), left, right)
        arguments = self._arguments(expr)
        flow = self._single_flow(arguments)
        if flow is None:
            return self.extractor.template(expr, self.values)
        if canonical in api.ACTIVATIONS:
            return _Flow(flow.source, flow.ops + (api.ACTIVATIONS[canonical],))
        if canonical in api.MAXIMUM_FUNCTIONS and any(
                self.values.number(arg.value) == 0 for arg in expr.args):
            return _Flow(flow.source, flow.ops + ("relu",))
        if canonical in api.EXP_FUNCTIONS:
            return _Flow(flow.source, flow.ops + ("exp",))
        if canonical in api.PASS_THROUGH:
            return flow
        if canonical in api.RESCALING:
            self.scale_is_modelled = False
            return flow
        return _Flow(flow.source, flow.ops + ("unknown",))

    def _method(self, flow: _Flow, method: str, expr: cst.Call) -> object:
        arguments = self._arguments(expr)
        if self._single_flow(arguments) is not None:
            raise _NotAChain  # x.add(y), x.mul(y): two flows meet
        if method in api.ACTIVATION_METHODS:
            return _Flow(flow.source, flow.ops + (api.ACTIVATION_METHODS[method],))
        if method in api.PASS_THROUGH_METHODS:
            return flow
        if method in ("size", "dim", "numel", "item"):
            return None
        if method in ("clamp", "clamp_min", "clip") and self.values.number(
                argument(expr, 0, "min")) == 0 and argument(expr, 1, "max") is None:
            return _Flow(flow.source, flow.ops + ("relu",))
        if method == "dot" and len(arguments) == 1 and isinstance(arguments[0], _Array):
            return self._matmul(flow, arguments[0], False)
        return _Flow(flow.source, flow.ops + ("unknown",))

    def _combine(self, operator: cst.CSTNode, left: object, right: object) -> object:
        left_flow, right_flow = isinstance(left, _Flow), isinstance(right, _Flow)
        if left_flow and right_flow:
            raise _NotAChain  # a residual sum, a gate, a merge
        if isinstance(operator, (cst.MatrixMultiply, cst.MatrixMultiplyAssign)):
            if left_flow and isinstance(right, _Array):
                return self._matmul(left, right, False)
            if right_flow and isinstance(left, _Array):
                return self._matmul(right, left, True)
            if isinstance(right, _Array) and right.is_weight and not self.applications:
                return self._matmul(_Flow(-1), right, False)  # the first matmul reads the input
            if left_flow or right_flow:
                raise _NotAChain
            return None
        if not (left_flow or right_flow):
            return None
        flow = left if left_flow else right
        other = right if left_flow else left
        if isinstance(operator, (cst.Add, cst.AddAssign)):
            if flow.fresh and not isinstance(other, (int, float)) and self._attach_bias(other):
                return _Flow(flow.source)
            return _Flow(flow.source, flow.ops + ("shift",))
        if isinstance(operator, (cst.Multiply, cst.MultiplyAssign)) or (
                isinstance(operator, (cst.Divide, cst.DivideAssign)) and left_flow):
            self.scale_is_modelled = False  # a dropout mask or a scale factor
            return _Flow(flow.source, flow.ops)
        if isinstance(operator, cst.Divide) and flow.ops[-3:] == ("neg", "exp", "shift"):
            return _Flow(flow.source, flow.ops[:-3] + ("sigmoid",))  # 1 / (1 + exp(-z))
        return _Flow(flow.source, flow.ops + ("unknown",))

    def _attach_bias(self, other: object) -> bool:
        layer = self.applications[-1][0]
        if isinstance(other, _Array):
            if other.is_weight:
                return False
            layer.bias = other.array.init
            return True
        layer.bias = Init("unknown")
        return True

    # the result
    def stack(self, label: str, node: cst.CSTNode) -> Stack | None:
        result = self.result
        if not isinstance(result, _Flow) and self.applications:
            # a script or a function that builds but does not return: its last flow
            flows = [value for value in self.env.values() if isinstance(value, _Flow)]
            result = max(flows, key=lambda flow: flow.source, default=None)
        if not isinstance(result, _Flow) or not self.applications:
            return None
        if result.source != len(self.applications) - 1:
            return None
        layers = []
        for index, (layer, flow) in enumerate(self.applications):
            if flow.source != index - 1:
                return None
            if index:
                layers[-1].activation = activation_of(flow.ops)
            layers.append(layer)
        final = activation_of(result.ops)
        layers[-1].activation = final if final != "unknown" else "linear"
        return Stack(label, layers, node, self.scale_is_modelled)


# -- the extractor ---------------------------------------------------------------------------
class _Extractor:
    def __init__(self, model: ModuleModel) -> None:
        self.model = model
        self.index = StackIndex()
        #: class name -> its members after its own init statements (for `model.apply`)
        self.class_members: dict[str, dict[str, object]] = {}
        #: sequences already part of a stack (not reported again on their own)
        self.consumed: set[int] = set()
        self._sequences: list[_Sequence] = []
        self._templates: dict[int, object] = {}

    def run(self) -> StackIndex:
        # Members and init statements first (a script may re-initialise a class's layers),
        # then the chains, which copy the inits into the stacks' layers.
        classes = [(info, *self._prepare_class(info)) for info in self.model.classes.values()]
        scopes = [(self.model.module_scope, self.model.module.body, "module")]
        for name, function in self.model.functions.items():
            body = function.body.body if isinstance(function.body, cst.IndentedBlock) else ()
            scopes.append((self.model.scope_of(function), body, name))
        prepared = [(scope, body, label, *self._prepare_scope(scope, body))
                    for scope, body, label in scopes]
        for info, members, values in classes:
            self._class(info, members, values)
        for scope, body, label, values, free in prepared:
            self._scope(scope, body, label, values, free)
        for sequence in self._sequences:
            if id(sequence) not in self.consumed:
                self._sequence_stack(sequence)
        return self.index

    # members and templates
    def template(self, expr: cst.BaseExpression, values: Values, label: str = "",
                 depth: int = 0) -> object:
        """What a module-valued expression is: a layer, an activation, a sequence, ...

        One object per constructor call in the source, so a layer met twice is one layer.
        """
        if depth > 6 or not isinstance(expr, cst.Call):
            return None
        key = id(expr)
        if key not in self._templates:
            self._templates[key] = self._new_template(expr, values, label, depth)
        return self._templates[key]

    def _new_template(self, expr: cst.Call, values: Values, label: str, depth: int) -> object:
        canonical = self.model.canonical(expr.func)
        if canonical is None:
            written = expr.func.value if isinstance(expr.func, cst.Name) else None
            return _OPAQUE_MODULE if written in self.model.classes else None
        if canonical in api.WEIGHT_LAYERS:
            return self._layer(expr, canonical, values, label)
        if canonical in api.ACTIVATIONS:
            return _Activation(api.ACTIVATIONS[canonical])
        if canonical in api.KERAS_ACTIVATION_LAYERS:
            name = api.KERAS_ACTIVATION_NAMES.get(string_value(argument(expr, 0, "activation"))
                                                  or "")
            return _Activation(name or "unknown")
        if canonical in api.PASS_THROUGH:
            return _PASS
        if canonical in api.RESCALING:
            return _RESCALE
        if canonical in api.KERAS_INPUTS:
            shape = values.shape(argument(expr, 0, "shape"))
            return _InputWidth(shape[-1] if shape else None)
        if canonical in api.SEQUENTIALS or canonical in api.MODULE_LISTS:
            elements = self._elements(expr, canonical, values, depth, label)
            if elements is None:
                return _OPAQUE_MODULE
            sequence = _Sequence(elements, expr, label)
            if canonical in api.SEQUENTIALS:
                self._sequences.append(sequence)
            return sequence
        return None

    def _elements(self, expr: cst.Call, canonical: str, values: Values,
                  depth: int, label: str) -> list[object] | None:
        items: list[cst.BaseExpression] = []
        if canonical.startswith("torch.nn.Sequential"):
            for arg in expr.args:
                if arg.keyword is not None:
                    return None
                if arg.star == "*":
                    literal = values._literal(arg.value, 0)
                    if literal is None:
                        return None
                    items.extend(element.value for element in literal.elements)
                else:
                    items.append(arg.value)
        else:
            given = argument(expr, 0, "layers" if "keras" in canonical else "modules")
            if given is None:
                return []
            literal = values._literal(given, 0)
            if literal is None:
                return None
            items = [element.value for element in literal.elements]
        elements = []
        for position, item in enumerate(items):
            element = self.template(item, values, f"{label}[{position}]", depth + 1)
            if element is None or element is _OPAQUE_MODULE:
                return None
            elements.append(element)
        return elements

    def _layer(self, expr: cst.Call, canonical: str, values: Values,
               label: str) -> _LayerTemplate:
        spec = api.WEIGHT_LAYERS[canonical]
        units = values.width(argument(expr, *spec.units_argument))
        in_width = values.width(argument(expr, *spec.fan_in_argument)) \
            if spec.fan_in_argument else None
        if spec.framework == "keras":
            shape = values.shape(keyword_argument(expr, "input_shape"))
            in_width = shape[-1] if shape else None
        kernel = 1
        if spec.dimensions:
            given = values.shape(argument(expr, *spec.kernel_argument))
            if given is None or None in given:
                kernel = None
            else:
                kernel = 1
                for size in (given * spec.dimensions if len(given) == 1 else given):
                    kernel *= size
        weight, weight_node = spec.default_weight, expr
        bias: Init | None = spec.default_bias
        bias_node = None
        activation = "linear"
        keys = api.INIT_KEYWORDS[spec.framework]
        for arg in expr.args:
            keyword = arg.keyword.value if arg.keyword is not None else ""
            if not keyword:
                continue
            if keyword == keys[0]:
                weight, weight_node = self._initializer(arg.value, spec, values), arg.value
            elif keyword == keys[1]:
                bias, bias_node = self._initializer(arg.value, spec, values), arg.value
            elif keyword == keys[2] and _is_false(arg.value):
                bias = None
            elif keyword == "activation" and spec.framework == "keras":
                activation = self._keras_activation(arg.value)
        if bias is None:
            bias_node = None
        return _LayerTemplate(label or self.model.module.code_for_node(expr.func), spec,
                              canonical, units, in_width, kernel, weight, weight_node, bias,
                              bias_node, activation, anonymous=not label)

    def _initializer(self, expr: cst.BaseExpression, spec: api.LayerSpec,
                     values: Values) -> Init:
        if spec.framework == "keras":
            return values.keras_initializer(expr)
        return values.flax_initializer(expr)

    def _keras_activation(self, expr: cst.BaseExpression) -> str:
        if isinstance(expr, cst.Name) and expr.value == "None":
            return "linear"
        text = string_value(expr)
        if text is not None:
            return api.KERAS_ACTIVATION_NAMES.get(text, "unknown")
        return api.ACTIVATIONS.get(self.model.canonical(expr) or "", "unknown")

    def _member(self, label: str, value: cst.BaseExpression, values: Values) -> object:
        array = values.array_init(value)
        if array is not None:
            return _Array(label, array)
        return self.template(value, values, label)

    # classes
    def _prepare_class(self, info: ClassInfo) -> tuple[dict[str, object], Values]:
        init_method = info.methods.get("__init__") or info.methods.get("setup")
        defaults = _defaults(init_method) if init_method is not None else {}
        values = Values(self.model, self.model.scope_of(init_method), defaults)
        members: dict[str, object] = {}
        for attribute, bindings in info.attributes.items():
            value = _defining_value(bindings, init_method)
            members[attribute] = (self._member(f"self.{attribute}", value, values)
                                  if value is not None else None)
        self.class_members[info.name] = members
        if init_method is not None:
            _InitScanner(self, info, values, members).run_method(init_method)
        return members, values

    def _class(self, info: ClassInfo, members: dict[str, object], values: Values) -> None:
        forward_names = self._forward_names(info)
        stack = None
        for name in forward_names:
            method = info.methods.get(name)
            if method is None:
                continue
            stack = self._chain(method, members, values, info.name)
            if stack is not None:
                break
        if stack is not None:
            self.index.stacks.append(stack)
            return
        weights = []
        for member in members.values():
            if isinstance(member, _Array) and member.is_weight:
                weights.append((member.label, member.array.init, member.array.node, False))
            elif isinstance(member, _LayerTemplate):
                weights.append((member.label, member.weight, member.weight_node, True))
        if weights:
            self.index.groups.append(WeightGroup(info.name, weights))

    def _forward_names(self, info: ClassInfo) -> tuple[str, ...]:
        for base, method in api.MODULE_BASES.items():
            if self.model.is_subclass_of(info, (base,)):
                return (method,)
        return api.PLAIN_FORWARD_NAMES

    def _chain(self, method: FunctionNode, members: dict[str, object], values: Values,
               label: str) -> Stack | None:
        params = [param.name.value for param in (*method.params.posonly_params,
                                                 *method.params.params)]
        if len(params) < 2:
            return None
        chain = _Chain(self, values, members, params[0], params[1:2], {})
        if not isinstance(method.body, cst.IndentedBlock):
            return None
        try:
            chain.run(method.body.body)
        except _NotAChain:
            return None
        stack = chain.stack(label, method)
        if stack is not None:
            self._consume_nested(members)
        return stack

    def _consume_nested(self, members: dict[str, object]) -> None:
        for member in members.values():
            if isinstance(member, _Sequence):
                self._consume(member)

    def _consume(self, sequence: _Sequence) -> None:
        self.consumed.add(id(sequence))
        for element in sequence.elements:
            if isinstance(element, _Sequence):
                self._consume(element)

    # module and function scopes
    def _prepare_scope(self, scope: Scope, body: Iterable[cst.BaseStatement]
                       ) -> tuple[Values, dict[str, object]]:
        function = scope.node if isinstance(scope.node, cst.FunctionDef) else None
        values = Values(self.model, scope, _defaults(function) if function else {})
        free: dict[str, object] = {}
        for name, bindings in scope.bindings.items():
            plain = [b for b in bindings if b.augmented is None]
            if len(plain) == 1 and plain[0].value is not None and plain[0].index is None:
                member = self._member(name, plain[0].value, values)
                if member is not None:
                    free[name] = member
        for name, member in free.items():
            if isinstance(member, _Sequence) and not member.label:
                member.label = name
        _InitScanner(self, None, values, free).run_statements(body)
        return values, free

    def _scope(self, scope: Scope, body: Iterable[cst.BaseStatement], label: str,
               values: Values, free: dict[str, object]) -> None:
        chain = _Chain(self, values, {}, None, (), free)
        stack = None
        try:
            chain.run(body)
            stack = chain.stack(label, scope.node)
        except _NotAChain:
            stack = None
        if stack is not None:
            self.index.stacks.append(stack)
            self._consume_nested(free)
            return
        weights = [(member.label, member.array.init, member.array.node, False)
                   for member in free.values() if isinstance(member, _Array) and member.is_weight]
        if weights:
            self.index.groups.append(WeightGroup(label, weights))

    def _sequence_stack(self, sequence: _Sequence) -> None:
        self._consume(sequence)
        chain = _Chain(self, Values(self.model, self.model.module_scope), {}, None, (), {})
        try:
            flow = _Flow(-1)
            for element in sequence.elements:
                flow = chain._apply_element(element, flow)
        except _NotAChain:
            return
        chain.result = flow
        stack = chain.stack(sequence.label or "Sequential", sequence.node)
        if stack is not None:
            self.index.stacks.append(stack)


def _defaults(function: FunctionNode | None) -> dict[str, cst.BaseExpression]:
    if function is None:
        return {}
    params = function.params
    return {param.name.value: param.default
            for param in (*params.posonly_params, *params.params, *params.kwonly_params)
            if param.default is not None}


def _defining_value(bindings: list, init_method: FunctionNode | None) -> cst.BaseExpression | None:
    """The value an attribute is created with: its one plain binding (in __init__ if several)."""
    plain = [(binding, method) for binding, method in bindings
             if binding.augmented is None and binding.index is None]
    if len(plain) > 1:
        plain = [(binding, method) for binding, method in plain if method is init_method]
    if len(plain) != 1:
        return None
    return plain[0][0].value


def _is_false(expr: cst.BaseExpression) -> bool:
    return isinstance(expr, cst.Name) and expr.value == "False"


# -- init statements -------------------------------------------------------------------------
class _InitScanner:
    """Applies init statements (`nn.init.zeros_(self.fc.weight)`, `apply(fn)`) to members."""

    def __init__(self, extractor: _Extractor, info: ClassInfo | None, values: Values,
                 members: dict[str, object]) -> None:
        self.extractor = extractor
        self.model = extractor.model
        self.info = info
        self.values = values
        self.members = members
        self._followed: set[int] = set()

    def run_method(self, method: FunctionNode) -> None:
        if id(method) in self._followed or not isinstance(method.body, cst.IndentedBlock):
            return
        self._followed.add(id(method))
        self_name = _first_parameter(method)
        roots = {self_name: ("members", self.members)} if self_name else {}
        self._statements(method.body.body, roots, None, 0)

    def run_statements(self, body: Iterable[cst.BaseStatement]) -> None:
        roots: dict[str, tuple] = {}
        for name, member in self.members.items():
            if isinstance(member, _Sequence):
                roots[name] = ("sequence", member)
        for name, bindings in self.values.scope.bindings.items():
            if len(bindings) == 1 and isinstance(bindings[0].value, cst.Call):
                written = bindings[0].value.func
                if isinstance(written, cst.Name) and written.value in self.extractor.class_members:
                    roots[name] = ("instance", self.extractor.class_members[written.value])
        if roots:
            self._statements(body, roots, None, 0)

    def _statements(self, body: Iterable[cst.BaseStatement], roots: dict[str, tuple],
                    guard: frozenset[str] | None, depth: int) -> None:
        if depth > 6:
            return
        for statement in body:
            if isinstance(statement, cst.SimpleStatementLine):
                for small in statement.body:
                    self._small(small, roots, guard)
            elif isinstance(statement, cst.If):
                self._if(statement, roots, guard, depth)
            elif isinstance(statement, cst.With) and isinstance(
                    statement.body, cst.IndentedBlock):
                self._statements(statement.body.body, roots, guard, depth + 1)
            elif isinstance(statement, cst.For) and isinstance(statement.body, cst.IndentedBlock):
                for each in self._loop_targets(statement, roots):
                    inner = dict(roots)
                    inner[statement.target.value] = each
                    self._statements(statement.body.body, inner, guard, depth + 1)

    def _if(self, statement: cst.If, roots: dict[str, tuple], guard: frozenset[str] | None,
            depth: int) -> None:
        types = self._isinstance_guard(statement.test, roots)
        if types is not None and isinstance(statement.body, cst.IndentedBlock):
            self._statements(statement.body.body, roots, types, depth + 1)
            orelse = statement.orelse
            if isinstance(orelse, cst.If):
                self._if(orelse, roots, guard, depth + 1)
            return
        # any other condition: its effects may or may not happen; record none of them

    def _isinstance_guard(self, test: cst.BaseExpression,
                          roots: dict[str, tuple]) -> frozenset[str] | None:
        if not (isinstance(test, cst.Call) and isinstance(test.func, cst.Name)
                and test.func.value == "isinstance" and len(test.args) == 2):
            return None
        subject = test.args[0].value
        if not (isinstance(subject, cst.Name) and roots.get(subject.value, ("",))[0] == "each"):
            return None
        kinds = test.args[1].value
        written = [element.value for element in kinds.elements] \
            if isinstance(kinds, cst.Tuple) else [kinds]
        names = {self.model.canonical(item) for item in written}
        return None if None in names else frozenset(names)

    def _loop_targets(self, statement: cst.For, roots: dict[str, tuple]) -> list[tuple]:
        """`for m in self.modules()`: every layer; `for layer in (net[0], net[2])`: each."""
        iterated = statement.iter
        if not isinstance(statement.target, cst.Name):
            return []
        if isinstance(iterated, (cst.Tuple, cst.List)):
            found = [self._object(element.value, roots) for element in iterated.elements]
            return [("object", item) for item in found if item is not None]
        if not (isinstance(iterated, cst.Call) and isinstance(iterated.func, cst.Attribute)
                and iterated.func.attr.value in ("modules", "children")):
            return []
        owner = iterated.func.value
        if isinstance(owner, cst.Name) and owner.value in roots:
            return [("each", roots[owner.value][1])]
        return []

    def _object(self, expr: cst.BaseExpression, roots: dict[str, tuple]) -> object:
        """The member an expression like `self.net[0]` or `net[2]` denotes."""
        def index_of(index: cst.BaseExpression) -> int | None:
            number = self.values.number(index)
            return None if number is None or number != int(number) else int(number)

        path = _access_path(expr, index_of)
        if path is None or path[0] not in roots:
            return None
        kind, current = roots[path[0]]
        if kind == "each":
            return None
        for step in path[1]:
            current = _step(current, step, self.values)
            if current is None:
                return None
        return current

    def _small(self, small: cst.BaseSmallStatement, roots: dict[str, tuple],
               guard: frozenset[str] | None) -> None:
        if isinstance(small, cst.Expr) and isinstance(small.value, cst.Call):
            self._call(small.value, roots, guard)
        elif isinstance(small, cst.Assign) and len(small.targets) == 1:
            target = small.targets[0].target
            array = self.values.array_init(small.value)
            if array is not None and isinstance(target, cst.Attribute):
                self._set(target, array.init, array.node, roots, guard)

    def _call(self, call: cst.Call, roots: dict[str, tuple],
              guard: frozenset[str] | None) -> None:
        func = call.func
        canonical = self.model.canonical(func)
        family = api.TORCH_INIT_FUNCTIONS.get(canonical or "")
        spelled = self.model.module.code_for_node(call)
        if family is not None and call.args:
            init = self.values.torch_init_call(call, family, spelled)
            self._set(call.args[0].value, init, call, roots, guard)
            return
        if not isinstance(func, cst.Attribute):
            return
        method = func.attr.value
        if method in api.TENSOR_FILL_METHODS:
            init = self.values.tensor_fill_method(call, api.TENSOR_FILL_METHODS[method], spelled)
            self._set(func.value, init, call, roots, guard)
        elif method == "apply" and len(call.args) == 1:
            self._apply(func.value, call.args[0].value, roots)
        elif (isinstance(func.value, cst.Name) and roots.get(func.value.value, ("",))[0]
              == "members" and self.info is not None and not call.args):
            helper = self.info.methods.get(method)  # self._init_weights()
            if helper is not None:
                self.run_method(helper)

    def _apply(self, owner: cst.BaseExpression, function: cst.BaseExpression,
               roots: dict[str, tuple]) -> None:
        if not (isinstance(owner, cst.Name) and owner.value in roots):
            return
        target = None
        if isinstance(function, cst.Name):
            target = self.model.functions.get(function.value)
        elif (isinstance(function, cst.Attribute) and isinstance(function.value, cst.Name)
              and roots.get(function.value.value, ("",))[0] == "members" and self.info):
            target = self.info.methods.get(function.attr.value)
        if target is None or not isinstance(target.body, cst.IndentedBlock):
            return
        params = [param.name.value for param in target.params.params]
        if isinstance(function, cst.Attribute):
            params = params[1:]
        if not params:
            return
        inner = dict(roots)
        inner[params[0]] = ("each", roots[owner.value][1])
        self._statements(target.body.body, inner, None, 1)

    def _set(self, target: cst.BaseExpression, init: Init, node: cst.CSTNode,
             roots: dict[str, tuple], guard: frozenset[str] | None) -> None:
        path = _tensor_path(target)
        if path is None:
            return
        root, steps, parameter = path
        where = roots.get(root)
        if where is None:
            return
        if where[0] == "each":
            for template in _templates(where[1]):
                if guard is not None and template.canonical not in guard:
                    continue
                _assign(template, parameter, init, node)
            return
        current: object = where[1]
        for step in steps:
            current = _step(current, step, self.values)
            if current is None:
                return
        if isinstance(current, _LayerTemplate):
            _assign(current, parameter, init, node)
        elif isinstance(current, dict) and parameter in current:
            member = current[parameter]
            if isinstance(member, _Array):
                member.array = ArrayInit(init, member.array.shape, node)
        elif isinstance(current, _Array) and parameter == "":
            current.array = ArrayInit(init, current.array.shape, node)


def _first_parameter(function: FunctionNode) -> str | None:
    params = (*function.params.posonly_params, *function.params.params)
    return params[0].name.value if params else None


def _tensor_path(expr: cst.BaseExpression) -> tuple[str, list, str] | None:
    """`self.net[0].weight.data` -> ("self", ["net", 0], "weight")."""
    path = _access_path(expr, lambda index: (index.evaluated_value
                                             if isinstance(index, cst.Integer) else None))
    if path is None:
        return None
    root, steps = path
    while steps and steps[-1] == "data":
        steps.pop()
    if steps and steps[-1] in ("weight", "bias", "kernel"):
        return root, steps[:-1], steps[-1]
    if steps and isinstance(steps[-1], str):
        return root, steps[:-1], steps[-1]
    return None


def _access_path(expr: cst.BaseExpression, index_of) -> tuple[str, list] | None:
    """`self.net[0].weight` -> ("self", ["net", 0, "weight"]): the root name and the steps
    from it, attribute names and integer indexes (`index_of` evaluates an index; None: not
    one); None for any other shape."""
    steps: list = []
    while isinstance(expr, (cst.Attribute, cst.Subscript)):
        if isinstance(expr, cst.Attribute):
            steps.append(expr.attr.value)
        else:
            if len(expr.slice) != 1 or not isinstance(expr.slice[0].slice, cst.Index):
                return None
            index = index_of(expr.slice[0].slice.value)
            if index is None:
                return None
            steps.append(index)
        expr = expr.value
    if not isinstance(expr, cst.Name):
        return None
    steps.reverse()
    return expr.value, steps


def _step(current: object, step: object, values: Values) -> object:
    if isinstance(current, dict) and isinstance(step, str):
        return current.get(step)
    if isinstance(current, _Sequence) and isinstance(step, int):
        if -len(current.elements) <= step < len(current.elements):
            return current.elements[step]
    return None


def _templates(where: object) -> list[_LayerTemplate]:
    """Every layer reachable from an owner (members dict or sequence)."""
    found: list[_LayerTemplate] = []
    pending = list(where.values()) if isinstance(where, dict) else [where]
    while pending:
        item = pending.pop()
        if isinstance(item, _LayerTemplate):
            found.append(item)
        elif isinstance(item, _Sequence):
            pending.extend(item.elements)
    return found


def _assign(template: _LayerTemplate, parameter: str, init: Init, node: cst.CSTNode) -> None:
    if parameter in ("weight", "kernel"):
        template.weight, template.weight_node = init, node
    elif parameter == "bias" and template.bias is not None:
        template.bias, template.bias_node = init, node


# -- simulation ------------------------------------------------------------------------------
@dataclass
class Simulated:
    stack: Stack
    mean_field: MeanField | None
    step_zero: StepZero | None


def simulated(model: ModuleModel) -> list[Simulated]:
    """Every stack of the module with both step-0 simulations (memoised, run at most once)."""
    memo = model.memo.setdefault(MEMO_KEY, {})
    if "simulated" not in memo:
        from nnlint.analysis.signal import mean_field, step_zero

        memo["simulated"] = [Simulated(stack, mean_field(stack), step_zero(stack))
                             for stack in stacks_of(model).stacks]
    return memo["simulated"]
