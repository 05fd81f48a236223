"""Acceptance of the mode rules: deleting one switch from a correct script reports it."""
from __future__ import annotations

from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text
from nnlint.finding import Severity
from tests.conftest import FIXTURES

STANDARD = (FIXTURES / "rules" / "NNL401" / "good_standard_train_test.py").read_text()


def lint(source: str):
    settings = with_default_ignores(Settings())
    return lint_text(source, "script.py", settings, ProjectIndex(settings)).findings


def line_of(source: str, text: str) -> int:
    return next(number for number, line in enumerate(source.splitlines(), 1) if text in line)


def without(line: str) -> str:
    assert STANDARD.count(line) == 1
    return STANDARD.replace(line, "")


def test_the_standard_script_is_silent():
    assert lint(STANDARD) == []


def test_removing_eval_reports_the_model_call_in_test():
    source = without("    model.eval()\n")
    findings = lint(source)
    assert [(f.code, f.line, f.column) for f in findings] == [
        ("NNL401", line_of(source, "output = model(data)  # ok: eval()"), 22)]
    # ManifestNet holds nn.Dropout, so the finding is an error, and says so
    assert findings[0].severity is Severity.ERROR
    assert findings[0].message == ("evaluation runs `model` in training mode (dropout active); "
                                   "call `model.eval()` first")


def test_removing_train_reports_the_backward_pass_in_train():
    source = without("    model.train()\n")
    findings = lint(source)
    assert [(f.code, f.line, f.column) for f in findings] == [
        ("NNL402", line_of(source, "loss.backward()"), 9)]
    assert findings[0].message == ("`model` trains in eval mode left by an earlier evaluation; "
                                   "call `model.train()` first")


def test_unknown_layers_make_nnl401_a_warning():
    # a model built by an unknown function: train() makes it a model in training mode, but
    # its layers are unknown
    source = without("    model.eval()\n")
    source = source.replace("model = ManifestNet().to(device)", "model = load_model().to(device)")
    findings = lint(source)
    assert [(f.code, f.severity) for f in findings] == [("NNL401", Severity.WARNING)]
    assert findings[0].message == ("evaluation runs `model` in training mode; "
                                   "call `model.eval()` first")


def test_eval_before_every_call_site_keeps_a_helper_silent():
    source = without("    model.eval()\n").replace(
        "        test(model, device, test_loader)",
        "        model.eval()\n        test(model, device, test_loader)")
    assert lint(source) == []


def test_a_helper_of_another_module_is_judged_at_the_call(tmp_path):
    (tmp_path / "metrics.py").write_text(
        "import torch\n\n\ndef accuracy(model, loader):\n    with torch.no_grad():\n"
        "        return sum((model(x).argmax(1) == y).sum().item() for x, y in loader)\n"
        "\n\ndef val_accuracy(model, loader):\n    hits = 0\n    with torch.no_grad():\n"
        "        for x, y in loader:\n            hits += (model(x).argmax(1) == y).sum()\n"
        "    return hits\n")
    script = tmp_path / "run.py"
    script.write_text(
        "import torch\nfrom torch import nn\nfrom metrics import accuracy, val_accuracy\n\n"
        "net = nn.Sequential(nn.Linear(4, 4), nn.Dropout(0.2))\n"
        "accuracy(net, [])\nval_accuracy(net, [])\nnet.eval()\nval_accuracy(net, [])\n")
    from nnlint.engine import check_file

    settings = with_default_ignores(Settings(root=str(tmp_path)))
    result = check_file(str(script), settings, ProjectIndex(settings))
    helper = check_file(str(tmp_path / "metrics.py"), settings, ProjectIndex(settings))
    # accuracy() is not evaluation code (no loop statement, neutral name): no claim on it;
    # val_accuracy() is, and the call on line 7 hands it a model in training mode
    assert [(f.code, f.line, f.column) for f in result.findings] == [("NNL401", 7, 1)]
    assert result.findings[0].message.startswith("evaluation in `val_accuracy` runs `net`")
    assert helper.findings == []  # the helper alone cannot know its callers' mode
