"""Every fixture agrees exactly with its `# expect:` markers: nothing missing, nothing extra."""
from __future__ import annotations

from pathlib import Path

import pytest

from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import check_file
from nnlint.rules.base import all_rules
from tests.conftest import FIXTURES
from tests.fixture_expectations import compare, read_expectations

RULE_FIXTURES = sorted((FIXTURES / "rules").rglob("*.py"))


def test_fixture_collection_is_not_empty():
    assert len(RULE_FIXTURES) >= 4


@pytest.mark.parametrize("path", RULE_FIXTURES, ids=lambda p: str(p.relative_to(FIXTURES)))
def test_fixture_findings_match_markers(path: Path):
    expected, ok_lines = read_expectations(path)
    assert expected or ok_lines, f"{path} has neither an `# expect:` nor an `# ok` line"
    settings = with_default_ignores(Settings(root=str(path.parent)))
    result = check_file(str(path), settings, ProjectIndex(settings))
    assert not result.errors, result.errors
    actual = [(finding.line, finding.column, finding.code) for finding in result.findings]
    missing, unexpected = compare(expected, actual)
    assert not missing and not unexpected, (
        f"\n{path}\nmissing: {missing}\nunexpected: {unexpected}\n"
        + "\n".join(f"  {f.line}:{f.column} {f.code} {f.message}" for f in result.findings))


@pytest.mark.parametrize("rule", [r for r in all_rules() if not r.retired], ids=lambda r: r.code)
def test_every_rule_has_bad_and_good_fixtures(rule):
    folder = FIXTURES / "rules" / rule.code
    files = sorted(folder.rglob("*.py"))
    flagged = [f for f in files if any(e.code == rule.code for e in read_expectations(f)[0])]
    silent = [f for f in files if read_expectations(f)[1] > 0]
    assert flagged, f"no fixture under {folder} expects {rule.code}"
    assert silent, f"no fixture under {folder} has `# ok` look-alikes for {rule.code}"
