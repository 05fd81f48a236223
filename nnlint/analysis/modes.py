"""Train/eval mode of each model along function bodies and across calls within a file.

Which names are models, which code is evaluation, and in which mode each model is when
evaluation code calls it or a training step runs. The analysis interprets each function
body once per statement (loops twice or three times, until their entry state is stable),
never walking the file with a visitor; calls of the file's own functions apply the callee's
summary (what it needs from the caller's mode and what mode it leaves behind). Functions
of other modules of the tree contribute the same summary through ModuleSummary facts.

A model's mode is a set of possibilities:
- TRAIN: constructed (modules start in training mode, PyTorch Module.training), or
  switched with train() and then trained
- TRAIN_REQUESTED: train() was called and no training step followed yet; evaluation code
  reached in this mode asked for it (batch-norm recalibration, Monte-Carlo dropout)
- EVAL: eval() was called and no evaluation has used it yet (a deliberate freeze, maybe)
- EVALUATED: eval() was called and evaluation code ran the model in that mode
- PRETRAINED: loaded with from_pretrained, which returns eval mode (from memory)
- CALLER: a parameter or attribute whose mode is whatever the caller left
- UNKNOWN: anything else (train(flag), reassigned from an unknown call)
"""
from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Iterator

import libcst as cst

from nnlint.analysis.api import modes as api
from nnlint.analysis.names import dotted_name
from nnlint.analysis.summary import register_summariser

if TYPE_CHECKING:
    from nnlint.analysis.model import ClassInfo, ModuleModel, Scope
    from nnlint.analysis.summary import ModuleSummary

TRAIN, EVAL, EVALUATED, PRETRAINED, CALLER, UNKNOWN = (
    "train", "eval", "evaluated", "pretrained", "caller", "unknown")
TRAIN_REQUESTED = "train-requested"
Modes = frozenset
State = dict  # model key -> frozenset of modes

#: how often a loop body is re-run to reach a stable entry state (two suffice for the
#: epoch loop; a third catches a mode that needs two iterations to travel round)
MAX_LOOP_PASSES = 3
_WORD = re.compile(r"[A-Z]?[a-z]+|[A-Z]+(?![a-z])|\d+")


def words(name: str) -> list[str]:
    """`validate_epoch` -> ["validate", "epoch"]; `runTest` -> ["run", "test"] (lowercase)."""
    return [part.lower() for part in _WORD.findall(name)]


def is_evaluation_name(name: str) -> bool:
    """A function or method named for evaluation (pytest's `test_*` functions are not)."""
    parts = words(name)
    if not parts or any(part in api.TRAINING_WORDS for part in parts):
        return False
    if name.startswith("test_") and parts[1:2] not in (["epoch"], ["one"], ["step"], ["loop"]):
        return False
    return any(part in api.EVALUATION_WORDS for part in parts)


def is_model_name(name: str) -> bool:
    """A name practitioners give models (`model`, `net`, `damage_net`, `text_encoder`)."""
    last = name.rsplit(".", 1)[-1].lower()
    return last in api.MODEL_NAMES or last.endswith(api.MODEL_NAME_SUFFIXES)


def _is_evaluation_data(expr: cst.BaseExpression) -> bool:
    """`val_loader`, `loaders["test"]`, `tqdm(holdout_set)`, `self.valid_data`."""
    while True:
        if isinstance(expr, cst.Call):
            if not expr.args:
                return False
            inner = expr.func
            if isinstance(inner, cst.Attribute) or dotted_name(inner) is None:
                return False
            expr = expr.args[0].value  # tqdm(x), enumerate(x), iter(x)
        elif isinstance(expr, cst.Subscript):
            index = expr.slice[0].slice if len(expr.slice) == 1 else None
            if (isinstance(index, cst.Index) and isinstance(index.value, cst.SimpleString)
                    and _has_data_word(index.value.evaluated_value)):
                return True
            expr = expr.value
        else:
            break
    written = dotted_name(expr)
    return written is not None and _has_data_word(written.rsplit(".", 1)[-1])


def _is_evaluation_argument(expr: cst.BaseExpression) -> bool:
    """A model input named as evaluation data: `x_val`, `test_images.to(device)`."""
    while isinstance(expr, cst.Subscript):
        expr = expr.value
    written = model_key(expr)
    return written is not None and _has_data_word(written.rsplit(".", 1)[-1])


def _has_data_word(text: object) -> bool:
    if not isinstance(text, str):
        return False
    parts = words(text)
    return (any(part in api.EVALUATION_DATA_WORDS for part in parts)
            and not any(part in api.TRAINING_WORDS for part in parts))


# -- expression scanning (dataclass fields, never a visitor) ---------------------------------
_CHILD_FIELDS: dict[type, tuple[str, ...]] = {}
_CONTENT = (cst.BaseExpression, cst.Arg, cst.BaseElement, cst.BaseDictElement,
            cst.CompFor, cst.CompIf, cst.SubscriptElement, cst.BaseSlice,
            cst.FormattedStringExpression, cst.BaseSmallStatement, cst.AssignTarget)


def _child_fields(kind: type) -> tuple[str, ...]:
    names = _CHILD_FIELDS.get(kind)
    if names is None:
        names = tuple(f.name for f in dataclasses.fields(kind)
                      if not f.name.startswith(("whitespace", "lpar", "rpar", "comma",
                                                "semicolon", "equal", "star", "dot")))
        _CHILD_FIELDS[kind] = names
    return names


_CONTENT_TYPES: dict[type, bool] = {}


def _is_content(value: object) -> bool:
    """An expression-level node worth descending into (cached per type: libcst's base
    classes are ABCs, whose isinstance checks dominate the scan otherwise)."""
    kind = type(value)
    known = _CONTENT_TYPES.get(kind)
    if known is None:
        known = _CONTENT_TYPES[kind] = isinstance(value, _CONTENT)
    return known


#: exact types (libcst nodes are never subclassed), so `type(node) in` replaces isinstance
_COMPREHENSIONS = frozenset({cst.ListComp, cst.SetComp, cst.GeneratorExp, cst.DictComp})


