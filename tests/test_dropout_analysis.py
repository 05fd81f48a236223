"""Dropout reasoning (analysis/dropout.py): names, keys, masks, calls, evaluation code."""
import libcst as cst
import pytest

from nnlint.analysis import dropout as analysis
from nnlint.analysis.model import ModuleModel


def expression(source: str) -> cst.BaseExpression:
    return cst.parse_expression(source)


def last_value(source: str) -> tuple[ModuleModel, cst.BaseExpression]:
    """The model of `source` and the expression of its last line."""
    module = cst.parse_module(source)
    model = ModuleModel(module)
    last = module.body[-1]
    assert isinstance(last, cst.SimpleStatementLine)
    statement = last.body[0]
    value = statement.value
    return model, value


def method_of(source: str, class_name: str, method: str):
    """The model of `source` and one method of one of its classes."""
    model = ModuleModel(cst.parse_module(source))
    return model, model.classes[class_name].methods[method]


@pytest.mark.parametrize("name, words", [
    ("keep_prob", {"keep", "prob"}),
    ("keepProb", {"keep", "prob"}),
    ("hidden_dropout_prob", {"hidden", "dropout", "prob"}),
    ("MCDropout", {"mc", "dropout"}),
    ("eval_epoch2", {"eval", "epoch", "2"}),
])
def test_identifier_words_split_snake_and_camel_case(name, words):
    assert analysis.identifier_words(name) == words


@pytest.mark.parametrize("source, kind", [
    ("keep_prob", "keep"),
    ("self.keep", "keep"),
    ("cfg['keep_prob']", "keep"),
    ("config.get('retain_p', 0.9)", "keep"),
    ("1 - drop_rate", "keep"),
    ("1.0 - args.dropout", "keep"),
    ("dropout_rate", "drop"),
    ("1 - keep", "drop"),
    ("keep_mask", None),     # a mask, not a probability
    ("keepdims", None),      # one word, not "keep"
    ("rate", None),          # bare rate words need a dropout next to them
    ("learning_rate", None),
])
def test_probability_kind_reads_names_and_one_minus(source, kind):
    assert analysis.probability_kind(expression(source)) == kind


def test_bare_rate_words_count_as_drop_rates_when_asked():
    assert analysis.probability_kind(expression("1 - self.p"), analysis.RATE_WORDS) == "keep"
    assert analysis.probability_kind(expression("self.p"), analysis.RATE_WORDS) == "drop"


def test_keep_keys_ignore_spelling_of_one_minus():
    model = ModuleModel(cst.parse_module(""))
    assert analysis.keep_key(model, expression("1.0 - self.p")) == "1-self.p"
    assert analysis.keep_key(model, expression("(1 - self.p)")) == "1-self.p"
    assert analysis.rate_keep_key(model, expression("self.p"), False) == "1-self.p"
    assert analysis.rate_keep_key(model, expression("1 - self.keep"), False) == "self.keep"
    assert analysis.rate_keep_key(model, expression("keep_prob"), True) == "keep_prob"


@pytest.mark.parametrize("source, value", [
    ("0.5", 0.5), ("-1", -1.0), ("1 - 0.25", 0.75), ("1e-1", 0.1), ("keep", None),
])
def test_literal_number(source, value):
    assert analysis.literal_number(expression(source)) == value


def test_number_value_follows_attributes_to_parameter_defaults():
    source = (
        "class Net:\n"
        "    def __init__(self, keep: float = 0.9):\n"
        "        self.keep = keep\n"
        "    def forward(self, h):\n"
        "        return h * self.keep\n"
    )
    model, forward = method_of(source, "Net", "forward")
    attribute = cst.parse_expression("self.keep")
    assert analysis.number_value(model, attribute, forward) == 0.9
    assert analysis.number_value(model, cst.parse_expression("1 - self.keep"), forward) == \
        pytest.approx(0.1)


def test_number_value_is_none_when_a_name_is_bound_twice():
    model, value = last_value("keep = 0.5\nkeep = 0.8\nkeep")
    assert analysis.number_value(model, value, None) is None


@pytest.mark.parametrize("source, is_mask", [
    ("import numpy as np\nrng = np.random.default_rng(0)\nrng.random(shape) < keep", True),
    ("import numpy as np\n(np.random.rand(3, 4) > p).astype(np.float32)", True),
    ("import jax\njax.random.bernoulli(key, keep, shape)", True),
    ("import torch\ntorch.empty_like(x).bernoulli_(keep)", True),
    ("import torch\ntorch.rand_like(x) < keep", True),
    ("import numpy as np\nnp.abs(x) < keep", False),
    ("import numpy as np\nscores > threshold", False),
])
def test_mask_expressions(source, is_mask):
    model, value = last_value(source)
    assert analysis.is_mask_expression(model, value) is is_mask


