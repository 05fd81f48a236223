"""The command line: exact stdout, stderr and exit codes."""
import json
import os
import textwrap
from pathlib import Path

import jsonschema
import pytest

from nnlint import __version__
from tests.conftest import run_cli

HAZARD = "import torch\nmodel = torch.nn.Linear(2, 2)\nmodel.eval\n"
FINDING_SCHEMA = {  # DESIGN §5, written out independently of the code under test
    "type": "array",
    "items": {
        "type": "object",
        "additionalProperties": False,
        "required": ["path", "line", "column", "end_line", "end_column", "code", "name",
                     "severity", "message", "cell", "fix"],
        "properties": {
            "path": {"type": "string"},
            "line": {"type": "integer", "minimum": 1},
            "column": {"type": "integer", "minimum": 1},
            "end_line": {"type": ["integer", "null"], "minimum": 1},
            "end_column": {"type": ["integer", "null"], "minimum": 1},
            "code": {"type": "string", "pattern": "^NNL[0-9]{3}$"},
            "name": {"type": "string", "pattern": "^[a-z0-9]+(-[a-z0-9]+)*$"},
            "severity": {"enum": ["error", "warning"]},
            "message": {"type": "string", "minLength": 1},
            "cell": {"type": ["integer", "null"], "minimum": 0},
            "fix": {"type": "boolean"},  # issue 10: whether `nnlint fix` has a rewrite
        },
    },
}


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text))
    return path


def test_version():
    result = run_cli("--version")
    assert (result.returncode, result.stdout, result.stderr) == (0, f"nnlint {__version__}\n", "")


def test_clean_file_exits_0_with_no_output(tmp_path):
    write(tmp_path, "ok.py", "import torch\nmodel = torch.nn.Linear(2, 2)\nmodel.eval()\n")
    result = run_cli("check", "ok.py", cwd=tmp_path)
    assert (result.returncode, result.stdout, result.stderr) == (0, "", "")


def test_finding_exits_1_in_flake8_line_format(tmp_path):
    write(tmp_path, "train.py", HAZARD)
    result = run_cli("check", "train.py", cwd=tmp_path)
    assert result.returncode == 1
    assert result.stderr == ""
    assert result.stdout == ("train.py:3:1: NNL403 `model.eval` is only read, never called: the "
                             "model stays in training mode; write `model.eval()` (fixable)\n")


def test_syntax_error_beside_a_hazard_gives_both_findings(tmp_path):
    write(tmp_path, "broken.py", "import torch\ndef f(:\n    pass\n")
    write(tmp_path, "train.py", HAZARD)
    result = run_cli("check", ".", cwd=tmp_path)
    assert result.returncode == 1
    lines = result.stdout.splitlines()
    assert lines[0] == ("broken.py:2:7: NNL001 syntax error: invalid syntax; nothing else in "
                        "this file was checked")
    assert lines[1].startswith("train.py:3:1: NNL403 ")
    assert len(lines) == 2


def test_json_output_matches_the_design_schema(tmp_path):
    write(tmp_path, "train.py", HAZARD)
    write(tmp_path, "broken.py", "import torch\nx = (\n")
    result = run_cli("check", "--format", "json", ".", cwd=tmp_path)
    assert result.returncode == 1
    data = json.loads(result.stdout)
    jsonschema.validate(data, FINDING_SCHEMA)
    assert [(item["path"], item["line"], item["code"]) for item in data] == [
        ("broken.py", 2, "NNL001"), ("train.py", 3, "NNL403")]
    assert data[1] == {"path": "train.py", "line": 3, "column": 1, "end_line": 3,
                       "end_column": 11, "code": "NNL403", "name": "mode-switch-not-called",
                       "severity": "error", "message": data[1]["message"], "cell": None,
                       "fix": True}


def test_json_output_of_a_clean_run_is_an_empty_array(tmp_path):
    write(tmp_path, "ok.py", "import torch\n")
    result = run_cli("check", "--format", "json", "ok.py", cwd=tmp_path)
    assert (result.returncode, result.stdout) == (0, "[]\n")