def calls_in(node: cst.CSTNode, evaluation_data: dict | None = None) -> list[cst.Call]:
    """Calls inside an expression or small statement, in evaluation order (post-order).

    Lambdas are skipped: their body runs later, when something calls them. When
    `evaluation_data` is given, calls inside a comprehension over evaluation data
    (`[model(x) for x in val_loader]`) map id(call) -> that iterable there.
    """
    # the hottest loop of the mode analysis (profiled on benchmarks/bench.py's tree): exact
    # type tests and cached per-type answers instead of isinstance on libcst's ABCs
    found: list[cst.Call] = []
    stack: list[tuple[cst.CSTNode, bool, cst.CSTNode | None]] = [(node, False, None)]
    push, pop = stack.append, stack.pop
    content = _CONTENT_TYPES
    while stack:
        current, expanded, data = pop()
        if expanded:
            found.append(current)  # type: ignore[arg-type]
            if data is not None and evaluation_data is not None:
                evaluation_data[id(current)] = data
            continue
        kind = type(current)
        if kind is cst.Lambda:
            continue
        if kind in _COMPREHENSIONS and evaluation_data is not None:
            loop: cst.CompFor | None = current.for_in
            while loop is not None:
                if _is_evaluation_data(loop.iter):
                    data = loop.iter
                loop = loop.inner_for_in
        if kind is cst.Call:
            push((current, True, data))
        children = []
        for name in _child_fields(kind):
            value = getattr(current, name)
            value_type = type(value)
            if value_type is tuple or value_type is list:
                children.extend(item for item in value
                                if content.get(type(item)) or _is_content(item))
            elif content.get(value_type) or _is_content(value):
                children.append(value)
        for child in reversed(children):
            push((child, False, data))
    return found


def model_key(expr: cst.BaseExpression) -> str | None:
    """The dotted name a module expression is tracked under: `net.to(dev)` -> `net`."""
    while (isinstance(expr, cst.Call) and isinstance(expr.func, cst.Attribute)
           and expr.func.attr.value in api.SELF_RETURNING_METHODS):
        expr = expr.func.value
    return dotted_name(expr)


# -- results -----------------------------------------------------------------------------------
@dataclass
class Finding:
    """A mode hazard the analysis found; rules turn these into reports."""

    code: str
    node: cst.CSTNode
    #: the model expression as written where the finding is reported
    model: str
    #: mode-dependent layers of the model when known ("dropout and batch norm"), else ""
    layers: str = ""
    #: for a call handing the model to a function of another module: that function's name
    callee: str = ""
    #: what left the model in eval mode (NNL402): "an earlier evaluation" / "from_pretrained"
    cause: str = ""
    #: loop iterable (NNL404)
    data: str = ""


@dataclass
class Observation:
    """A model call the analysis saw: where, which model, in which modes (for tests/tools)."""

    node: cst.Call
    function: str
    model: str
    modes: set[str]
    is_evaluation: bool


@dataclass
class Effect:
    """What a function does with one model it receives (a parameter, `self.x` or a global)."""

    #: the first model call in evaluation code made in the caller's mode (None: none)
    needs_eval: cst.CSTNode | None = None
    #: the first training step made in the caller's mode
    trains: cst.CSTNode | None = None
    #: modes at return; CALLER means "as the caller left it"
    exit: frozenset = frozenset({CALLER})
    #: the evaluation made in the caller's mode came from another module (report at the call)
    remote: bool = False


@dataclass
class FunctionSummary:
    #: effect key ("0" for parameter 0, "self.net", "global:model") -> Effect
    effects: dict[str, Effect] = field(default_factory=dict)


@dataclass
class _Context:
    """Lexical facts of the statement being interpreted."""

    no_grad: bool = False
    #: gradients are switched by a non-literal flag (`set_grad_enabled(is_training)`)
    grad_managed: bool = False
    evaluation: bool = False
    #: a loop over evaluation data encloses this statement (its iterable, as written)
    evaluation_loop: cst.BaseExpression | None = None
    after_training: bool = False
    #: inside a loop of this body (code after an inner training loop there is not "after
    #: training": GAN samples drawn between epochs are drawn in training mode on purpose)
    in_loop: bool = False


