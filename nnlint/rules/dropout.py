"""Dropout rules (NNL1xx): rescaled twice, always on, rate misread, forced on at evaluation."""
from __future__ import annotations

from dataclasses import dataclass

import libcst as cst

from nnlint.analysis.api.dropout import (
    MODE_KEYWORD_FUNCTIONS, SWITCHED_CALL_PACKAGES, TF1_ONLY_APIS, TF1_ONLY_NAMES,
    TF1_ONLY_PREFIXES, TRAINING_SWITCH_KEYWORDS,
)
from nnlint.analysis.dropout import (
    DROP, KEEP, branch_meanings, branch_path, dropout_call, evaluation_function,
    expression_name, function_has_mask, has_unpacked_arguments,
    identifier_words, is_literal_bool, is_monte_carlo_context, keep_key, literal_number,
    mentions_mask, no_grad_block, number_value, probability_kind, rate_argument,
    rate_keep_key, self_name_at, switch_argument, torch_module_method, KEEP_WORDS,
    NOT_A_PROBABILITY,
)
from nnlint.analysis.call_edits import attribute_of, with_keyword_appended
from nnlint.finding import Severity
from nnlint.rules.base import Fix, Rule, register

#: longest expression quoted in a message before it is shortened (keeps lines near 100)
_QUOTE_LIMIT = 32


def _quote(model, node: cst.CSTNode) -> str:
    return model.quote(node, _QUOTE_LIMIT)


def _describe(model, node: cst.CSTNode) -> str:
    """How a message names a scaling: a call by its callee, a division by `/ divisor`."""
    if isinstance(node, cst.Call):
        return _quote(model, node.func) + "(...)"
    if isinstance(node, cst.BinaryOperation) and isinstance(node.operator, cst.Divide) and \
            len(model.module.code_for_node(node)) > _QUOTE_LIMIT:
        return "... / " + _quote(model, node.right)
    return _quote(model, node)


def _format_number(value: float) -> str:
    return f"{value:.3g}"


@dataclass(eq=False)
class _Scaling:
    """One rescaling by a keep probability seen during the walk."""

    key: str
    node: cst.CSTNode
    function: cst.FunctionDef | None
    #: the class whose method holds it, None at module level
    owner: cst.ClassDef | None
    #: enclosing if-branches (see branch_path)
    path: tuple = ()
    #: the keep probability's value when a literal reaches it
    keep_value: float | None = None


