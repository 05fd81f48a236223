"""Bad input never produces a traceback: each odd file gets a finding or a one-line message,
the documented exit code, and every other file of the run is still checked."""
from __future__ import annotations

import json
import os
import warnings

import pytest
from hypothesis import HealthCheck, given, settings
import hypothesmith

from nnlint.config import Settings, with_default_ignores
from nnlint.engine import MAX_FILE_BYTES, check_file, lint_text
from tests.conftest import FIXTURES, run_cli

HAZARD = b"import torch\nm = torch.nn.Linear(1, 1)\nm.eval\n"
SETTINGS = with_default_ignores(Settings())

#: file name -> (bytes, expected (line, code) findings); the hazard line is reported where given
BAD_INPUTS: dict[str, tuple[bytes, list[tuple[int, str]]]] = {
    "invalid_utf8.py": (b"import torch\nname = '\xff\xfe'\n", [(2, "NNL001")]),
    "bom.py": (b"\xef\xbb\xbf" + HAZARD, [(3, "NNL403")]),
    "latin1_cookie.py": ("# -*- coding: latin-1 -*-\nimport torch\nville = 'Orl\xe9ans'\n"
                         "m = torch.nn.Linear(1, 1)\nm.eval\n".encode("latin-1"), [(5, "NNL403")]),
    "crlf.py": (HAZARD.replace(b"\n", b"\r\n"), [(3, "NNL403")]),
    "lone_cr.py": (HAZARD.replace(b"\n", b"\r"), [(3, "NNL403")]),
    "tabs_form_feed.py": (b"import torch\n\x0c\ndef fit(m):\n\tm.eval\n", [(4, "NNL403")]),
    "nul_byte.py": (b"import torch\nx = 1\x00\n", [(2, "NNL001")]),
    "python2.py": (b"import torch\nprint 'loss', 1\n", [(2, "NNL001")]),
    "empty.py": (b"", []),
    # our walk is iterative, but some analyses recurse through expressions: NNL001
    "deep_expression.py": (b"import torch\nx = " + b"-" * 1000 + b"1\n", [(1, "NNL001")]),
    # ... but positions come from libcst's recursive metadata pass: too deep is NNL001
    "deep_expression_hazard.py": (b"import torch\nx = " + b"-" * 1000 + b"1\nm = torch.nn."
                                  b"Linear(1, 1)\nm.eval\n", [(1, "NNL001")]),
    # CPython refuses more than 200 nested brackets; libcst's parser would crash the
    # process near 2,000, so such files are NNL001 before libcst sees them
    "deep_parentheses.py": (b"import torch\nx = " + b"(" * 1000 + b"1" + b")" * 1000 + b"\n",
                            [(2, "NNL001")]),
    "very_deep_parentheses.py": (b"import torch\nx = " + b"(" * 5000 + b")" * 5000 + b"\n",
                                 [(2, "NNL001")]),
    "deep_block.py": (b"import torch\n" + b"".join(b"    " * i + b"if x:\n" for i in range(200))
                      + b"    " * 200 + b"pass\n", [(102, "NNL001")]),
    "binary.py": (bytes(range(256)) * 8, [(2, "NNL001")]),
}


def write_bad_tree(folder):
    for name, (data, _) in BAD_INPUTS.items():
        (folder / name).write_bytes(data)
    (folder / "dir_named.py").mkdir()
    (folder / "loop.py").symlink_to("loop.py")
    (folder / "sub").mkdir()
    (folder / "sub" / "up").symlink_to("..")
    (folder / "broken.ipynb").write_text("{not json")
    (folder / "zz_last_good.py").write_bytes(HAZARD)


@pytest.mark.parametrize("name", sorted(BAD_INPUTS))
def test_each_bad_input_gives_its_expected_outcome(tmp_path, name):
    data, expected = BAD_INPUTS[name]
    path = tmp_path / name
    path.write_bytes(data)
    result = check_file(str(path), SETTINGS)
    assert not result.errors and not result.messages
    found = [(finding.line, finding.code) for finding in result.findings]
    assert found == expected, [f.message for f in result.findings]


def test_a_tree_full_of_bad_files_still_checks_the_good_one(tmp_path):
    write_bad_tree(tmp_path)
    result = run_cli("check", "--no-cache", "-j", "1", ".", cwd=tmp_path)
    assert "Traceback" not in result.stderr
    lines = result.stdout.splitlines()
    assert "zz_last_good.py:3:1: NNL403" in "\n".join(lines)
    assert any(line.startswith("binary.py:2:1: NNL001 cannot decode as utf-8") for line in lines)
    # the symlink loop is a one-line message; it makes the exit status 2
    assert "nnlint: loop.py: cannot read: Too many levels of symbolic links" in result.stderr
    assert result.returncode == 2
    assert all(len(line.split("\n")) == 1 for line in result.stderr.splitlines())


def test_parallel_run_over_bad_files_matches_serial(tmp_path):
    write_bad_tree(tmp_path)
    for index in range(10):
        (tmp_path / f"more_{index}.py").write_bytes(HAZARD)
    serial = run_cli("check", "--no-cache", "-j", "1", ".", cwd=tmp_path)
    parallel = run_cli("check", "--no-cache", "-j", "2", ".", cwd=tmp_path)
    assert serial.stdout == parallel.stdout
    assert serial.stderr == parallel.stderr