class ModeAnalysis:
    """The mode facts of one file; build with `ModeAnalysis.of(model)` (memoised)."""

    def __init__(self, model: "ModuleModel") -> None:
        self.model = model
        imported = {name.split(".")[0] for name in model.names.imported_modules}
        imported |= {name.split(".")[0] for local in model.names.locals()
                     for name in model.names.candidates(local)}
        #: the file uses PyTorch (nothing here applies otherwise)
        self.uses_torch = bool(imported & {"torch", "torchvision", "timm", "transformers",
                                           "lightning", "pytorch_lightning"})
        #: names alone may identify models only where no argument-mode framework is imported
        self.trust_names = self.uses_torch and not imported & set(api.ARGUMENT_MODE_PACKAGES)
        self.findings: dict[int, list[Finding]] = {}
        self.observations: list[Observation] = []
        self.summaries: dict[int, FunctionSummary] = {}
        self._in_progress: set[int] = set()
        self._statement_calls: dict[int, list[cst.Call]] = {}
        #: id(call) -> evaluation iterable of the comprehension around the call
        self.comprehension_data: dict[int, cst.BaseExpression] = {}
        self._evaluation_functions: dict[int, bool] = {}
        #: function -> for each call of it in the file, whether the call runs under no-grad
        self._call_contexts: dict[int, list[bool]] = {}
        #: function -> NNL404 findings that stand only if some caller does not wrap no-grad
        self._pending_graph_findings: dict[int, list[Finding]] = {}
        if self.uses_torch:
            self._run_all()

    @classmethod
    def of(cls, model: "ModuleModel") -> "ModeAnalysis":
        memo = model.memo.setdefault("modes", {})
        if "analysis" not in memo:
            memo["analysis"] = cls(model)
        return memo["analysis"]

    # -- public queries -------------------------------------------------------------------
    def findings_at(self, node: cst.CSTNode, code: str) -> list[Finding]:
        return [found for found in self.findings.get(id(node), ()) if found.code == code]

    def is_evaluation_function(self, function: cst.FunctionDef) -> bool:
        """Named for evaluation and not a hook whose mode a framework manages."""
        known = self._evaluation_functions.get(id(function))
        if known is None:
            known = (is_evaluation_name(function.name.value)
                     and not self._framework_managed(function))
            self._evaluation_functions[id(function)] = known
        return known

    def summary_of(self, function: cst.FunctionDef) -> FunctionSummary:
        summary = self.summaries.get(id(function))
        if summary is not None:
            return summary
        if id(function) in self._in_progress:
            return FunctionSummary()  # recursion: no known effect
        self._in_progress.add(id(function))
        summary = _Interpreter(self, function).run()
        self._in_progress.discard(id(function))
        self.summaries[id(function)] = summary
        return summary

    def layers_of_class(self, info: "ClassInfo", seen: frozenset = frozenset()) -> str | None:
        """Mode-dependent layers a class of the file holds ("" none known; None unknown)."""
        if info.name in seen:
            return None
        found: set[str] = set()
        complete = all(base.startswith("torch.nn.") or base in self.model.classes
                       for base in info.bases)
        for base in info.bases:
            local = self.model.classes.get(base)
            if local is not None:
                inherited = self.layers_of_class(local, seen | {info.name})
                if inherited is None:
                    complete = False
                elif inherited:
                    found.update(inherited.split(" and "))
        for bindings in info.attributes.values():
            for binding, _ in bindings:
                layers = self._layers_of_value(binding.value, seen | {info.name})
                if layers is None:
                    complete = False
                elif layers:
                    found.update(layers.split(" and "))
        for method in info.methods.values():
            for call in self._calls_of_body(method):
                label = api.FUNCTIONAL_MODE_DEPENDENT.get(self.model.canonical(call.func) or "")
                if label and any(arg.keyword is not None and arg.keyword.value == "training"
                                 for arg in call.args):
                    found.add(label)
        if found:
            return " and ".join(sorted(found))
        return "" if complete else None

    # -- building -------------------------------------------------------------------------
    def _run_all(self) -> None:
        functions = list(self._functions(self.model.module.body))
        for function in functions:
            self.summary_of(function)
        _Interpreter(self, None).run()
        for function in functions:
            pending = self._pending_graph_findings.get(id(function), ())
            contexts = self._call_contexts.get(id(function), [])
            # A caller may wrap the call in no_grad; with no caller in the file, or with one
            # that does, the loop may run without graphs: stay silent.
            if contexts and not any(contexts):
                for finding in pending:
                    self.add_finding(finding)

    def _functions(self, body) -> Iterator[cst.FunctionDef]:
        for statement in body:
            if isinstance(statement, cst.FunctionDef):
                yield statement
                if isinstance(statement.body, cst.IndentedBlock):
                    yield from self._functions(statement.body.body)
            elif isinstance(statement, cst.ClassDef):
                if isinstance(statement.body, cst.IndentedBlock):
                    yield from self._functions(statement.body.body)
            else:
                for block in _blocks_of(statement):
                    yield from self._functions(block)

    def _framework_managed(self, function: cst.FunctionDef) -> bool:
        info = self.model.class_of_method(function)
        return info is not None and self.model.is_subclass_of(info, api.FRAMEWORK_MANAGED_BASES)

    def statement_calls(self, statement: cst.CSTNode) -> list[cst.Call]:
        """Calls of a simple statement or of a compound statement's header (memoised)."""
        calls = self._statement_calls.get(id(statement))
        if calls is None:
            calls = []
            for part in _header_parts(statement):
                calls.extend(calls_in(part, self.comprehension_data))
            self._statement_calls[id(statement)] = calls
        return calls

    def _calls_of_body(self, function: cst.FunctionDef) -> Iterator[cst.Call]:
        for statement in _statements_of(function.body):
            yield from self.statement_calls(statement)

    def _layers_of_value(self, value: cst.BaseExpression | None,
                         seen: frozenset) -> str | None:
        """Mode-dependent layers of a module-building expression ("" none, None unknown)."""
        if value is None:
            return None
        if not isinstance(value, cst.Call):
            written = dotted_name(value)
            if written is None:
                return ""  # literals, arithmetic, subscripts: not modules
            # an injected module is named like one (`self.backbone = backbone`)
            last = written.rsplit(".", 1)[-1]
            return None if is_model_name(last) or last in api.MODULE_NAMES else ""
        name = self.model.canonical(value.func)
        if name is None:
            written = dotted_name(value.func) or ""
            local = self.model.classes.get(written)
            if local is not None:
                return self.layers_of_class(local, seen)
            return "" if written in api.NON_MODULE_BUILTINS else None
        if not name.startswith(("torch.", "torchvision.", "timm.", "transformers.")):
            return ""  # math.sqrt, np.zeros, ...: values, not modules
        if name in api.MODE_DEPENDENT_LAYERS:
            return api.MODE_DEPENDENT_LAYERS[name]
        if name in api.CONTAINERS:
            found: set[str] = set()
            for arg in value.args:
                inner = arg.value
                items = ([element.value for element in inner.elements]
                         if isinstance(inner, (cst.List, cst.Tuple)) else [inner])
                for item in items:
                    layers = self._layers_of_value(item, seen)
                    if layers is None:
                        return None
                    if layers:
                        found.update(layers.split(" and "))
            return " and ".join(sorted(found))
        last = name.rsplit(".", 1)[-1]
        if name.startswith("torch.nn.") and name.count(".") == 2 and last[:1].isupper():
            # nn.RNN/LSTM/GRU take a `dropout` argument (PyTorch documentation)
            if any(arg.keyword is not None and arg.keyword.value == "dropout"
                   for arg in value.args):
                return "dropout"
            return ""
        if name.startswith("torch.") and not last[:1].isupper():
            return ""  # tensors and parameters built by torch functions
        return None

    def creation(self, value: cst.BaseExpression | None, state: State,
                 layers: dict | None = None) -> tuple[frozenset, str | None] | None:
        """(modes, layers) when `value` builds or loads a model, else None.

        `net.to(device)` and `other = net` keep the tracked model `net` (and its mode).
        """
        if value is None:
            return None
        layers = layers if layers is not None else {}
        key = model_key(value)
        if key is not None and key in state:
            return state[key], layers.get(key)
        while (isinstance(value, cst.Call) and isinstance(value.func, cst.Attribute)
               and value.func.attr.value in api.SELF_RETURNING_METHODS):
            value = value.func.value
        if not isinstance(value, cst.Call):
            return None
        func = value.func
        if isinstance(func, cst.Attribute) and func.attr.value == api.PRETRAINED_LOADER:
            return self._pretrained(func.value)
        name = self.model.canonical(func)
        written = dotted_name(func)
        if name is None:
            local = self.model.classes.get(written or "")
            if local is not None and self.model.is_subclass_of(local, api.MODULE_BASE_PREFIXES):
                return frozenset({TRAIN}), self.layers_of_class(local)
            return None
        if name in api.WRAPPERS and value.args:
            inner = model_key(value.args[0].value)
            if inner is not None and inner in state:
                return state[inner], layers.get(inner)
            return None
        last = name.rsplit(".", 1)[-1]
        if name.startswith("torch.nn.") and name.count(".") == 2 and last[:1].isupper():
            if last in api.NOT_MODULES:
                return None
            return frozenset({TRAIN}), self._layers_of_value(value, frozenset())
        if name.startswith(api.TRAINING_MODE_FACTORY_PREFIXES) and not last[:1].isupper():
            return frozenset({TRAIN}), None
        if name in api.UNKNOWN_MODE_FACTORIES:
            return frozenset({UNKNOWN}), None
        if self.model.project is not None and last[:1].isupper():
            ancestry = tuple(self.model.project.class_ancestry(name, self.model))
            if any(base.startswith(api.MODULE_BASE_PREFIXES) for base in ancestry):
                return frozenset({TRAIN}), None
        return None

    def _pretrained(self, receiver: cst.BaseExpression) -> tuple[frozenset, None] | None:
        name = self.model.canonical(receiver)
        if name is not None:
            last = name.rsplit(".", 1)[-1]
            if (name.startswith(api.PRETRAINED_PACKAGES)
                    and any(mark in last for mark in api.PRETRAINED_MODEL_MARKERS)
                    and not any(mark in last for mark in api.PRETRAINED_NOT_MODEL_MARKERS)):
                return frozenset({PRETRAINED}), None
            return None
        local = self.model.classes.get(dotted_name(receiver) or "")
        if local is not None and self.model.is_subclass_of(
                local, ("transformers.PreTrainedModel",
                        "transformers.modeling_utils.PreTrainedModel")):
            return frozenset({PRETRAINED}), None
        return None

    def add_finding(self, finding: Finding) -> None:
        existing = self.findings.setdefault(id(finding.node), [])
        for index, other in enumerate(existing):
            if other.code == finding.code:
                if finding.layers and not other.layers:
                    existing[index] = finding  # the same place, now with known layers
                return
        existing.append(finding)