@register
class DropoutRescaledTwice(Rule):
    code = "NNL101"
    name = "dropout-rescaled-twice"
    severity = Severity.ERROR
    summary = "inverted dropout whose output is scaled by the keep probability a second time"
    message = "`{expression}` rescales again after `{first}`{where}: {effect}; {fix}"
    rationale = (
        "Dropout keeps each unit with probability q = 1 - p (Srivastava et al. 2014). The "
        "original form multiplies by q at test time; inverted dropout, which PyTorch, "
        "TensorFlow/Keras and Flax implement, divides the kept units by q during training and "
        "leaves evaluation alone, so E[output] = input in both modes. Multiplying by q on the "
        "evaluation path as well makes evaluation outputs q times their training expectation "
        "(0.5x for p = 0.5), and dividing by q twice makes training outputs 1/q times too "
        "large. Either way the next layer sees a scale it was never trained on. "
        "tests/test_dropout_references.py checks both ratios by simulation with numpy."
    )
    bad = (
        "def forward(self, h, train):\n"
        "    if train:\n"
        "        mask = np.random.rand(*h.shape) < self.keep\n"
        "        return h * mask / self.keep\n"
        "    else:\n"
        "        return h * self.keep"
    )
    good = (
        "def forward(self, h, train):\n"
        "    if train:\n"
        "        mask = np.random.rand(*h.shape) < self.keep\n"
        "        return h * mask / self.keep\n"
        "    return h"
    )
    references = (
        "Srivastava, Hinton, Krizhevsky, Sutskever, Salakhutdinov 2014, \"Dropout: a simple "
        "way to prevent neural networks from overfitting\", JMLR 15, section 1 and 10",
        "PyTorch documentation, torch.nn.Dropout: outputs are scaled by 1/(1-p) during "
        "training; in evaluation the module computes an identity function",
    )

    def __init__(self, model, context, sink) -> None:
        super().__init__(model, context, sink)
        self._inverted: list[_Scaling] = []
        self._eval_multiplies: list[_Scaling] = []
        #: id(function) -> name -> the inverted scaling it holds now
        self._origins: dict[int, dict[str, _Scaling]] = {}
        #: ids of expressions that are an inverted scaling (to know what an Assign binds)
        self._inverted_nodes: dict[int, _Scaling] = {}

    # -- what each node is ----------------------------------------------------------------
    def _scaling(self, key: str, node: cst.CSTNode) -> _Scaling:
        function = self.context.function
        owner = None
        for enclosing in reversed(self.context.functions):
            info = self.model.class_of_method(enclosing)
            if info is not None:
                owner = info.node
                break
        return _Scaling(key, node, function, owner, branch_path(self.context, node))

    def _on_eval_path(self, node: cst.CSTNode) -> bool:
        return ("eval" in branch_meanings(self.context, node)
                or evaluation_function(self.model, self.context) is not None)

    def _origin(self, expr: cst.BaseExpression) -> _Scaling | None:
        """The inverted scaling `expr` evaluates to, directly or through a local name."""
        found = self._inverted_nodes.get(id(expr))
        if found is not None:
            return found
        if isinstance(expr, cst.Name):
            origin = self._origins.get(id(self.context.function), {}).get(expr.value)
            if origin is not None and branch_path(self.context, expr)[: len(origin.path)] == \
                    origin.path:
                return origin
        if isinstance(expr, cst.Call):
            found_call = dropout_call(self.model, expr, self.context.function)
            if found_call is not None:
                return self._framework_scaling(found_call, expr, record=False)
        return None

    def _framework_scaling(self, found, node: cst.Call, record: bool = True) -> _Scaling | None:
        if found.application is not node or not found.api.is_inverted:
            return None
        rate = rate_argument(found.api, found.configuration)
        if rate is None:
            return None
        scaling = self._scaling(rate_keep_key(self.model, *rate), node)
        if record:
            self._inverted_nodes[id(node)] = scaling
        return scaling

    # -- visits ---------------------------------------------------------------------------
    def visit_Call(self, node: cst.Call) -> None:
        found = dropout_call(self.model, node, self.context.function)
        if found is None:
            return
        scaling = self._framework_scaling(found, node)
        if scaling is not None:
            self._inverted.append(scaling)

    def visit_BinaryOperation(self, node: cst.BinaryOperation) -> None:
        if isinstance(node.operator, cst.Divide):
            self._division(node, node.left, node.right)
        elif isinstance(node.operator, cst.Multiply):
            self._multiplication(node, node.left, node.right)

    def visit_AugAssign(self, node: cst.AugAssign) -> None:
        if isinstance(node.operator, cst.DivideAssign):
            self._division(node, node.target, node.value)
        elif isinstance(node.operator, cst.MultiplyAssign):
            self._multiplication(node, node.target, node.value)

    def leave_AugAssign(self, node: cst.AugAssign) -> None:
        self._bind(node.target, node)

    def leave_Assign(self, node: cst.Assign) -> None:
        for target in node.targets:
            self._bind(target.target, node.value)

    def _bind(self, target: cst.BaseExpression, value: cst.CSTNode) -> None:
        if not isinstance(target, cst.Name):
            return
        origins = self._origins.setdefault(id(self.context.function), {})
        scaling = self._inverted_nodes.get(id(value))
        if scaling is not None:
            origins[target.value] = scaling
        elif not isinstance(value, cst.AugAssign):
            # `h *= mask` keeps what h holds; a fresh assignment replaces it
            origins.pop(target.value, None)

    def _division(self, node: cst.CSTNode, numerator: cst.BaseExpression,
                  divisor: cst.BaseExpression) -> None:
        key = keep_key(self.model, divisor)
        if key is None:
            return
        first = self._origin(numerator)
        if first is not None and first.key == key:
            keep = number_value(self.model, divisor, self.context.function)
            effect = "training outputs grow to " + (
                f"{_format_number(1 / keep)}x" if keep else "1/keep times")
            self.report(node, expression=_describe(self.model, node),
                        first=_describe(self.model, first.node), where=self._where(first),
                        effect=effect, fix="divide once")
            self._inverted_nodes[id(node)] = first
            return
        if mentions_mask(self.model, numerator) or function_has_mask(self.model,
                                                                     self.context.function):
            scaling = self._scaling(key, node)
            self._inverted_nodes[id(node)] = scaling
            self._inverted.append(scaling)

    def _multiplication(self, node: cst.CSTNode, left: cst.BaseExpression,
                        right: cst.BaseExpression) -> None:
        for keep, other in ((right, left), (left, right)):
            key = keep_key(self.model, keep)
            if key is None:
                continue
            if self._on_eval_path(node):
                scaling = self._scaling(key, node)
                scaling.keep_value = number_value(self.model, keep, self.context.function)
                self._eval_multiplies.append(scaling)
            return

    def leave_Module(self, node: cst.Module) -> None:
        for second in self._eval_multiplies:
            first = self._first_for(second)
            if first is None:
                continue
            number = second.keep_value
            effect = "eval outputs shrink to " + (
                f"{_format_number(number)}x" if number is not None else "keep-probability times")
            self.report(second.node, expression=_describe(self.model, second.node),
                        first=_describe(self.model, first.node),
                        where=self._where(first, second),
                        effect=effect, fix="remove it")

    def _first_for(self, second: _Scaling) -> _Scaling | None:
        same_function = [first for first in self._inverted
                         if first.key == second.key and first.function is second.function]
        if same_function:
            return same_function[0]
        if second.owner is None:
            return None
        same_class = [first for first in self._inverted
                      if first.key == second.key and first.owner is second.owner]
        return same_class[0] if same_class else None

    def _where(self, first: _Scaling, second: _Scaling | None = None) -> str:
        current = second.function if second is not None else self.context.function
        if first.function is None or first.function is current:
            return ""
        return f" in `{first.function.name.value}`"


