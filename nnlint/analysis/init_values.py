"""Static values the init analysis needs: numbers, shapes, and the Init an expression makes.

`number` folds small constant expressions (literals, names bound once, parameter defaults,
sqrt, len of a literal); `array_init` reads tensor/array constructors (`np.zeros((a, b))`,
`np.random.randn(a, b) * 0.01`, `nn.Parameter(torch.zeros(a, b))`); the initializer readers
turn torch.nn.init calls, Keras and Flax initializers into `signal.Init` values.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import libcst as cst

from nnlint.analysis.api import init as api
from nnlint.analysis.model import ModuleModel, Scope
from nnlint.analysis.signal import Init

_DEPTH = 8


@dataclass
class ArrayInit:
    """An array constructor read statically."""

    init: Init
    #: the dimensions (None for an unknown one); None when the shape is not readable
    shape: tuple[int | None, ...] | None
    node: cst.CSTNode


class Values:
    """Constant folding and init reading inside one scope of a module."""

    def __init__(self, model: ModuleModel, scope: Scope,
                 defaults: dict[str, cst.BaseExpression] | None = None) -> None:
        self.model = model
        self.scope = scope
        #: parameter defaults of the enclosing function(s) (`hidden: int = 32`)
        self.defaults = defaults or {}

    # -- numbers ---------------------------------------------------------------------------
    def number(self, expr: cst.BaseExpression | None, depth: int = 0) -> float | None:
        """The value of a small constant expression, None when not known statically."""
        if expr is None or depth > _DEPTH:
            return None
        if isinstance(expr, cst.Integer):
            return float(int(expr.value.replace("_", ""), 0))
        if isinstance(expr, cst.Float):
            return float(expr.value.replace("_", ""))
        if isinstance(expr, cst.UnaryOperation):
            inner = self.number(expr.expression, depth + 1)
            if inner is None:
                return None
            if isinstance(expr.operator, cst.Minus):
                return -inner
            return inner if isinstance(expr.operator, cst.Plus) else None
        if isinstance(expr, cst.BinaryOperation):
            return self._binary(expr, depth)
        if isinstance(expr, cst.Name):
            return self._name_number(expr.value, depth)
        if isinstance(expr, cst.Call):
            return self._call_number(expr, depth)
        return None

    def _binary(self, expr: cst.BinaryOperation, depth: int) -> float | None:
        left = self.number(expr.left, depth + 1)
        right = self.number(expr.right, depth + 1)
        if left is None or right is None:
            return None
        operator = expr.operator
        if isinstance(operator, cst.Add):
            return left + right
        if isinstance(operator, cst.Subtract):
            return left - right
        if isinstance(operator, cst.Multiply):
            return left * right
        if isinstance(operator, (cst.Divide, cst.FloorDivide)) and right != 0:
            return left / right if isinstance(operator, cst.Divide) else float(left // right)
        if isinstance(operator, cst.Power) and abs(right) <= 64 and (left > 0 or
                                                                     right == int(right)):
            return left ** right
        return None

    def _name_number(self, name: str, depth: int) -> float | None:
        if name in self.defaults:
            return self.number(self.defaults[name], depth + 1)
        found = self.model.lookup(name, self.scope)
        if found is None:
            return None
        _, bindings = found
        if len(bindings) != 1 or bindings[0].augmented is not None or bindings[0].index is not None:
            return None
        return self.number(bindings[0].value, depth + 1)

    def _call_number(self, expr: cst.Call, depth: int) -> float | None:
        name = self.model.canonical(expr.func)
        if name in api.SQRT_FUNCTIONS and len(expr.args) == 1:
            inner = self.number(expr.args[0].value, depth + 1)
            return math.sqrt(inner) if inner is not None and inner >= 0 else None
        if isinstance(expr.func, cst.Name) and expr.func.value in ("len", "int", "float"):
            if len(expr.args) != 1:
                return None
            argument = expr.args[0].value
            if expr.func.value != "len":
                return self.number(argument, depth + 1)
            literal = self._literal(argument, depth)
            return float(len(literal.elements)) if literal is not None else None
        return None

    def _literal(self, expr: cst.BaseExpression, depth: int) -> cst.Tuple | cst.List | None:
        if isinstance(expr, (cst.Tuple, cst.List)):
            if any(isinstance(element, cst.StarredElement) for element in expr.elements):
                return None
            return expr
        if isinstance(expr, cst.Name) and depth < _DEPTH:
            found = self.model.lookup(expr.value, self.scope)
            if found is not None and len(found[1]) == 1 and found[1][0].value is not None:
                return self._literal(found[1][0].value, depth + 1)
        return None

    def width(self, expr: cst.BaseExpression | None) -> int | None:
        value = self.number(expr)
        if value is None or value != int(value) or value <= 0:
            return None
        return int(value)

    def shape(self, expr: cst.BaseExpression | None) -> tuple[int | None, ...] | None:
        """A shape argument: a tuple/list of widths, or one width."""
        if expr is None:
            return None
        literal = self._literal(expr, 0)
        if literal is not None:
            return tuple(self.width(element.value) for element in literal.elements)
        if isinstance(expr, (cst.Integer, cst.Name, cst.BinaryOperation, cst.Call)):
            return (self.width(expr),)
        return None

    # -- arrays ----------------------------------------------------------------------------
    def array_init(self, expr: cst.BaseExpression, depth: int = 0) -> ArrayInit | None:
        """The Init and shape an array/tensor constructor expression makes."""
        if depth > _DEPTH:
            return None
        if isinstance(expr, cst.BinaryOperation) and isinstance(
                expr.operator, (cst.Multiply, cst.Divide)):
            return self._scaled(expr, depth)
        if not isinstance(expr, cst.Call):
            return None
        func = expr.func
        if isinstance(func, cst.Attribute) and func.attr.value in ("astype", "to", "float",
                                                                   "double", "T"):
            inner = self.array_init(func.value, depth + 1)
            return ArrayInit(inner.init, inner.shape, expr) if inner else None
        name = self.model.canonical(func)
        if name in api.PARAMETER_WRAPPERS and expr.args:
            inner = self.array_init(expr.args[0].value, depth + 1)
            return ArrayInit(inner.init, inner.shape, expr) if inner else None
        if name is None:
            return self._generator_draw(expr)
        return self._constructor(expr, name)

    def _constructor(self, expr: cst.Call, name: str) -> ArrayInit | None:
        spelled = self.model.module.code_for_node(expr.func)
        if name in api.ZERO_ARRAYS:
            return ArrayInit(Init("zeros", spelling=spelled), self._array_shape(expr, name), expr)
        if name in api.ONE_ARRAYS:
            return ArrayInit(Init("constant", 1.0, spelling=spelled),
                             self._array_shape(expr, name), expr)
        if name in api.FULL_ARRAYS:
            value = self.number(_argument(expr, 1, "fill_value"))
            return ArrayInit(_fill(value, spelled), self.shape(_argument(expr, 0, "shape")),
                             expr)
        if name in api.STANDARD_NORMAL:
            shape = self._array_shape(expr, name) if api.STANDARD_NORMAL[name] else \
                self.shape(_argument(expr, 0, "size"))
            return ArrayInit(Init("random", variance_rule=("fixed", 1.0), spelling=spelled),
                             shape, expr)
        if name in api.NORMAL_DRAWS:
            return self._normal(expr, spelled, 0)
        if name in api.UNIFORM_DRAWS:
            return self._uniform(expr, spelled, 0, ("low", "high", "size"))
        if name in api.JAX_NORMAL:
            return ArrayInit(Init("random", variance_rule=("fixed", 1.0), spelling=spelled),
                             self.shape(_argument(expr, 1, "shape")), expr)
        if name in api.JAX_UNIFORM:
            return self._uniform(expr, spelled, 1, ("minval", "maxval", "shape"))
        return None

    def _array_shape(self, expr: cst.Call, name: str) -> tuple[int | None, ...] | None:
        positional = [arg for arg in expr.args if arg.keyword is None]
        if name.startswith("torch.") or name in ("numpy.random.randn",):
            if len(positional) == 1:
                return self.shape(positional[0].value)
            return tuple(self.width(arg.value) for arg in positional) or None
        return self.shape(_argument(expr, 0, "shape"))

    def _normal(self, expr: cst.Call, spelled: str, offset: int) -> ArrayInit:
        mean = self.number(_argument(expr, offset, "loc"))
        scale = self.number(_argument(expr, offset + 1, "scale"))
        mean = 0.0 if _argument(expr, offset, "loc") is None else mean
        scale = 1.0 if _argument(expr, offset + 1, "scale") is None else scale
        rule = ("fixed", scale * scale) if scale is not None else None
        init = Init("random", mean=mean if mean is not None else math.nan, variance_rule=rule,
                    spelling=spelled)
        return ArrayInit(init, self.shape(_argument(expr, offset + 2, "size")), expr)

    def _uniform(self, expr: cst.Call, spelled: str, offset: int,
                 keywords: tuple[str, str, str]) -> ArrayInit:
        low_expr = _argument(expr, offset, keywords[0])
        high_expr = _argument(expr, offset + 1, keywords[1])
        low = 0.0 if low_expr is None else self.number(low_expr)
        high = 1.0 if high_expr is None else self.number(high_expr)
        if offset == 1:  # jax.random.uniform(key, shape, dtype, minval, maxval)
            low_expr, high_expr = _keyword(expr, "minval"), _keyword(expr, "maxval")
            low = 0.0 if low_expr is None else self.number(low_expr)
            high = 1.0 if high_expr is None else self.number(high_expr)
        init = _uniform_init(low, high, spelled)
        return ArrayInit(init, self.shape(_argument(expr, offset + 2 if offset == 0 else 1,
                                                    keywords[2])), expr)

    def _generator_draw(self, expr: cst.Call) -> ArrayInit | None:
        """`rng.normal(0, s, size=(a, b))` on a numpy Generator bound in this file."""
        func = expr.func
        if not isinstance(func, cst.Attribute) or func.attr.value not in api.GENERATOR_METHODS:
            return None
        method = func.attr.value
        spelled = self.model.module.code_for_node(func)
        if method == "normal":
            return self._normal(expr, spelled, 0)
        if method == "uniform":
            return self._uniform(expr, spelled, 0, ("low", "high", "size"))
        shape = (tuple(self.width(arg.value) for arg in expr.args) if method == "randn"
                 else self.shape(_argument(expr, 0, "size")))
        return ArrayInit(Init("random", variance_rule=("fixed", 1.0), spelling=spelled),
                         shape, expr)

    def _scaled(self, expr: cst.BinaryOperation, depth: int) -> ArrayInit | None:
        inner = self.array_init(expr.left, depth + 1)
        factor_expr = expr.right
        if inner is None and isinstance(expr.operator, cst.Multiply):
            inner = self.array_init(expr.right, depth + 1)
            factor_expr = expr.left
        if inner is None:
            return None
        factor = self.number(factor_expr)
        if factor is not None and isinstance(expr.operator, cst.Divide):
            factor = 1.0 / factor if factor != 0 else None
        spelled = self.model.module.code_for_node(expr)
        return ArrayInit(scaled_init(inner.init, factor, spelled), inner.shape, expr)

    # -- initializers ----------------------------------------------------------------------
    def torch_init_call(self, call: cst.Call, family: str, spelled: str) -> Init:
        """The Init a torch.nn.init.<family> call applies to its first argument."""
        if family == "zeros":
            return Init("zeros", spelling=spelled)
        if family == "ones":
            return Init("constant", 1.0, spelling=spelled)
        if family == "constant":
            return _fill(self.number(_argument(call, 1, "val")), spelled)
        if family == "normal":
            return _normal_init(self._optional(call, 1, "mean", 0.0),
                                self._optional(call, 2, "std", 1.0), spelled)
        if family == "uniform":
            return _uniform_init(self._optional(call, 1, "a", 0.0),
                                 self._optional(call, 2, "b", 1.0), spelled)
        if family == "xavier":
            gain = self._optional(call, 1, "gain", 1.0)
            rule = ("fan_avg", gain * gain) if gain is not None else None
            return Init("random", variance_rule=rule, spelling=spelled)
        if family == "kaiming":
            return self._kaiming(call, spelled)
        if family == "random":
            return Init("random", spelling=spelled)
        return Init("unknown", spelling=spelled)

    def _kaiming(self, call: cst.Call, spelled: str) -> Init:
        slope = self._optional(call, 1, "a", 0.0)
        mode = _string(_argument(call, 2, "mode")) or "fan_in"
        nonlinearity = _string(_argument(call, 3, "nonlinearity")) or "leaky_relu"
        if slope is None or mode not in ("fan_in", "fan_out"):
            return Init("random", spelling=spelled)
        gain = api.torch_gain(nonlinearity, slope)
        rule = (mode, gain * gain) if gain is not None else None
        return Init("random", variance_rule=rule, spelling=spelled)

    def tensor_fill_method(self, call: cst.Call, family: str, spelled: str) -> Init:
        """`w.zero_()`, `w.fill_(c)`, `w.normal_(mean, std)`, `w.uniform_(a, b)`."""
        if family == "zeros":
            return Init("zeros", spelling=spelled)
        if family == "constant":
            return _fill(self.number(_argument(call, 0, "value")), spelled)
        if family == "normal":
            return _normal_init(self._optional(call, 0, "mean", 0.0),
                                self._optional(call, 1, "std", 1.0), spelled)
        return _uniform_init(self._optional(call, 0, "from", 0.0),
                             self._optional(call, 1, "to", 1.0), spelled)

    def bound_value(self, expr: cst.BaseExpression, depth: int = 0) -> cst.BaseExpression:
        """What a local name is bound to when it is bound once (`wide = RandomNormal(1.0)`)."""
        while isinstance(expr, cst.Name) and depth < _DEPTH and not self.model.canonical(expr):
            found = self.model.lookup(expr.value, self.scope)
            if found is None or len(found[1]) != 1 or found[1][0].value is None:
                break
            expr, depth = found[1][0].value, depth + 1
        return expr

    def keras_initializer(self, expr: cst.BaseExpression) -> Init:
        expr = self.bound_value(expr)
        spelled = self.model.module.code_for_node(expr)
        text = _string(expr)
        if text is not None:
            known = api.KERAS_INITIALIZERS.get(text.lower())
            return _respelled(known, spelled) if known else Init("unknown", spelling=spelled)
        func = expr.func if isinstance(expr, cst.Call) else expr
        name = self.model.canonical(func) or ""
        if not name.startswith(api.KERAS_INITIALIZER_MODULES):
            return Init("unknown", spelling=spelled)
        family = api.KERAS_INITIALIZER_CLASSES.get(name.rsplit(".", 1)[-1])
        if family is None or not isinstance(expr, cst.Call):
            return Init("unknown", spelling=spelled)
        if family == "constant":
            value_expr = _argument(expr, 0, "value")
            return _fill(0.0 if value_expr is None else self.number(value_expr), spelled)
        if family == "random_normal":
            mean = self._optional(expr, 0, "mean", 0.0)
            std = self._optional(expr, 1, "stddev", 0.05)
            rule = ("fixed", std * std) if std is not None else None
            return Init("random", mean=math.nan if mean is None else mean, variance_rule=rule,
                        spelling=spelled)
        if family == "random_uniform":
            return _uniform_init(self._optional(expr, 0, "minval", -0.05),
                                 self._optional(expr, 1, "maxval", 0.05), spelled)
        return _respelled(api.KERAS_INITIALIZERS[family], spelled)

    def flax_initializer(self, expr: cst.BaseExpression) -> Init:
        expr = self.bound_value(expr)
        spelled = self.model.module.code_for_node(expr)
        called = isinstance(expr, cst.Call)
        name = self.model.canonical(expr.func if called else expr) or ""
        prefix = next((p for p in api.FLAX_INITIALIZER_MODULES if name.startswith(p)), None)
        family = api.FLAX_INITIALIZERS.get(name[len(prefix):]) if prefix else None
        if family is None or (not called and name.rsplit(".", 1)[-1] not in api.FLAX_UNCALLED):
            return Init("unknown", spelling=spelled)
        if family == "zeros":
            return Init("zeros", spelling=spelled)
        if family == "ones":
            return Init("constant", 1.0, spelling=spelled)
        if family == "constant":
            return _fill(self.number(_argument(expr, 0, "value")), spelled)
        if family == "normal":
            std = self._optional(expr, 0, "stddev", 1e-2)  # jax default stddev 1e-2
            rule = ("fixed", std * std) if std is not None else None
            return Init("random", variance_rule=rule, spelling=spelled)
        if family == "uniform":
            scale = self._optional(expr, 0, "scale", 1e-2)  # [0, scale), jax default 1e-2
            return _uniform_init(0.0, scale, spelled)
        return _respelled(api.KERAS_INITIALIZERS.get(family, Init("random")), spelled)

    def _optional(self, call: cst.Call, position: int, keyword: str,
                  default: float) -> float | None:
        expr = _argument(call, position, keyword)
        return default if expr is None else self.number(expr)


def scaled_init(init: Init, factor: float | None, spelled: str) -> Init:
    """`init * factor` (factor None: unknown)."""
    if init.kind == "zeros":
        return Init("zeros", spelling=spelled)
    if factor is None:
        return Init("random", mean=init.mean, spelling=spelled) if init.kind == "random" \
            else Init("unknown", spelling=spelled)
    if init.kind == "constant":
        return _fill(init.value * factor, spelled)
    if init.kind == "random":
        rule = init.variance_rule
        scaled = (rule[0], rule[1] * factor * factor) if rule else None
        return Init("random", mean=init.mean * factor, variance_rule=scaled, spelling=spelled)
    return init


def _fill(value: float | None, spelled: str) -> Init:
    if value is None:
        return Init("unknown", spelling=spelled)
    if value == 0.0:
        return Init("zeros", spelling=spelled)
    return Init("constant", value, spelling=spelled)


def _normal_init(mean: float | None, std: float | None, spelled: str) -> Init:
    """Normal(mean, std^2) draws; an unknown mean is NaN, an unknown std no variance rule."""
    rule = ("fixed", std * std) if std is not None else None
    return Init("random", mean=math.nan if mean is None else mean, variance_rule=rule,
                spelling=spelled)


def _uniform_init(low: float | None, high: float | None, spelled: str) -> Init:
    if low is None or high is None:
        return Init("random", mean=math.nan, spelling=spelled)
    if low == high:
        return _fill(low, spelled)
    # uniform on [low, high): mean (low + high) / 2, variance (high - low)^2 / 12
    return Init("random", mean=(low + high) / 2.0,
                variance_rule=("fixed", (high - low) ** 2 / 12.0), spelling=spelled)


def _respelled(init: Init, spelled: str) -> Init:
    """The same init, written explicitly by the user."""
    return Init(init.kind, init.value, init.mean, init.variance_rule, spelled)


def _argument(call: cst.Call, position: int, keyword: str) -> cst.BaseExpression | None:
    """The argument at `position` or named `keyword` (None when absent)."""
    for arg in call.args:
        if arg.keyword is not None and arg.keyword.value == keyword:
            return arg.value
    positional = [arg for arg in call.args if arg.keyword is None and not arg.star]
    if len(positional) > position:
        return positional[position].value
    return None


def _keyword(call: cst.Call, keyword: str) -> cst.BaseExpression | None:
    for arg in call.args:
        if arg.keyword is not None and arg.keyword.value == keyword:
            return arg.value
    return None


def _string(expr: cst.BaseExpression | None) -> str | None:
    if isinstance(expr, cst.SimpleString):
        value = expr.evaluated_value
        return value if isinstance(value, str) else None
    return None


argument = _argument
keyword_argument = _keyword
string_value = _string