def _blocks_of(statement: cst.CSTNode) -> Iterator[tuple]:
    """The statement lists nested in a compound statement (not functions or classes)."""
    def body(suite) -> tuple:
        return tuple(suite.body) if isinstance(suite, cst.IndentedBlock) else ()

    if isinstance(statement, (cst.If, cst.While, cst.For, cst.With)):
        yield body(statement.body)
        orelse = getattr(statement, "orelse", None)
        while orelse is not None:
            yield body(orelse.body)
            orelse = orelse.orelse if isinstance(orelse, cst.If) else None
    elif isinstance(statement, (cst.Try, cst.TryStar)):
        yield body(statement.body)
        for handler in statement.handlers:
            yield body(handler.body)
        for extra in (statement.orelse, statement.finalbody):
            if extra is not None:
                yield body(extra.body)
    elif isinstance(statement, cst.Match):
        for case in statement.cases:
            yield body(case.body)


def _statements_of(suite: cst.BaseSuite) -> Iterator[cst.CSTNode]:
    """Every statement of a body, nested blocks included, functions and classes excluded."""
    return _statements_of_list(list(suite.body) if isinstance(suite, cst.IndentedBlock)
                               else [suite])


def _statements_of_list(statements: list) -> Iterator[cst.CSTNode]:
    pending = list(statements)
    while pending:
        statement = pending.pop(0)
        if isinstance(statement, (cst.FunctionDef, cst.ClassDef)):
            continue
        yield statement
        for block in _blocks_of(statement):
            pending.extend(block)


def _header_parts(statement: cst.CSTNode) -> list[cst.CSTNode]:
    if isinstance(statement, cst.SimpleStatementLine):
        return list(statement.body)
    if isinstance(statement, cst.SimpleStatementSuite):
        return list(statement.body)
    if isinstance(statement, (cst.If, cst.While)):
        return [statement.test]
    if isinstance(statement, cst.For):
        return [statement.iter]
    if isinstance(statement, cst.With):
        return [item.item for item in statement.items]
    return []


class _Loop:
    def __init__(self) -> None:
        self.breaks: list[State] = []
        self.continues: list[State] = []