@pytest.mark.parametrize("source, canonical, rate, is_keep", [
    ("import torch.nn.functional as F\nF.dropout(x, 0.3)", "torch.nn.functional.dropout",
     "0.3", False),
    ("from torch import nn\nnn.Dropout(p=0.2)", "torch.nn.Dropout", "0.2", False),
    ("import tensorflow as tf\ntf.nn.dropout(x, 0.4)", "tensorflow.nn.dropout", "0.4", False),
    ("import tensorflow as tf\ntf.compat.v1.nn.dropout(x, 0.6)",
     "tensorflow.compat.v1.nn.dropout", "0.6", True),
    ("import tensorflow as tf\ntf.compat.v1.nn.dropout(x, rate=0.6)",
     "tensorflow.compat.v1.nn.dropout", "0.6", False),
    ("import tensorflow.compat.v1 as tf\ntf.nn.dropout(x, keep)",
     "tensorflow.compat.v1.nn.dropout", "keep", True),
    ("import keras\nkeras.layers.Dropout(0.1)", "tensorflow.keras.layers.Dropout", "0.1", False),
    ("from flax import linen as nn\nnn.Dropout(rate=0.1, deterministic=True)",
     "flax.linen.Dropout", "0.1", False),
    ("import haiku as hk\nhk.dropout(key, 0.25, x)", "haiku.dropout", "0.25", False),
])
def test_dropout_calls_and_their_rate_argument(source, canonical, rate, is_keep):
    model, call = last_value(source)
    found = analysis.dropout_call(model, call, None)
    assert found is not None and found.canonical == canonical
    value, keep = analysis.rate_argument(found.api, found.configuration)
    assert model.module.code_for_node(value) == rate and keep is is_keep


def test_layer_application_through_an_attribute_finds_the_construction():
    source = (
        "from torch import nn\n"
        "class Head(nn.Module):\n"
        "    def __init__(self):\n"
        "        self.drop = nn.Dropout(0.3)\n"
        "    def forward(self, x):\n"
        "        return self.drop(x)\n"
    )
    model, forward = method_of(source, "Head", "forward")
    call = forward.body.body[0].body[0].value
    found = analysis.dropout_call(model, call, forward)
    assert found is not None and found.application is call
    assert model.module.code_for_node(found.configuration) == "nn.Dropout(0.3)"


def test_switch_argument_by_keyword_and_position():
    model, call = last_value("import torch.nn.functional as F\nF.dropout(x, 0.1, flag)")
    api = analysis.DROPOUT_APIS["torch.nn.functional.dropout"]
    assert model.module.code_for_node(analysis.switch_argument(api, call).value) == "flag"
    model, call = last_value("import torch.nn.functional as F\nF.dropout(x, 0.1)")
    assert analysis.switch_argument(api, call) is None


@pytest.mark.parametrize("source, meaning", [
    ("self.training", "train"),
    ("not self.training", "eval"),
    ("is_training", "train"),
    ("train", "train"),
    ("training is False", "eval"),
    ("mode == 'train'", "train"),
    ("mode != 'train'", "eval"),
    ("phase == 'val'", "eval"),
    ("deterministic", "eval"),
    ("train_loader", None),      # a loader, not a flag
    ("self.trainable", None),
    ("x > 0", None),
])
def test_flag_meaning(source, meaning):
    assert analysis.flag_meaning(expression(source)) == meaning


@pytest.mark.parametrize("name, expected", [
    ("evaluate", True), ("eval_epoch", True), ("run_validation", True), ("predict_batch", True),
    ("inference", True), ("test", True), ("validStep", True), ("score_routes", True),
    ("train_and_evaluate", False), ("interval", False), ("forward", False),
    ("fit", False), ("retrieval_loss", False),
])
def test_is_evaluation_function(name, expected):
    assert analysis.is_evaluation_function(name) is expected


def test_unit_tests_are_not_evaluation_code():
    function = cst.parse_module("def test_dropout():\n    pass\n").body[0]
    assert analysis.is_test_case(function, None, "tests/test_layers.py")
    assert analysis.is_test_case(function, "TestLayers", "layers.py")
    assert not analysis.is_test_case(function, None, "scripts/run.py")
