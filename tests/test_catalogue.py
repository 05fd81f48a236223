"""The machine-readable catalogue and `nnlint explain` reach every registered rule."""
import json

import pytest

from nnlint.cli import main
from nnlint.rules.base import all_rules

RULES = [rule for rule in all_rules() if not rule.retired]


@pytest.mark.parametrize("rule", RULES, ids=lambda rule: rule.code)
def test_explain_reaches_every_rule_by_code_and_by_name(rule, capsys):
    assert main(["explain", rule.code.lower()]) == 0
    by_code = capsys.readouterr()
    assert (by_code.out, by_code.err) == (rule.explain(), "")
    assert main(["explain", rule.name]) == 0
    assert capsys.readouterr().out == rule.explain()


def test_rules_json_lists_every_rule_once(capsys):
    assert main(["rules", "--format", "json"]) == 0
    catalogue = json.loads(capsys.readouterr().out)
    assert [(entry["code"], entry["name"], entry["severity"]) for entry in catalogue] == [
        (rule.code, rule.name, rule.severity.value) for rule in RULES]