class _Interpreter:
    """Runs one function body (or the module body) over model modes."""

    def __init__(self, analysis: ModeAnalysis, function: cst.FunctionDef | None) -> None:
        self.analysis = analysis
        self.model = analysis.model
        self.function = function
        self.scope: "Scope" = self.model.scope_of(function)
        self.info = self.model.class_of_method(function)
        self.summary = FunctionSummary()
        self.returns: list[State] = []
        self.loops: list[_Loop] = []
        self.name = function.name.value if function is not None else "<module>"
        self.parameters = _parameter_names(function) if function is not None else []
        self.self_name = (self.parameters[0] if self.info is not None and self.parameters
                          and not _is_static(function) else None)
        self.managed = function is not None and analysis._framework_managed(function)
        self.is_evaluation = function is not None and analysis.is_evaluation_function(function)
        #: keys used as models somewhere in this body (called, switched or built)
        self.called: set[str] = set()
        self.reported: set[tuple[str, str]] = set()
        #: model key -> its mode-dependent layers ("" none, None unknown)
        self.layers: dict[str, str | None] = {}
        statements = (_statements_of(function.body) if function is not None
                      else _statements_of_list(list(self.model.module.body)))
        for statement in statements:
            for call in analysis.statement_calls(statement):
                key = dotted_name(call.func)
                if key is not None:
                    self.called.add(key)

    # -- entry ------------------------------------------------------------------------------
    def run(self) -> FunctionSummary:
        state: State = {}
        if self.function is not None:
            no_grad = _decorated_no_grad(self.model, self.function)
            context = _Context(no_grad=no_grad is True, evaluation=self.is_evaluation)
            end = self._body(self.function.body, state, context)
        else:
            context = _Context()
            end = self._statements(self.model.module.body, state, context)
        exits = self._join(end, *self.returns) or {}
        for key, modes in exits.items():
            effect_key = self._effect_key(key)
            if effect_key is not None and modes != frozenset({CALLER}):
                self.summary.effects.setdefault(effect_key, Effect())
        for effect_key, effect in self.summary.effects.items():
            effect.exit = exits.get(self._local_key(effect_key), frozenset({CALLER}))
        return self.summary

    def _entry_modes(self, key: str) -> frozenset | None:
        """The modes a key starts with in this body when it is a model we did not build."""
        if self.managed:
            return None
        head = key.split(".")[0]
        if self.self_name is not None and head == self.self_name and "." in key:
            attribute = key.split(".", 1)[1]
            if "." in attribute:
                return None
            if attribute in self.info.attributes and self._attribute_is_model(attribute):
                return frozenset({CALLER})
            if self.analysis.trust_names and is_model_name(attribute):
                return frozenset({CALLER})
            return None
        if "." in key:
            return None
        if head in self.parameters:
            return frozenset({CALLER}) if self.analysis.trust_names and is_model_name(head) \
                else None
        if self.function is not None and self._is_global_variable(head) \
                and self.analysis.trust_names and is_model_name(head):
            return frozenset({CALLER})  # a global model set up by the script
        return None

    def _is_global_variable(self, name: str) -> bool:
        """`name` is a module-level variable (assigned, not a def or class) seen from here."""
        found = self.model.lookup(name, self.scope)
        return found is not None and found[0] is self.model.module_scope and any(
            not isinstance(binding.statement, (cst.FunctionDef, cst.ClassDef))
            for binding in found[1])

    def _attribute_is_model(self, attribute: str) -> bool:
        for binding, _ in self.info.attributes.get(attribute, ()):
            if self.analysis.creation(binding.value, {}) is not None:
                return True
        return False

    def _effect_key(self, key: str) -> str | None:
        """How callers name `key`: "0" (parameter 0), "self.net", "global:model"; None local."""
        if self.function is None:
            return None
        head = key.split(".")[0]
        if self.self_name is not None and head == self.self_name and "." in key:
            return "self." + key.split(".", 1)[1]
        if head in self.parameters:
            return str(self.parameters.index(head)) if head == key else None
        if head == key and self._is_global_variable(head):
            return "global:" + key
        return None

    def _local_key(self, effect_key: str) -> str:
        if effect_key.startswith("self."):
            return f"{self.self_name}.{effect_key[5:]}"
        if effect_key.startswith("global:"):
            return effect_key[7:]
        return self.parameters[int(effect_key)]

    def _join(self, *states: "State | None") -> "State | None":
        """Merge paths; a model one path never touched keeps its entry modes on that path."""
        live = [state for state in states if state is not None]
        if len(live) <= 1:
            return dict(live[0]) if live else None
        joined: State = {}
        for key in set().union(*live):
            modes: set[str] = set()
            for state in live:
                modes |= state.get(key) or self._entry_modes(key) or {UNKNOWN}
            joined[key] = frozenset(modes)
        return joined

    def _modes(self, key: str, state: State) -> frozenset | None:
        if key in state:
            return state[key]
        entry = self._entry_modes(key)
        if entry is not None:
            state[key] = entry
        return entry

    # -- statements ------------------------------------------------------------------------
    def _body(self, suite: cst.BaseSuite, state: State | None, context: _Context
              ) -> State | None:
        if isinstance(suite, cst.IndentedBlock):
            return self._statements(suite.body, state, context)
        if isinstance(suite, cst.SimpleStatementSuite):
            return self._simple(suite, state, context)
        return state

    def _statements(self, statements, state: State | None, context: _Context) -> State | None:
        trained_before = context.after_training
        for statement in statements:
            if state is None:
                return None
            state = self._statement(statement, state, replace_context(
                context, after_training=trained_before))
            if (isinstance(statement, (cst.For, cst.While)) and not context.in_loop
                    and self._trains_in(statement)):
                trained_before = True
        return state

    def _statement(self, statement: cst.CSTNode, state: State, context: _Context
                   ) -> State | None:
        if isinstance(statement, (cst.SimpleStatementLine, cst.SimpleStatementSuite)):
            return self._simple(statement, state, context)
        if isinstance(statement, (cst.FunctionDef, cst.ClassDef)):
            return state
        self._events(self.analysis.statement_calls(statement), state, context)
        if isinstance(statement, cst.If):
            taken = self._body(statement.body, dict(state), context)
            other = (self._statement(statement.orelse, dict(state), context)
                     if isinstance(statement.orelse, cst.If)
                     else self._body(statement.orelse.body, dict(state), context)
                     if statement.orelse is not None else state)
            return self._join(taken, other)
        if isinstance(statement, (cst.For, cst.While)):
            return self._loop(statement, state, context)
        if isinstance(statement, cst.With):
            return self._body(statement.body, state, self._with_context(statement, context))
        if isinstance(statement, (cst.Try, cst.TryStar)):
            after = self._body(statement.body, dict(state), context)
            handlers = [self._body(handler.body, self._join(state, after), context)
                        for handler in statement.handlers]
            if statement.orelse is not None:
                after = self._body(statement.orelse.body, after, context)
            joined = self._join(after, *handlers)
            if statement.finalbody is not None and joined is not None:
                joined = self._body(statement.finalbody.body, joined, context)
            return joined
        if isinstance(statement, cst.Match):
            cases = [self._body(case.body, dict(state), context) for case in statement.cases]
            return self._join(state, *cases)
        return state

    def _loop(self, statement: cst.For | cst.While, state: State, context: _Context
              ) -> State | None:
        inner = context
        if isinstance(statement, cst.For) and not self.managed:
            data = statement.iter
            # a loop that computes gradients (test-time adaptation, adversarial inputs) is
            # not an evaluation pass that merely forgot no_grad
            loop_data = None if self._trains_in(statement) else data
            if _is_evaluation_data(statement.iter):
                inner = replace_context(context, evaluation=True, evaluation_loop=loop_data)
            elif context.evaluation:
                inner = replace_context(context, evaluation_loop=loop_data)
            elif context.no_grad and self._calls_model_in(statement, state):
                inner = replace_context(context, evaluation=True)
            for name in _target_names(statement.target):
                self._forget(name, state)
        inner = replace_context(inner, in_loop=True)
        head = dict(state)
        loop = _Loop()
        out: State | None = None
        for _ in range(MAX_LOOP_PASSES):
            self.loops.append(loop)
            loop.continues = []
            out = self._body(statement.body, dict(head), inner)
            self.loops.pop()
            following = self._join(state, out, *loop.continues)
            if following == head:
                break
            head = following if following is not None else head
        endless = (isinstance(statement, cst.While) and isinstance(statement.test, cst.Name)
                   and statement.test.value == "True")
        after = self._join(*loop.breaks) if endless else self._join(head, *loop.breaks)
        if statement.orelse is not None and after is not None:
            after = self._body(statement.orelse.body, after, context)
        return after

    def _simple(self, statement, state: State, context: _Context) -> State | None:
        self._events(self.analysis.statement_calls(statement), state, context)
        for small in statement.body:
            if isinstance(small, cst.Assign):
                for target in small.targets:
                    self._assign(target.target, small.value, state)
            elif isinstance(small, cst.AnnAssign) and small.value is not None:
                self._assign(small.target, small.value, state)
            elif isinstance(small, cst.Return):
                self.returns.append(dict(state))
                return None
            elif isinstance(small, cst.Raise):
                return None
            elif isinstance(small, cst.Break) and self.loops:
                self.loops[-1].breaks.append(dict(state))
                return None
            elif isinstance(small, cst.Continue) and self.loops:
                self.loops[-1].continues.append(dict(state))
                return None
            elif (isinstance(small, cst.Expr) and isinstance(small.value, cst.Call)
                  and (self.model.canonical(small.value.func)
                       or dotted_name(small.value.func)) in api.EXITS):
                return None
        return state

    def _assign(self, target: cst.BaseExpression, value: cst.BaseExpression,
                state: State) -> None:
        key = dotted_name(target)
        if key is None:
            for element in getattr(target, "elements", ()):
                inner = dotted_name(element.value)
                if inner is not None:
                    self._forget(inner, state)
            return
        created = self.analysis.creation(value, state, self.layers)
        if created is None:
            self._forget(key, state)
            return
        state[key] = created[0]
        self.layers[key] = created[1]

    def _forget(self, key: str, state: State) -> None:
        """`key` now holds something unknown: a model of unknown mode if it was a model."""
        if key in state or self._entry_modes(key) is not None:
            state[key] = frozenset({UNKNOWN})
        self.layers.pop(key, None)

    def _with_context(self, statement: cst.With, context: _Context) -> _Context:
        for item in statement.items:
            grad = _grad_setting(self.model, item.item)
            if grad is False:
                context = replace_context(context, no_grad=True)
            elif grad is True:
                context = replace_context(context, no_grad=False)
            elif (isinstance(item.item, cst.Call)
                  and self.model.canonical(item.item.func) in api.SET_GRAD_ENABLED):
                context = replace_context(context, grad_managed=True)
        return context

    # -- events ----------------------------------------------------------------------------
    def _events(self, calls: list[cst.Call], state: State, context: _Context) -> None:
        for call in calls:
            func = call.func
            if isinstance(func, cst.Attribute):
                method = func.attr.value
                receiver = model_key(func.value)
                if method in ("eval", "train") and receiver is not None:
                    self._switch(receiver, method, call, state)
                    continue
                if method == "backward" or self.model.canonical(func) in api.BACKWARD_FUNCTIONS:
                    if not context.evaluation:  # input gradients of an evaluation pass
                        self._training_step(call, state)
                    continue
                if method == "forward" and receiver is not None:
                    self._model_call(call, receiver, state, context)
                    continue
            elif self.model.canonical(func) in api.BACKWARD_FUNCTIONS:
                if not context.evaluation:
                    self._training_step(call, state)
                continue
            key = dotted_name(func)
            if key is None:
                continue
            if self._call_function(call, key, state, context):
                continue
            self._model_call(call, key, state, context)

    def _switch(self, key: str, method: str, call: cst.Call, state: State) -> None:
        if key not in state and self._entry_modes(key) is None and not (
                self.analysis.trust_names and is_model_name(key)):
            return
        if method == "eval" and not call.args:
            state[key] = frozenset({EVAL})
            return
        if method == "train":
            flag = call.args[0].value if call.args else cst.Name("True")
            if isinstance(flag, cst.Name) and flag.value in ("True", "False"):
                state[key] = frozenset({TRAIN_REQUESTED if flag.value == "True" else EVAL})
                return
        state[key] = frozenset({UNKNOWN})

    def _model_call(self, call: cst.Call, key: str, state: State, context: _Context) -> None:
        modes = self._modes(key, state)
        if modes is None:
            return
        comprehension = self.analysis.comprehension_data.get(id(call))
        if comprehension is not None and not self.managed and context.evaluation_loop is None:
            context = replace_context(context, evaluation=True, evaluation_loop=comprehension)
        evaluation = context.evaluation or context.no_grad and (
            context.after_training or any(_is_evaluation_argument(arg.value)
                                          for arg in call.args[:1]))
        self.analysis.observations.append(Observation(call, self.name, key, set(modes),
                                                      evaluation))
        if (evaluation and context.evaluation_loop is not None and not context.no_grad
                and not context.grad_managed):
            self._graph_finding(key, Finding("NNL404", call, key, data=(
                self.model.module.code_for_node(context.evaluation_loop))))
        if not evaluation:
            return
        layers = self.layers.get(key, None)
        if layers == "":
            return
        if TRAIN in modes:
            self.analysis.add_finding(Finding("NNL401", call, key, layers or ""))
        if CALLER in modes:
            effect = self._effect(key)
            if effect is not None and effect.needs_eval is None:
                effect.needs_eval = call
        if EVAL in modes:
            state[key] = (modes - {EVAL}) | {EVALUATED}

    def _training_step(self, call: cst.Call, state: State) -> None:
        for key, modes in list(state.items()):
            if key not in self.called:
                continue
            if TRAIN_REQUESTED in modes:
                state[key] = modes = (modes - {TRAIN_REQUESTED}) | {TRAIN}
            if self.layers.get(key) == "":
                continue
            cause = ("`from_pretrained`" if PRETRAINED in modes
                     else "an earlier evaluation" if EVALUATED in modes else "")
            if cause:
                self._report_once("NNL402", key, Finding("NNL402", call, key, cause=cause))
            if CALLER in modes:
                effect = self._effect(key)
                if effect is not None and effect.trains is None:
                    effect.trains = call

    def _graph_finding(self, key: str, finding: Finding) -> None:
        if ("NNL404", key) in self.reported:
            return
        self.reported.add(("NNL404", key))
        if self.function is None or CALLER not in (self._modes(key, {}) or ()):
            self.analysis.add_finding(finding)  # a model this body built: no caller decides
        else:
            self.analysis._pending_graph_findings.setdefault(id(self.function), []).append(
                finding)

    def _report_once(self, code: str, key: str, finding: Finding) -> None:
        if (code, key) in self.reported:
            return
        self.reported.add((code, key))
        self.analysis.add_finding(finding)

    def _effect(self, key: str) -> Effect | None:
        effect_key = self._effect_key(key)
        if effect_key is None:
            return None
        return self.summary.effects.setdefault(effect_key, Effect())

    # -- calls of other functions ----------------------------------------------------------
    def _call_function(self, call: cst.Call, key: str, state: State, context: _Context) -> bool:
        """Apply the summary of a function of this file (or of the tree); True if one."""
        target = self._local_function(key)
        if target is not None:
            self.analysis._call_contexts.setdefault(id(target), []).append(
                context.no_grad or context.grad_managed)
            summary = self.analysis.summary_of(target)
            self._apply(call, summary, _parameter_names(target), key, state, remote=False)
            return True
        canonical = self.model.canonical(call.func)
        if canonical is None or self.model.project is None:
            return False
        fact = self.model.project.exported_fact(canonical, "modes", self.model)
        if fact is None:
            return False
        self._apply(call, decode_summary(fact), [], key, state, remote=True)
        return True

    def _local_function(self, key: str) -> cst.FunctionDef | None:
        if "." not in key:
            found = self.model.lookup(key, self.scope)
            function = self.model.functions.get(key)
            if (found is not None and found[0] is self.model.module_scope
                    and function is not None):
                return function
            return None
        head, _, method = key.rpartition(".")
        if self.info is not None and head == self.self_name:
            return _method_of(self.model, self.info, method)
        return None

    def _apply(self, call: cst.Call, summary: FunctionSummary, parameters: list[str],
               written: str, state: State, remote: bool) -> None:
        offset = 1 if "." in written and not remote else 0
        positional = [arg.value for arg in call.args if arg.keyword is None and not arg.star]
        keyword = {arg.keyword.value: arg.value for arg in call.args if arg.keyword is not None}
        for effect_key, effect in summary.effects.items():
            key = self._caller_key(effect_key, parameters, positional, keyword, offset,
                                   written)
            if key is None:
                continue
            modes = self._modes(key, state)
            if modes is None:
                if CALLER not in effect.exit:
                    state[key] = effect.exit  # the callee switched it: a model after all
                continue
            self._apply_effect(call, effect, key, modes, state, remote, written)

    def _caller_key(self, effect_key: str, parameters: list[str], positional: list,
                    keyword: dict, offset: int, written: str) -> str | None:
        if effect_key.startswith("self."):
            head = written.rpartition(".")[0]
            return f"{head}.{effect_key[5:]}" if head else None
        if effect_key.startswith("global:"):
            name = effect_key[7:]
            return name if self.model.lookup(name, self.scope) is not None else None
        index = int(effect_key) - offset
        if 0 <= index < len(positional):
            return model_key(positional[index])
        name = parameters[int(effect_key)] if int(effect_key) < len(parameters) else None
        if name is not None and name in keyword:
            return model_key(keyword[name])
        return None

    def _apply_effect(self, call: cst.Call, effect: Effect, key: str, modes: frozenset,
                      state: State, remote: bool, callee: str) -> None:
        layers = self.layers.get(key)
        quiet = layers == ""
        if effect.needs_eval is not None and not quiet:
            if TRAIN in modes:
                where = call if remote or effect.remote else effect.needs_eval
                name = key if where is call else self.model.module.code_for_node(
                    effect.needs_eval.func)
                self.analysis.add_finding(Finding("NNL401", where, name, layers or "",
                                                  callee if where is call else ""))
            if CALLER in modes:
                own = self._effect(key)
                if own is not None and own.needs_eval is None:
                    own.needs_eval = call if remote or effect.remote else effect.needs_eval
                    own.remote = remote or effect.remote
        if effect.trains is not None and not quiet:
            cause = ("`from_pretrained`" if PRETRAINED in modes
                     else "an earlier evaluation" if EVALUATED in modes else "")
            if cause:
                where = call if remote else effect.trains
                self.analysis.add_finding(Finding("NNL402", where, key, cause=cause,
                                                  callee=callee if remote else ""))
            if CALLER in modes:
                own = self._effect(key)
                if own is not None and own.trains is None:
                    own.trains = call if remote else effect.trains
        if effect.needs_eval is not None and EVAL in modes:
            modes = (modes - {EVAL}) | {EVALUATED}
        if effect.trains is not None and TRAIN_REQUESTED in modes:
            modes = (modes - {TRAIN_REQUESTED}) | {TRAIN}
        exit_modes: set[str] = set()
        for mode in effect.exit:
            exit_modes |= modes if mode == CALLER else {mode}
        state[key] = frozenset(exit_modes)

    # -- lexical helpers -------------------------------------------------------------------
    def _trains_in(self, statement: cst.CSTNode) -> bool:
        for inner in _statements_of_list([statement]):
            for call in self.analysis.statement_calls(inner):
                if isinstance(call.func, cst.Attribute) and call.func.attr.value == "backward":
                    return True
        return False

    def _calls_model_in(self, statement: cst.CSTNode, state: State) -> bool:
        for inner in _statements_of_list([statement]):
            for call in self.analysis.statement_calls(inner):
                key = dotted_name(call.func)
                if key is not None and (key in state or self._entry_modes(key) is not None):
                    return True
        return False


