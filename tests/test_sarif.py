"""SARIF 2.1.0 output, validated against the official OASIS schema."""
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import jsonschema
import pytest

from nnlint import __version__
from nnlint.finding import Edit
from nnlint.report.sarif import artifact_uri
from nnlint.rules.base import all_rules
from tests.conftest import FIXTURES, ROOT, SHARED_STANDARDS, run_cli

SCHEMA_FILE = SHARED_STANDARDS / "sarif-schema-2.1.0.json"


@pytest.fixture(scope="module")
def sarif_validator():
    if not SCHEMA_FILE.is_file():
        pytest.skip(f"SARIF 2.1.0 schema not found at {SCHEMA_FILE} (the shared standards "
                    f"folder beside the project; set NNLINT_STANDARDS_DIR to its location)")
    schema = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    # the schema is JSON Schema draft-04 (its "$schema"; shared/standards/README.md)
    jsonschema.Draft4Validator.check_schema(schema)
    return jsonschema.Draft4Validator(schema, format_checker=jsonschema.FormatChecker())


def sarif_of(*args, cwd=FIXTURES):
    result = run_cli("check", "--format", "sarif", "-j", "1", *args, cwd=cwd)
    return result, json.loads(result.stdout)


def schema_errors(validator, document) -> list[str]:
    return [f"{'/'.join(map(str, error.absolute_path))}: {error.message}"
            for error in validator.iter_errors(document)]


def test_sarif_of_the_fixtures_is_valid_against_the_official_schema(sarif_validator):
    result, document = sarif_of("rules", "demo", "notebooks")
    assert result.returncode == 1, result.stderr
    assert document["runs"][0]["results"], "the fixtures must produce results"
    assert schema_errors(sarif_validator, document) == []


def test_the_validator_rejects_a_broken_log(sarif_validator):
    # the schema check must be able to fail: a level SARIF does not define, a 0 line
    _, document = sarif_of("notebooks")
    document["runs"][0]["results"][0]["level"] = "fatal"
    document["runs"][0]["results"][0]["locations"][0]["physicalLocation"]["region"][
        "startLine"] = 0
    errors = schema_errors(sarif_validator, document)
    assert any("'fatal' is not one of" in error for error in errors), errors
    assert any("startLine" in error and "minimum" in error for error in errors), errors


def test_a_clean_run_is_a_valid_log_with_no_results(tmp_path, sarif_validator):
    (tmp_path / "ok.py").write_text("import torch\nmodel = torch.nn.Linear(2, 2)\nmodel.eval()\n")
    result, document = sarif_of(".", cwd=tmp_path)
    assert (result.returncode, result.stderr) == (0, "")
    assert document["runs"][0]["results"] == []
    assert document["runs"][0]["invocations"] == [
        {"executionSuccessful": True, "toolExecutionNotifications": []}]
    assert schema_errors(sarif_validator, document) == []


def test_driver_lists_every_rule_with_its_explain_text():
    _, document = sarif_of("notebooks")
    assert document["version"] == "2.1.0" and len(document["runs"]) == 1
    driver = document["runs"][0]["tool"]["driver"]
    assert (driver["name"], driver["version"]) == ("nnlint", __version__)
    rules = [rule for rule in all_rules() if not rule.retired]
    assert [entry["id"] for entry in driver["rules"]] == [rule.code for rule in rules]
    for entry, rule in zip(driver["rules"], rules):
        assert entry["name"] == rule.name
        assert entry["shortDescription"]["text"] == rule.summary
        assert entry["fullDescription"]["text"] == rule.rationale
        assert entry["help"]["text"] == rule.explain()
        assert entry["defaultConfiguration"]["level"] == rule.severity.value


def test_notebook_results_carry_rule_index_level_region_and_cell():
    _, document = sarif_of("notebooks")
    run = document["runs"][0]
    rule_ids = [entry["id"] for entry in run["tool"]["driver"]["rules"]]
    got = []
    for result in run["results"]:
        assert rule_ids[result["ruleIndex"]] == result["ruleId"]
        location = result["locations"][0]
        region = location["physicalLocation"]["region"]
        got.append((result["ruleId"], result["level"],
                    location["physicalLocation"]["artifactLocation"]["uri"],
                    location["properties"]["cell"], region["startLine"],
                    region["startColumn"], region["endLine"], region["endColumn"]))
    uri = "notebooks/kestrel_delay_review.ipynb"
    # hand-read from the fixture: cell 4 line 2 `optimizer.zero_grad` (19 characters) at
    # column 5; cell 6 line 2 `delay_net.eval` (14) at column 1; SARIF end columns point
    # just past the region (SARIF 2.1.0 §3.30.8)
    assert got == [("NNL403", "error", uri, 4, 2, 5, 2, 24),
                   ("NNL403", "error", uri, 6, 2, 1, 2, 15)]