@register
class FunctionalDropoutAlwaysOn(Rule):
    code = "NNL102"
    name = "functional-dropout-always-on"
    severity = Severity.ERROR
    summary = "functional dropout in a module method that is not tied to the module's mode"
    message = "`{call}` in `{method}` {problem}: drops{share} in eval mode; pass `{fix}`"
    rationale = (
        "torch.nn.functional.dropout(input, p=0.5, training=True) defaults to training=True "
        "(PyTorch documentation), and torch.dropout(input, p, train) takes the switch "
        "explicitly. Unlike nn.Dropout, the function does not read the module's mode: "
        "model.eval() changes nothing, so evaluation and inference keep zeroing a fraction p "
        "of the activations and scaling the rest by 1/(1-p), and predictions become noisy. "
        "tests/test_dropout_references.py shows it with PyTorch when it is installed."
    )
    bad = (
        "class Head(nn.Module):\n"
        "    def forward(self, features):\n"
        "        return F.dropout(features, p=0.3)"
    )
    good = (
        "class Head(nn.Module):\n"
        "    def forward(self, features):\n"
        "        return F.dropout(features, p=0.3, training=self.training)"
    )
    rewrite = "adds `training=self.training` to a functional dropout call that has no switch"
    references = (
        "PyTorch documentation, torch.nn.functional.dropout (training: apply dropout if True; "
        "default True)",
        "PyTorch documentation, torch.nn.Module.eval",
    )

    def visit_Call(self, node: cst.Call) -> None:
        found = dropout_call(self.model, node, self.context.function)
        if found is None or found.api.framework != "torch" or found.api.is_layer:
            return
        method = torch_module_method(self.model, self.context)
        if method is None or has_unpacked_arguments(node):
            return
        # Evaluation code is NNL104's; one finding per call.
        if evaluation_function(self.model, self.context) is not None:
            return
        switch = switch_argument(found.api, node)
        keyword = found.api.switch_keyword
        if switch is None:
            if not found.api.is_on_by_default:
                return
            problem = f"lacks `{keyword}=`"
            severity = None
        elif is_literal_bool(switch.value, True):
            if is_monte_carlo_context(self.model, self.context):
                return
            problem = f"passes `{keyword}=True`"
            # An explicit True may be deliberate (dropout kept on at prediction).
            severity = Severity.WARNING
        else:
            return
        function, info = method
        # the module as the method names it (`forward(module, x)` reads `module.training`)
        parameters = (*function.params.posonly_params, *function.params.params)
        owner = parameters[0].name.value if parameters else "self"
        share = ""
        rate = rate_argument(found.api, node)
        number = number_value(self.model, rate[0], self.context.function) if rate else None
        if number is not None and 0.0 < number < 1.0:
            share = f" {number:.0%}"
        self.report(node, severity=severity, call=_quote(self.model, node.func),
                    method=f"{info.name}.{function.name.value}", problem=problem,
                    share=share, fix=f"{keyword}={owner}.training",
                    autofix=self._fix(node, found.canonical, switch, function))

    def _fix(self, node: cst.Call, canonical: str, switch: cst.Arg | None,
             method: cst.FunctionDef) -> Fix | None:
        """`training=<self>.training` appended, when the call lacks the switch.

        An explicit `training=True` gets no fix: it may keep dropout on at prediction on
        purpose. The module is reached through the method's own first parameter, and only
        where no nested function or lambda rebinds that name.
        """
        keyword = MODE_KEYWORD_FUNCTIONS.get(canonical)
        if switch is not None or keyword is None or not node.args:
            return None
        receiver = self_name_at(self.model, self.context, method)
        if receiver is None:
            return None
        return Fix(node, with_keyword_appended(node, keyword, attribute_of(receiver, "training")))