def _target_names(target: cst.BaseExpression) -> Iterator[str]:
    written = dotted_name(target)
    if written is not None:
        yield written
    for element in getattr(target, "elements", ()):
        yield from _target_names(element.value)


def replace_context(context: _Context, **changes: object) -> _Context:
    return dataclasses.replace(context, **changes)


def _parameter_names(function: cst.FunctionDef) -> list[str]:
    params = function.params
    return [param.name.value for param in (*params.posonly_params, *params.params)]


def _is_static(function: cst.FunctionDef) -> bool:
    return any(dotted_name(decorator.decorator) in ("staticmethod", "classmethod")
               for decorator in function.decorators)


def _method_of(model: "ModuleModel", info: "ClassInfo", name: str,
               seen: frozenset = frozenset()) -> cst.FunctionDef | None:
    if name in info.methods:
        return info.methods[name]
    for base in info.bases:
        local = model.classes.get(base)
        if local is not None and base not in seen:
            found = _method_of(model, local, name, seen | {info.name})
            if found is not None:
                return found
    return None


def _grad_setting(model: "ModuleModel", expr: cst.BaseExpression) -> bool | None:
    """False for a no-grad context, True for a grad-enabling one, None otherwise."""
    target = expr.func if isinstance(expr, cst.Call) else expr
    name = model.canonical(target)
    if name in api.NO_GRAD_CONTEXTS:
        return False
    if name in api.GRAD_ENABLING_CONTEXTS:
        return True
    if name in api.SET_GRAD_ENABLED and isinstance(expr, cst.Call) and expr.args:
        flag = expr.args[0].value
        if isinstance(flag, cst.Name) and flag.value in ("True", "False"):
            return flag.value == "True"
    return None