def test_jobs_do_not_change_the_output(tmp_path):
    for index in range(12):
        write(tmp_path, f"pkg/script_{index:02d}.py", HAZARD * (index % 3 + 1))
    serial = run_cli("check", "-j", "1", ".", cwd=tmp_path)
    parallel = run_cli("check", "-j", "2", ".", cwd=tmp_path)
    assert serial.returncode == parallel.returncode == 1
    assert serial.stdout == parallel.stdout
    assert serial.stdout.count("\n") == 24


def test_missing_path_exits_2_and_names_it(tmp_path):
    result = run_cli("check", "nowhere.py", cwd=tmp_path)
    assert (result.returncode, result.stdout) == (2, "")
    assert result.stderr == "nnlint: nowhere.py: no such file or folder\n"


def test_hidden_build_and_venv_folders_are_skipped(tmp_path):
    for folder in (".hidden", "build", "venv_like", "node_modules", "pkg.egg-info"):
        write(tmp_path, f"{folder}/train.py", HAZARD)
    (tmp_path / "venv_like" / "pyvenv.cfg").write_text("home = /usr\n")
    write(tmp_path, "src/train.py", HAZARD)
    result = run_cli("check", ".", cwd=tmp_path)
    assert [line.split(":")[0] for line in result.stdout.splitlines()] == ["src/train.py"]


def test_explicit_file_is_checked_and_non_framework_files_are_skipped(tmp_path):
    write(tmp_path, "plain.py", "class Model:\n    pass\nm = Model()\nm.eval\n")
    result = run_cli("check", "plain.py", cwd=tmp_path)
    assert (result.returncode, result.stdout) == (0, "")


def test_rules_lists_the_catalogue():
    result = run_cli("rules")
    assert result.returncode == 0
    lines = result.stdout.splitlines()
    assert lines[0].split()[:3] == ["NNL001", "parse-error", "error"]
    assert any(line.split()[:2] == ["NNL403", "mode-switch-not-called"] for line in lines)


def test_rules_json_is_machine_readable():
    result = run_cli("rules", "--format", "json")
    catalogue = json.loads(result.stdout)
    assert {"code": "NNL403", "name": "mode-switch-not-called", "severity": "error",
            "summary": "a mode switch or training step is written without the call parentheses",
            "enabled_by_default": True} in catalogue


def test_explain_prints_the_rule_text():
    from nnlint.rules.base import get_rule

    result = run_cli("explain", "NNL403")
    assert (result.returncode, result.stderr) == (0, "")
    assert result.stdout == get_rule("NNL403").explain()
    assert run_cli("explain", "mode-switch-not-called").stdout == result.stdout


def test_explain_unknown_code_exits_2_and_suggests():
    result = run_cli("explain", "NNL430")
    assert (result.returncode, result.stdout) == (2, "")
    assert result.stderr == ("nnlint: unknown rule 'NNL430'; did you mean NNL405, NNL404, NNL403? "
                             "(`nnlint rules` lists them all)\n")


def test_no_command_prints_help_and_exits_2():
    result = run_cli()
    assert result.returncode == 2 and "usage: nnlint" in result.stderr


@pytest.mark.skipif(os.name != "posix", reason="uses a POSIX pseudo-terminal")
def test_summary_line_only_on_a_terminal(tmp_path):
    write(tmp_path, "train.py", HAZARD)
    piped = run_cli("check", "train.py", cwd=tmp_path)
    assert piped.stderr == ""
    import pty
    import subprocess
    import sys

    leader, follower = pty.openpty()
    env = dict(os.environ)
    env.pop("NNLINT_STRICT", None)
    process = subprocess.run([sys.executable, "-m", "nnlint", "check", "train.py"],
                             cwd=tmp_path, stdout=subprocess.PIPE, stderr=follower, env=env,
                             timeout=60)
    os.close(follower)
    output = os.read(leader, 4096).decode()
    os.close(leader)
    assert process.returncode == 1
    assert output.startswith("nnlint: 1 error, 0 warnings in 1 file checked (")
