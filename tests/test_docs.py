"""Documents that quote the code are checked against it."""
import re
import subprocess
import sys

from nnlint.docs import END, START, rule_table
from tests.conftest import ROOT, run_cli

README = (ROOT / "README.md").read_text(encoding="utf-8")
REGENERATE = "python -m nnlint.docs --write"


def test_readme_rule_table_matches_the_registry():
    found = re.search(re.escape(START) + r"\n(.*?)\n" + re.escape(END), README, re.S)
    assert found, "README lacks the rule-table markers"
    assert found.group(1) == rule_table(), f"README rule table is stale; run `{REGENERATE}`"


def readme_commands() -> list[str]:
    return re.findall(r"```console\n(.*?)\n```", README, re.S)


def test_readme_has_the_two_setup_commands_and_ci_runs_the_test_one():
    commands = readme_commands()
    assert "pip install . && nnlint check fixtures/demo" in commands
    test_command = 'pip install -e ".[test]" && python -m pytest'
    assert test_command in commands
    ci = (ROOT / ".ci" / "run").read_text()
    assert test_command in ci.splitlines(), ".ci/run must run the README's test command as is"


def demo_output() -> str:
    result = run_cli("check", "fixtures/demo", cwd=ROOT)
    assert result.returncode == 1, result.stderr
    return result.stdout


def test_demo_output_is_the_expected_one_and_the_readme_quotes_it():
    output = demo_output()
    assert output == (ROOT / "fixtures" / "demo" / "expected.txt").read_text(), (
        "demo output changed; update fixtures/demo/expected.txt and the README block with "
        "`python -m nnlint check fixtures/demo > fixtures/demo/expected.txt`")
    block = re.search(r"<!-- demo-output:start -->\n```text\n(.*?)```\n<!-- demo-output:end -->",
                      README, re.S)
    assert block and block.group(1) == output, "README demo output is stale"


def test_demo_json_output_is_the_same_findings():
    import json

    result = run_cli("check", "--format", "json", "fixtures/demo", cwd=ROOT)
    data = json.loads(result.stdout)
    text_lines = demo_output().splitlines()
    marker = " (fixable)"
    assert [f"{d['path']}:{d['line']}:{d['column']}: {d['code']} {d['message']}"
            + (marker if d["fix"] else "") for d in data] == text_lines


def test_regenerate_command_is_idempotent():
    subprocess.run([sys.executable, "-m", "nnlint.docs"], check=True, capture_output=True)