def _decorated_no_grad(model: "ModuleModel", function: cst.FunctionDef) -> bool | None:
    """False/True when a decorator turns gradients off/on for the whole function."""
    result = None
    for decorator in function.decorators:
        setting = _grad_setting(model, decorator.decorator)
        if setting is not None:
            result = not setting
    return result


# -- summaries for other modules ---------------------------------------------------------------
def encode_summary(summary: FunctionSummary) -> str:
    """`0:E:caller` = parameter 0 is evaluated in the caller's mode and left as it was."""
    parts = []
    for key, effect in sorted(summary.effects.items()):
        if not key.isdigit():
            continue
        flags = ("E" if effect.needs_eval is not None else "") + (
            "T" if effect.trains is not None else "")
        parts.append(f"{key}:{flags}:{','.join(sorted(effect.exit))}")
    return ";".join(parts)


def decode_summary(text: str) -> FunctionSummary:
    summary = FunctionSummary()
    placeholder = cst.Name("_")
    for part in text.split(";"):
        pieces = part.split(":")
        if len(pieces) != 3 or not pieces[0].isdigit():
            continue
        index, flags, exits = pieces
        summary.effects[index] = Effect(
            needs_eval=placeholder if "E" in flags else None,
            trains=placeholder if "T" in flags else None,
            exit=frozenset(exits.split(",")) if exits else frozenset({CALLER}), remote=True)
    return summary


