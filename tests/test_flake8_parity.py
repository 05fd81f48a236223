"""`flake8 --select NNL` reports exactly what `nnlint check` reports, `# noqa` included."""
import subprocess
import sys
import textwrap

import pytest

from nnlint.report.text import FIXABLE_MARKER
from tests.conftest import FIXTURES, run_cli

FLAKE8_FORMAT = "%(path)s:%(row)d:%(col)d: %(code)s %(text)s"


def flake8(*args: str, cwd, select: str = "NNL"):
    return subprocess.run([sys.executable, "-m", "flake8", "--isolated", "--select", select,
                           f"--format={FLAKE8_FORMAT}", *args], cwd=cwd, capture_output=True,
                          text=True, timeout=300)


def nnlint_lines(*args: str, cwd) -> list[str]:
    """nnlint's findings without NNL001 and without the CLI-only fixable marker."""
    result = run_cli("check", "-j", "1", *args, cwd=cwd)
    assert result.returncode in (0, 1), result.stderr
    return [line.removesuffix(FIXABLE_MARKER) for line in result.stdout.splitlines()
            if " NNL001 " not in line]


def test_flake8_and_nnlint_agree_on_every_fixture():
    flake = flake8("rules", "demo", cwd=FIXTURES)
    assert flake.returncode in (0, 1), flake.stderr
    ours = nnlint_lines("rules", "demo", cwd=FIXTURES)
    assert ours, "the fixtures must produce findings"
    theirs = [line for line in flake.stdout.splitlines() if " E999 " not in line]
    assert sorted(theirs) == sorted(ours)


@pytest.mark.parametrize("comment, suppressed", [
    ("# noqa", True),
    ("# noqa: NNL403", True),
    ("# noqa:NNL403", True),
    ("# NOQA: NNL4", True),
    ("# noqa: NNL301,NNL4", True),
    ("# noqa: NNL301 NNL403", True),
    ("# noqa: NNL301", False),
    ("# noqa: E501", False),
    ("# noqa : NNL301", True),  # flake8 reads this as a blanket noqa
])
def test_noqa_forms_behave_as_in_flake8(tmp_path, comment, suppressed):
    source = f"import torch\nmodel = torch.nn.Linear(2, 2)\nmodel.eval  {comment}\n"
    (tmp_path / "train.py").write_text(source)
    ours = nnlint_lines("train.py", cwd=tmp_path)
    theirs = flake8("train.py", cwd=tmp_path).stdout.splitlines()
    assert ours == theirs
    assert (ours == []) is suppressed


def test_noqa_on_a_multiline_string_covers_its_lines(tmp_path):
    source = textwrap.dedent('''\
        import torch
        model = torch.nn.Linear(2, 2)
        note = """first
        second"""; model.eval  # noqa: NNL403
        model.train; text = """a
        b"""  # noqa
    ''')
    (tmp_path / "train.py").write_text(source)
    ours = nnlint_lines("train.py", cwd=tmp_path)
    assert ours == flake8("train.py", cwd=tmp_path).stdout.splitlines()
    assert ours == []


def test_file_level_flake8_noqa_skips_the_file(tmp_path):
    (tmp_path / "train.py").write_text("# flake8: noqa\nimport torch\nm = torch.nn.Linear(1, 1)\n"
                                       "m.eval\n")
    assert nnlint_lines("train.py", cwd=tmp_path) == []
    assert flake8("train.py", cwd=tmp_path).stdout == ""


def test_plugin_uses_the_same_pyproject_table(tmp_path):
    (tmp_path / "pyproject.toml").write_text('[tool.nnlint]\nignore = ["NNL403"]\n')
    (tmp_path / "train.py").write_text("import torch\nm = torch.nn.Linear(1, 1)\nm.eval\n")
    assert nnlint_lines("train.py", cwd=tmp_path) == []
    assert flake8("train.py", cwd=tmp_path).stdout == ""


def test_plugin_leaves_syntax_errors_to_flake8(tmp_path):
    (tmp_path / "broken.py").write_text("import torch\ndef f(:\n")
    result = flake8("broken.py", cwd=tmp_path, select="NNL,E999")
    assert "E999" in result.stdout and "NNL" not in result.stdout
    assert "Traceback" not in result.stderr


def test_plugin_ignores_notebook_json_passed_by_filename(tmp_path):
    notebook = tmp_path / "review.ipynb"
    notebook.write_text('{"cells": [{"cell_type": "code", "source": "import torch\\nm.eval\\n'
                        'x.backward"}], "nbformat": 4, "metadata": {}}')
    result = flake8("--filename=*.ipynb", "review.ipynb", cwd=tmp_path, select="NNL")
    assert (result.stdout, "Traceback" in result.stderr) == ("", False)