def test_unreadable_file_is_a_message_and_the_run_goes_on(tmp_path, monkeypatch):
    # As root chmod 0 does not stop reads, so simulate the operating system's refusal.
    import builtins

    target = tmp_path / "locked.py"
    target.write_bytes(HAZARD)
    real_open = builtins.open

    def refusing_open(file, *args, **kwargs):
        if str(file) == str(target):
            raise PermissionError(13, "Permission denied")
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", refusing_open)
    result = check_file(str(target), SETTINGS)
    assert result.messages == [f"nnlint: {target}: cannot read: Permission denied"]
    assert result.findings == []


def test_fifo_named_py_is_never_opened(tmp_path):
    if not hasattr(os, "mkfifo"):
        pytest.skip("no FIFOs on this platform")
    fifo = tmp_path / "pipe.py"
    os.mkfifo(fifo)
    result = check_file(str(fifo), SETTINGS)  # would block forever if it were opened
    assert result.messages == [f"nnlint: {fifo}: not a regular file; skipped"]


def test_oversized_file_is_reported_not_parsed(tmp_path):
    big = tmp_path / "generated.py"
    line = b"weights_%07d = np.log(1.0 + 2.0)  # generated table row\n"
    count = MAX_FILE_BYTES // len(line % 0) + 10_000  # a little over the limit (~1.3 MiB)
    big.write_bytes(b"import numpy as np\n" + b"".join(line % i for i in range(count)))
    result = check_file(str(big), SETTINGS)
    assert [(f.line, f.code) for f in result.findings] == [(1, "NNL001")]
    assert "over the 1 MiB limit" in result.findings[0].message


def test_five_megabyte_file_gives_a_finding_quickly(tmp_path):
    big = tmp_path / "five_mb.py"
    big.write_bytes(b"import torch\n" + b"x = 1  # padding padding padding padding\n" * 125_000)
    assert big.stat().st_size > 5_000_000
    result = run_cli("check", "--no-cache", "five_mb.py", cwd=tmp_path)
    assert result.returncode == 1
    assert result.stdout.startswith("five_mb.py:1:1: NNL001 file is 4.9 MiB")


def test_internal_error_in_one_rule_keeps_other_findings(tmp_path, monkeypatch):
    from nnlint.rules.general import ParseError  # noqa: F401  (registry loaded)
    from nnlint.rules.modes import ModeSwitchNotCalled
    from nnlint.rules.base import Rule, _REGISTRY, register

    class Exploding(Rule):
        code = "NNL999"
        name = "exploding-test-rule"
        message = "never"

        def visit_Call(self, node):
            raise ValueError("boom")

    monkeypatch.setitem(_REGISTRY, "NNL999", Exploding)
    monkeypatch.delenv("NNLINT_STRICT")
    result = lint_text("import torch\nm = torch.nn.Linear(1, 1)\nm.eval\n", "x.py", SETTINGS)
    assert [f.code for f in result.findings] == [ModeSwitchNotCalled.code]
    assert len(result.errors) == 1
    assert result.errors[0].describe().startswith(
        "nnlint: internal error in NNL999 on x.py: ValueError: boom (")
    assert register  # the public decorator stays importable for plugins


def test_cli_reports_internal_errors_with_exit_2(tmp_path):
    plugin = tmp_path / "boom_plugin.py"
    plugin.write_text(
        "from nnlint.rules.base import Rule, register\n"
        "@register\nclass Boom(Rule):\n    code='NNL998'\n    name='boom-rule'\n"
        "    message='x'\n    def visit_Name(self, node):\n        raise KeyError('k')\n")
    runner = tmp_path / "run.py"
    runner.write_text("import sys\nsys.path.insert(0, %r)\nimport boom_plugin\n"
                      "from nnlint.cli import main\nraise SystemExit(main(sys.argv[1:]))\n"
                      % str(tmp_path))
    (tmp_path / "train.py").write_bytes(HAZARD)
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "NNLINT_STRICT"}
    result = subprocess.run([sys.executable, str(runner), "check", "--no-cache", "train.py"],
                            cwd=tmp_path, capture_output=True, text=True, env=env, timeout=120)
    assert result.returncode == 2
    assert "train.py:3:1: NNL403" in result.stdout
    assert result.stderr.startswith("nnlint: internal error in NNL998 on train.py: KeyError")
    assert "Traceback" not in result.stderr


@pytest.mark.filterwarnings("ignore::SyntaxWarning")
@settings(max_examples=int(os.environ.get("NNLINT_FUZZ_EXAMPLES", "200")), deadline=None,
          suppress_health_check=list(HealthCheck))
@given(hypothesmith.from_grammar())
def test_engine_never_raises_on_generated_programs(source):
    # prefix a framework import so that the pre-filter lets the program through
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = lint_text("import torch\n" + source, "generated.py", SETTINGS)
    assert not result.errors
    for finding in result.findings:
        assert finding.line >= 1 and finding.column >= 1


def test_security_analysed_code_is_never_executed(tmp_path):
    marker = tmp_path / "marker.txt"
    result = run_cli("check", "--no-cache", str(FIXTURES / "security"), cwd=tmp_path,
                     env={"NNLINT_MARKER": str(marker)})
    assert result.returncode == 1 and "NNL403" in result.stdout
    assert not marker.exists()
    assert json.loads(run_cli("check", "--no-cache", "--format", "json",
                              str(FIXTURES / "security"), cwd=tmp_path,
                              env={"NNLINT_MARKER": str(marker)}).stdout)
    assert not marker.exists()