@register_summariser
def _summarise_modes(model: "ModuleModel", summary: "ModuleSummary") -> None:
    analysis = ModeAnalysis.of(model)
    if not analysis.uses_torch:
        return
    for name, function in model.functions.items():
        encoded = encode_summary(analysis.summary_of(function))
        if encoded:
            summary.facts[f"modes:{name}"] = encoded


# -- no-grad regions around a backward pass (NNL405) -------------------------------------------
def no_grad_region(model: "ModuleModel", blocks: list[cst.CSTNode]
                   ) -> tuple[cst.CSTNode, str] | None:
    """The innermost no-grad `with` or decorated function around the current node.

    `blocks` are the enclosing blocks, outermost first (WalkContext.blocks). A
    grad-enabling context inside the region, or a function boundary, ends the search.
    """
    for block in reversed(blocks):
        if isinstance(block, (cst.With, cst.FunctionDef)):
            managers = ([item.item for item in block.items] if isinstance(block, cst.With)
                        else [decorator.decorator for decorator in block.decorators])
            for manager in reversed(managers):  # the innermost context manager wins
                setting = _grad_setting(model, manager)
                if setting is not None:
                    return (block, _context_name(model, manager)) if setting is False else None
            if isinstance(block, cst.FunctionDef):
                return None
        elif isinstance(block, (cst.Lambda, cst.ClassDef)):
            return None
    return None


def _recording_off(model: "ModuleModel", suite: cst.BaseSuite) -> Iterator[cst.CSTNode]:
    """Statements of a no-grad body, minus those under a nested grad-enabling `with`."""
    pending = list(suite.body) if isinstance(suite, cst.IndentedBlock) else [suite]
    while pending:
        statement = pending.pop()
        if isinstance(statement, (cst.FunctionDef, cst.ClassDef)):
            continue
        yield statement
        if isinstance(statement, cst.With) and any(
                _grad_setting(model, item.item) is True for item in statement.items):
            continue
        for block in _blocks_of(statement):
            pending.extend(block)


def _context_name(model: "ModuleModel", expr: cst.BaseExpression) -> str:
    target = expr.func if isinstance(expr, cst.Call) else expr
    return model.module.code_for_node(target)


def root_name(expr: cst.BaseExpression) -> str | None:
    """`loss` for `loss.mean()`, `losses["total"]`, `loss * 2` (None for calls and others)."""
    while True:
        if isinstance(expr, cst.Attribute):
            expr = expr.value
        elif isinstance(expr, cst.Subscript):
            expr = expr.value
        elif isinstance(expr, cst.Call) and isinstance(expr.func, cst.Attribute):
            expr = expr.func.value
        elif isinstance(expr, cst.BinaryOperation):
            expr = expr.left
        else:
            break
    return expr.value if isinstance(expr, cst.Name) else None


def computed_inside(model: "ModuleModel", region: cst.CSTNode, tensor: cst.BaseExpression,
                    function: cst.FunctionDef | None) -> bool:
    """True when the tensor a backward pass starts from was computed inside `region`.

    A graph built before the no-grad block can still be backpropagated inside it (PyTorch
    records the graph when the forward runs, checked in tests/test_modes_references.py), so
    only a tensor made inside the block has no graph to follow.
    """
    if isinstance(tensor, cst.Call) and (not isinstance(tensor.func, cst.Attribute)
                                         or model.canonical(tensor.func) is not None):
        return True  # `criterion(model(x), y).backward()`, `F.mse_loss(...)`: made here
    name = root_name(tensor)
    if name is None:
        return False
    found = model.lookup(name, model.scope_of(function))
    if found is None or not found[1]:
        return False
    memo = model.memo.setdefault("modes", {}).setdefault("regions", {})
    inside = memo.get(id(region))
    if inside is None:
        inside = {id(statement) for statement in _recording_off(model, region.body)}
        memo[id(region)] = inside
    return any(id(binding.statement) in inside for binding in found[1])
