"""The mode analysis: which names are models, which code is evaluation, modes at calls."""
from __future__ import annotations

import libcst as cst
import pytest

from nnlint.analysis.model import ModuleModel
from nnlint.analysis.modes import (CALLER, EVAL, EVALUATED, PRETRAINED, TRAIN,
                                   TRAIN_REQUESTED, UNKNOWN, ModeAnalysis, calls_in,
                                   is_evaluation_name, is_model_name, words)
from tests.conftest import FIXTURES

TRAIN_TEST = (FIXTURES / "rules" / "NNL401" / "bad_train_test_pair.py").read_text()


def analyse(source: str) -> tuple[ModuleModel, ModeAnalysis]:
    model = ModuleModel(cst.parse_module(source))
    return model, ModeAnalysis.of(model)


def modes_at(source: str, call_text: str, function: str) -> set[str]:
    """Union of the modes seen at every model call written `call_text` in `function`."""
    model, analysis = analyse(source)
    seen = [observation.modes for observation in analysis.observations
            if observation.function == function
            and model.module.code_for_node(observation.node) == call_text]
    assert seen, f"no model call {call_text!r} in {function}"
    return set().union(*seen)


def test_words_split_snake_and_camel_case():
    assert words("validate_epoch") == ["validate", "epoch"]
    assert words("runTestPass") == ["run", "test", "pass"]


@pytest.mark.parametrize("name", ["test", "evaluate", "validate", "val_epoch", "predict",
                                  "run_inference", "test_epoch", "score", "evalModel"])
def test_evaluation_names(name):
    assert is_evaluation_name(name)


@pytest.mark.parametrize("name", ["train", "train_and_evaluate", "test_output_shape",
                                  "forward", "fit", "interval", "evaluator_config_loader"])
def test_names_that_are_not_evaluation(name):
    assert not is_evaluation_name(name)


@pytest.mark.parametrize("name,expected", [("model", True), ("damage_net", True),
                                           ("self.text_encoder", True), ("netG", True),
                                           ("criterion", False), ("optimizer", False),
                                           ("dataset", False)])
def test_model_names(name, expected):
    assert is_model_name(name) is expected


def test_calls_come_in_evaluation_order():
    statement = cst.parse_statement("acc = (model(x.to(d)).argmax(1) == y).sum()")
    texts = [cst.Module([]).code_for_node(call) for call in calls_in(statement)]
    assert texts == ["x.to(d)", "model(x.to(d))", "model(x.to(d)).argmax(1)",
                     "(model(x.to(d)).argmax(1) == y).sum()"]


def test_lambda_bodies_are_not_scanned():
    statement = cst.parse_statement("hook = lambda x: model(x)")
    assert calls_in(statement) == []


def test_which_functions_are_evaluation():
    model, analysis = analyse(TRAIN_TEST)
    verdicts = {name: analysis.is_evaluation_function(node)
                for name, node in model.functions.items()}
    assert verdicts == {"train": False, "test": True, "main": False}


def test_lightning_hooks_are_not_judged():
    source = ("import lightning.pytorch as pl\nimport torch\n"
              "class Lit(pl.LightningModule):\n"
              "    def validation_step(self, batch, index):\n        return self(batch)\n")
    model, analysis = analyse(source)
    hook = model.classes["Lit"].methods["validation_step"]
    assert not analysis.is_evaluation_function(hook)


def test_constructed_model_is_in_training_mode_and_params_take_the_callers():
    # train() only requests training mode; the first backward pass makes it training
    assert modes_at(TRAIN_TEST, "model(data)", "train") == {TRAIN_REQUESTED, TRAIN}
    assert modes_at("import torch\nfrom torch import nn\nnet = nn.Linear(2, 2)\nnet(1)\n",
                    "net(1)", "<module>") == {TRAIN}
    assert modes_at(TRAIN_TEST, "model(data)", "test") == {CALLER}


def test_eval_switch_then_evaluation_gives_evaluated():
    source = TRAIN_TEST.replace("    test_loss = 0\n", "    model.eval()\n    test_loss = 0\n")
    # the first pass sees eval(); the loop's second pass sees the model already evaluated
    assert modes_at(source, "model(data)", "test") == {EVAL, EVALUATED}


def test_summary_of_test_needs_eval_and_train_sets_train_mode():
    model, analysis = analyse(TRAIN_TEST)
    test_summary = analysis.summary_of(model.functions["test"])
    train_summary = analysis.summary_of(model.functions["train"])
    assert set(test_summary.effects) == {"0"}  # parameter 0 is the model
    assert model.module.code_for_node(test_summary.effects["0"].needs_eval) == "model(data)"
    assert test_summary.effects["0"].exit == {CALLER}
    # the loop may run zero times, so train() may exit before any backward pass
    assert train_summary.effects["1"].exit == {TRAIN_REQUESTED, TRAIN}
    assert train_summary.effects["1"].needs_eval is None


def test_epoch_loop_carries_the_mode_round():
    source = """import torch
from torch import nn
def fit(loader, val_loader):
    net = nn.Sequential(nn.Linear(4, 4), nn.Dropout(0.1))
    for epoch in range(3):
        out = net(loader)
        with torch.no_grad():
            for x in val_loader:
                net.eval()
                net(x)
"""
    # epoch 1 starts in training mode, epoch 2 in the eval mode the evaluation left
    assert modes_at(source, "net(loader)", "fit") == {TRAIN, EVALUATED}


def test_from_pretrained_is_eval_mode_and_tokenizers_are_not_models():
    source = """import torch
from transformers import AutoModel, AutoTokenizer
tok = AutoTokenizer.from_pretrained("x")
enc = AutoModel.from_pretrained("x")
enc(tok("a"))
tok("b")
"""
    model, analysis = analyse(source)
    called = {observation.model: observation.modes for observation in analysis.observations}
    assert called == {"enc": {PRETRAINED}}


def test_reassignment_from_unknown_call_forgets_the_mode():
    source = """import torch
from torch import nn
net = nn.Dropout(0.5)
net = wrap(net)
net(1)
"""
    assert modes_at(source, "net(1)", "<module>") == {UNKNOWN}


def test_layers_of_local_classes():
    source = """import torch
from torch import nn
import torch.nn.functional as F
class Plain(nn.Module):
    def __init__(self, width):
        super().__init__()
        self.width = width
        self.fc = nn.Linear(width, width)
class Normed(Plain):
    def __init__(self, width):
        super().__init__(width)
        self.norm = nn.Sequential(nn.BatchNorm1d(width), nn.ReLU())
    def forward(self, x):
        return F.dropout(self.norm(self.fc(x)), 0.1, training=self.training)
class Injected(nn.Module):
    def __init__(self, backbone):
        super().__init__()
        self.backbone = backbone
"""
    model, analysis = analyse(source)
    layers = {name: analysis.layers_of_class(info) for name, info in model.classes.items()}
    assert layers == {"Plain": "", "Normed": "batch norm and dropout", "Injected": None}


def test_files_without_torch_are_not_analysed():
    _, analysis = analyse("import numpy as np\nmodel = np.zeros(3)\nmodel.eval()\n")
    assert not analysis.uses_torch and analysis.observations == []


def test_analysis_is_memoised_on_the_model():
    model = ModuleModel(cst.parse_module(TRAIN_TEST))
    assert ModeAnalysis.of(model) is ModeAnalysis.of(model)