@register
class DropoutRateMisread(Rule):
    code = "NNL103"
    name = "dropout-rate-misread"
    severity = Severity.ERROR
    summary = "a keep probability passed as a drop rate (or the reverse), or a rate out of range"
    message = "`{value}` {problem} `{call}`{effect}; {fix}"
    rationale = (
        "PyTorch (`p`), TensorFlow 2 (`rate`), Keras (`rate`) and Flax (`rate`) take the "
        "probability of DROPPING a unit; TensorFlow 1's tf.compat.v1.nn.dropout takes "
        "`keep_prob`, the probability of keeping it. Passing a keep probability of 0.8 as a "
        "rate drops 80% of the units instead of 20%, which still trains, only worse. A rate "
        "must lie in [0, 1) (tf.nn.dropout and Keras reject others; PyTorch accepts 1 and "
        "returns all zeros) and a keep probability in (0, 1]. Name-based findings are "
        "warnings (only the name says which probability it is); out-of-range literals are "
        "errors. Positional tf.nn.dropout calls in files that use TensorFlow 1 APIs "
        "(placeholders, sessions) are not judged: there the second argument was keep_prob."
    )
    bad = "keep_prob = 0.8\nhead = nn.Sequential(nn.Linear(64, 8), nn.Dropout(keep_prob))"
    good = ("keep_prob = 0.8\n"
            "head = nn.Sequential(nn.Linear(64, 8), nn.Dropout(p=1 - keep_prob))")
    references = (
        "PyTorch documentation, torch.nn.Dropout (p: probability of an element to be zeroed)",
        "TensorFlow documentation, tf.nn.dropout (rate in [0, 1)) and tf.compat.v1.nn.dropout "
        "(keep_prob, deprecated in favour of rate = 1 - keep_prob)",
        "Keras documentation, Dropout layer (rate: fraction of the input units to drop)",
    )

    def __init__(self, model, context, sink) -> None:
        super().__init__(model, context, sink)
        self._uses_tf1 = False
        #: positional tf.nn.dropout findings, dropped at the end if the file is TF1 code
        self._positional_tf: list[tuple[cst.CSTNode, Severity | None, dict]] = []

    def visit_Attribute(self, node: cst.Attribute) -> None:
        if self._uses_tf1 or node.attr.value not in TF1_ONLY_NAMES:
            return
        canonical = self.model.canonical(node)
        if canonical is not None and (canonical in TF1_ONLY_APIS
                                      or canonical.startswith(TF1_ONLY_PREFIXES)):
            self._uses_tf1 = True

    def visit_Call(self, node: cst.Call) -> None:
        found = dropout_call(self.model, node, self.context.function)
        if found is None or found.configuration is not node:
            return
        argument = rate_argument(found.api, node)
        if argument is None:
            return
        value, expects_keep = argument
        fields = self._literal_problem(value, expects_keep)
        severity = None
        if fields is None:
            fields = self._name_problem(value, expects_keep)
            severity = Severity.WARNING
        if fields is None:
            return
        fields["value"] = _quote(self.model, value)
        fields["call"] = _quote(self.model, node.func)
        is_positional = all(arg.keyword is None or arg.value is not value for arg in node.args)
        if found.canonical == "tensorflow.nn.dropout" and is_positional:
            self._positional_tf.append((node, severity, fields))
            return
        self.report(node, severity=severity, **fields)

    def leave_Module(self, node: cst.Module) -> None:
        if self._uses_tf1:
            return
        for call, severity, fields in self._positional_tf:
            self.report(call, severity=severity, **fields)

    def _literal_problem(self, value: cst.BaseExpression, expects_keep: bool) -> dict | None:
        number = literal_number(value)
        if number is None:
            return None
        if expects_keep and not 0.0 < number <= 1.0:
            return {"problem": "is outside (0, 1], the range of keep_prob of", "effect": "",
                    "fix": "pass the probability of keeping a unit"}
        if not expects_keep and not 0.0 <= number < 1.0:
            effect = ": every unit is dropped" if number == 1.0 else ""
            return {"problem": "is outside [0, 1), the range of the drop rate of", "effect": effect,
                    "fix": "pass the fraction of units to drop"}
        return None

    def _name_problem(self, value: cst.BaseExpression, expects_keep: bool) -> dict | None:
        kind = probability_kind(value)
        number = number_value(self.model, value, self.context.function)
        if kind == KEEP and not expects_keep:
            effect = ""
            if number is not None and 0.0 < number < 1.0:
                effect = f": drops {number:.0%} not {1 - number:.0%}"
            return {"problem": "is a keep probability passed as the rate of", "effect": effect,
                    "fix": f"pass `1 - {_quote(self.model, value)}`"}
        if kind == DROP and expects_keep:
            effect = ""
            if number is not None and 0.0 < number < 1.0:
                effect = f": keeps {number:.0%} not {1 - number:.0%}"
            return {"problem": "is a drop rate passed as keep_prob of", "effect": effect,
                    "fix": "pass `rate=` instead"}
        return None


