"""The registry is the single source of rule metadata; every rule is complete and consistent."""
import re

import pytest

from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text
from nnlint.finding import Severity
from nnlint.rules.base import all_rules

RULES = [rule for rule in all_rules() if not rule.retired]
KEBAB = re.compile(r"^[a-z0-9]+(-[a-z0-9]+)*$")


def test_codes_and_names_are_unique_and_well_formed():
    codes = [rule.code for rule in all_rules()]
    names = [rule.name for rule in all_rules()]
    assert len(codes) == len(set(codes)) and len(names) == len(set(names))
    assert all(re.fullmatch(r"NNL\d{3}", code) for code in codes)
    assert all(KEBAB.match(name) for name in names)


@pytest.mark.parametrize("rule", RULES, ids=lambda rule: rule.code)
def test_rule_documentation_is_complete(rule):
    assert isinstance(rule.severity, Severity)
    for attribute in ("summary", "message", "rationale", "bad", "good"):
        assert getattr(rule, attribute).strip(), f"{rule.code} lacks {attribute}"
    assert rule.references, f"{rule.code} lacks references"
    assert rule.summary[0].islower() and not rule.summary.endswith(".")
    assert rule.message[0].islower() or rule.message[0] in "`{"
    explained = rule.explain()
    assert rule.code in explained and rule.rationale in explained


@pytest.mark.parametrize("rule", [r for r in RULES if not r.engine_only], ids=lambda r: r.code)
def test_bad_example_yields_exactly_this_code_and_good_yields_nothing(rule):
    settings = with_default_ignores(Settings())
    prelude = rule_prelude(rule)
    bad = lint_text(prelude + rule.bad + "\n", "bad.py", settings, ProjectIndex(settings))
    good = lint_text(prelude + rule.good + "\n", "good.py", settings, ProjectIndex(settings))
    assert {finding.code for finding in bad.findings} == {rule.code}, bad.findings
    assert good.findings == [], good.findings


def rule_prelude(rule) -> str:
    """Examples may omit their imports; give them the usual ones when they do."""
    text = rule.bad + rule.good
    if re.search(r"^\s*(import|from)\s", text, re.M):
        return ""
    return ("import numpy as np\nimport torch\nimport torch.nn.functional as F\n"
            "from torch import nn\n")