def test_python_results_have_no_cell_and_parse_errors_keep_their_position(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "broken file.py").write_text("import torch\ndef f(:\n")
    _, document = sarif_of(".", cwd=tmp_path)
    [result] = document["runs"][0]["results"]
    assert "properties" not in result["locations"][0]
    assert result["locations"][0]["physicalLocation"] == {
        "artifactLocation": {"uri": "sub/broken%20file.py"},
        "region": {"startLine": 2, "startColumn": 7}}


def test_unreadable_paths_make_the_invocation_unsuccessful(tmp_path, sarif_validator):
    result, document = sarif_of("missing.py", cwd=tmp_path)
    assert result.returncode == 2
    [invocation] = document["runs"][0]["invocations"]
    assert invocation["executionSuccessful"] is False
    assert invocation["toolExecutionNotifications"] == [
        {"level": "error", "message": {"text": "nnlint: missing.py: no such file or folder"}}]
    assert schema_errors(sarif_validator, document) == []


def test_absolute_paths_become_file_uris(tmp_path):
    assert artifact_uri(str(tmp_path / "a b.py")) == (tmp_path / "a b.py").as_uri()


def test_readme_ci_recipe_keeps_the_report_and_fails_on_findings(tmp_path):
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    recipe = re.search(r"<!-- ci-recipe:start -->\s*```sh\n(.*?)```", readme, re.S).group(1)
    (tmp_path / "src").mkdir()
    (tmp_path / "src" / "train.py").write_text("import torch\nnet = torch.nn.Linear(2, 2)\n"
                                               "net.eval\n")
    (tmp_path / "notebooks").mkdir()
    (tmp_path / "notebooks" / "review.ipynb").write_bytes(
        (FIXTURES / "notebooks" / "kestrel_delay_review.ipynb").read_bytes())
    environment = dict(os.environ, PATH=os.pathsep.join([str(Path(sys.executable).parent),
                                                         os.environ.get("PATH", "")]))
    environment.pop("NNLINT_STRICT", None)
    result = subprocess.run(["sh", "-e", "-c", recipe], cwd=tmp_path, capture_output=True,
                            text=True, env=environment, timeout=300)
    assert (result.returncode, result.stderr) == (1, "")
    document = json.loads((tmp_path / "results.sarif").read_text())
    located = [(result["locations"][0]["physicalLocation"]["artifactLocation"]["uri"],
                result["locations"][0]["physicalLocation"]["region"]["startLine"])
               for result in document["runs"][0]["results"]]
    assert located == [("notebooks/review.ipynb", 2), ("notebooks/review.ipynb", 2),
                       ("src/train.py", 3)]


def test_fixable_results_carry_the_fix_that_nnlint_fix_applies(tmp_path, sarif_validator):
    from nnlint.edits import apply_edits

    source = ("import torch\n\nnet = torch.nn.Linear(2, 2)\nnet.eval  # score\n"
              "net.train\nnet.eval()\n")
    (tmp_path / "score.py").write_text(source)
    _, document = sarif_of(".", cwd=tmp_path)
    assert schema_errors(sarif_validator, document) == []
    results = document["runs"][0]["results"]
    assert [result["ruleId"] for result in results] == ["NNL403", "NNL403"]
    edits = []
    for result in results:
        (fix,) = result["fixes"]
        assert fix["description"]["text"] == "nnlint fix adds the missing call parentheses"
        (change,) = fix["artifactChanges"]
        assert change["artifactLocation"]["uri"] == "score.py"
        for replacement in change["replacements"]:
            region = replacement["deletedRegion"]
            edits.append(Edit(region["startLine"], region["startColumn"], region["endLine"],
                              region["endColumn"], replacement["insertedContent"]["text"]))
    applied = apply_edits(source, edits)
    assert run_cli("fix", "score.py", cwd=tmp_path).returncode == 0
    assert applied == (tmp_path / "score.py").read_text() == source.replace(
        "net.eval  #", "net.eval()  #").replace("net.train\n", "net.train()\n")


def test_unfixable_and_notebook_results_carry_no_fixes():
    _, document = sarif_of("notebooks", "rules/NNL201")
    results = document["runs"][0]["results"]
    assert results and all("fixes" not in result for result in results)