@register
class DropoutForcedAtEval(Rule):
    code = "NNL104"
    name = "dropout-forced-at-eval"
    severity = Severity.WARNING
    summary = "dropout or a training-mode flag forced on inside evaluation or inference code"
    message = "`{expression}` in {where} {problem}: {effect}; {fix}"
    rationale = (
        "Evaluation, validation, test and prediction code (functions so named, and bodies "
        "under torch.no_grad() or torch.inference_mode()) should see the deterministic "
        "network. F.dropout(..., training=True), a Keras model or layer called with "
        "training=True, a Flax module applied with deterministic=False, or a keep probability "
        "below 1 fed at test time keeps dropping units, so the reported metrics are those of "
        "a random sub-network, and differ run to run. It is a warning: Monte-Carlo dropout "
        "(Gal and Ghahramani 2016) keeps dropout on at prediction on purpose, and nnlint stays "
        "silent where the code says so (mc_/monte_carlo/uncertainty names, loops over "
        "n_samples passes)."
    )
    bad = (
        "def evaluate(encoder, crops):\n"
        "    return F.dropout(encoder(crops), p=0.2, training=True)"
    )
    good = (
        "def evaluate(encoder, crops):\n"
        "    return F.dropout(encoder(crops), p=0.2, training=False)\n"
        "\n"
        "def mc_predict(encoder, crops, n_samples=20):\n"
        "    return [F.dropout(encoder(crops), 0.2, training=True) for _ in range(n_samples)]"
    )
    references = (
        "Keras documentation, Model.__call__ and the `training` argument",
        "Flax documentation, flax.linen.Dropout (deterministic)",
        "Gal and Ghahramani 2016, \"Dropout as a Bayesian approximation\", ICML",
    )

    def visit_Call(self, node: cst.Call) -> None:
        if not node.args:
            return
        forced = self._forced_switch(node)
        if forced is None:
            return
        where = self._evaluation_place()
        if where is None or is_monte_carlo_context(self.model, self.context):
            return
        problem, fix = forced
        self.report(node, expression=_describe(self.model, node), where=where, problem=problem,
                    effect="dropout stays on at evaluation", fix=fix)

    def visit_DictElement(self, node: cst.DictElement) -> None:
        number = literal_number(node.value)
        if number is None or not 0.0 <= number < 1.0 or not self._is_keep_name(node.key):
            return
        where = self._evaluation_place()
        if where is None or is_monte_carlo_context(self.model, self.context):
            return
        self.report(node, expression=_quote(self.model, node), where=where,
                    problem="feeds a keep probability below 1",
                    effect=f"{1 - number:.0%} of units are still dropped", fix="feed 1.0")

    def _is_keep_name(self, key: cst.BaseExpression) -> bool:
        name = expression_name(key) or (
            key.evaluated_value if isinstance(key, cst.SimpleString)
            and isinstance(key.evaluated_value, str) else None)
        if name is None:
            return False
        words = identifier_words(name)
        return bool(words & KEEP_WORDS) and not words & NOT_A_PROBABILITY

    def _forced_switch(self, node: cst.Call) -> tuple[str, str] | None:
        """(what is forced, the fix) when the call forces dropout or a training flag on."""
        found = dropout_call(self.model, node, self.context.function)
        if found is not None and found.api.framework == "torch" and not found.api.is_layer:
            if has_unpacked_arguments(node):
                return None
            switch = switch_argument(found.api, node)
            keyword = found.api.switch_keyword
            if switch is None and found.api.is_on_by_default:
                if torch_module_method(self.model, self.context) is not None and \
                        evaluation_function(self.model, self.context) is None:
                    return None  # NNL102 reports it
                return f"lacks `{keyword}=` (default True)", f"pass `{keyword}=False`"
            if switch is not None and is_literal_bool(switch.value, True):
                return f"passes `{keyword}=True`", f"pass `{keyword}=False`"
            return None
        if found is None and not self._is_model_call(node):
            return None
        for arg in node.args:
            if arg.keyword is None:
                continue
            forcing = TRAINING_SWITCH_KEYWORDS.get(arg.keyword.value)
            if forcing is not None and is_literal_bool(arg.value, forcing):
                keyword = arg.keyword.value
                return f"passes `{keyword}={forcing}`", f"pass `{keyword}={not forcing}`"
        return None

    def _is_model_call(self, node: cst.Call) -> bool:
        """A call of a model or layer object (not a library function, not a local helper)."""
        if not any(name.split(".")[0] in SWITCHED_CALL_PACKAGES
                   for name in self.model.names.imported_modules):
            return False
        func = node.func
        if self.model.resolve(func):
            return False
        if isinstance(func, cst.Name):
            return func.value not in self.model.functions and func.value not in \
                self.model.classes
        if isinstance(func, cst.Attribute):
            return func.attr.value in ("apply", "call", "__call__", "apply_fn") or \
                expression_name(func.value) in ("self",)
        return isinstance(func, cst.Call)

    def _evaluation_place(self) -> str | None:
        function = evaluation_function(self.model, self.context)
        if function is not None:
            return f"`{function.name.value}`"
        block = no_grad_block(self.model, self.context)
        if block is not None:
            return f"`with {_quote(self.model, block.items[0].item)}`"
        return None
