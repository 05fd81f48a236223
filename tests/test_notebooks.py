"""Notebooks: cells joined in order, IPython syntax neutralised in place, findings mapped back."""
import json
import os
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from nnlint.config import Settings, with_default_ignores
from nnlint.engine import check_file
from nnlint.files import discover
from nnlint.notebooks import _NEWLINE, check_notebook, python_lines, read_program
from tests.conftest import FIXTURES, run_cli

NOTEBOOK = FIXTURES / "notebooks" / "kestrel_delay_review.ipynb"
#: written out by hand from the fixture: (cell index among all cells, line in cell, column)
NOTEBOOK_HAZARDS = [(4, 2, 5, "optimizer.zero_grad"), (6, 2, 1, "delay_net.eval")]


def notebook(*cells, language: str | None = "python", version=4) -> str:
    """nbformat 4 JSON; a cell is ("code" | "markdown", text)."""
    metadata = {} if language is None else {"kernelspec": {"name": "k", "language": language}}
    return json.dumps({
        "nbformat": version, "nbformat_minor": 5, "metadata": metadata,
        "cells": [{"cell_type": kind, "metadata": {}, "source": text.splitlines(keepends=True),
                   **({"outputs": [], "execution_count": None} if kind == "code" else {})}
                  for kind, text in cells],
    })


def findings_of(tmp_path: Path, text: str, name: str = "review.ipynb"):
    path = tmp_path / name
    path.write_text(text)
    settings = with_default_ignores(Settings(root=str(tmp_path)))
    return check_file(str(path), settings)


# --- IPython syntax, line for line -------------------------------------------------------

@pytest.mark.parametrize("line", [
    "%matplotlib inline",
    "%time train_one_epoch()",
    "!pip install kestrel-scans",
    "scan_files = !ls depot/",
    "timing, other = %timeit -o step()",
    "delay_net.eval?",
    "delay_net.eval??  # what does it do",
    "?optimizer",
    "??optimizer.step",
])
def test_ipython_lines_become_a_placeholder(line):
    assert python_lines(line + "\n") == ["pass"]


def test_placeholder_keeps_the_indentation_of_the_magic():
    source = "with torch.no_grad():\n    %time scores = delay_net(batch)\n"
    assert python_lines(source) == ["with torch.no_grad():", "    pass"]


@pytest.mark.parametrize("source", [
    "share = (parcels\n         % depots)\n",            # modulo continuing a bracket
    "share = parcels \\\n    % depots\n",              # modulo after a backslash
    'note = """sorted\n!not a shell escape\n"""\n',     # inside a triple-quoted string
    'question = "late?"\n',                             # `?` inside a string
    "rate = 0.2  # drop rate?\n",                       # `?` inside a comment
    'doc = """is this late?\nyes"""\n',                 # string left open on a `?`
    "ratio = hits % total\n",
    "if seen != total:\n    pass\n",
])
def test_python_is_left_alone(source):
    assert python_lines(source) == source.splitlines()


def test_a_shell_cell_magic_blanks_the_whole_cell():
    assert python_lines('%%bash\necho "synced"\nls -l\n') == ["", "", ""]


def test_a_timing_cell_magic_keeps_its_python_body():
    assert python_lines("%%time\ndelay_net.eval\n") == ["", "delay_net.eval"]


def test_line_map_counts_all_cells_and_lines_inside_each():
    text = notebook(("markdown", "# Depot\n"), ("code", "import torch\n\nx = 1\n"),
                    ("markdown", "more\n"), ("code", "%time y = 2\ny = 3"))
    program = read_program(text.encode())
    assert program.text == "import torch\n\nx = 1\npass\ny = 3\n"
    assert program.line_map == ((1, 1), (1, 2), (1, 3), (3, 1), (3, 2))


def test_a_cell_marked_as_another_language_is_left_out():
    document = json.loads(notebook(("code", "import torch\n"), ("code", "SELECT 1;\n"),
                                   ("code", "model.eval\n")))
    document["cells"][1]["metadata"] = {"vscode": {"languageId": "sql"}}
    document["cells"][2]["metadata"] = {"vscode": {"languageId": "python"}}
    program = read_program(json.dumps(document).encode())
    assert program.text == "import torch\nmodel.eval\n"
    assert program.line_map == ((0, 1), (2, 1))


def test_a_byte_order_mark_is_accepted():
    program = read_program(b"\xef\xbb\xbf" + notebook(("code", "import torch\n")).encode())
    assert program.text == "import torch\n"


def test_string_source_and_crlf_lines_are_read():
    document = json.loads(notebook(("code", "")))
    document["cells"][0]["source"] = "import torch\r\nmodel.eval\r\n"
    program = read_program(json.dumps(document).encode())
    assert program.text == "import torch\nmodel.eval\n"


# --- findings ----------------------------------------------------------------------------

def test_fixture_notebook_findings_name_cell_and_line():
    result = check_file(str(NOTEBOOK), with_default_ignores(Settings(root=str(FIXTURES))))
    got = [(f.cell, f.line, f.column, f.code) for f in result.findings]
    assert got == [(cell, line, column, "NNL403") for cell, line, column, _ in NOTEBOOK_HAZARDS]
    assert [f.end_line for f in result.findings] == [2, 2]


def test_fixture_notebook_text_output():
    result = run_cli("check", "notebooks", cwd=FIXTURES)
    assert result.returncode == 1 and result.stderr == ""
    # text counts cells from 1 (README "Notebooks"): index 4 is "cell 5"
    assert result.stdout.splitlines() == [
        "notebooks/kestrel_delay_review.ipynb:cell 5:2:5: NNL403 `optimizer.zero_grad` is only "
        "read, never called: gradients are never reset and keep accumulating; write "
        "`optimizer.zero_grad()` (fixable)",
        "notebooks/kestrel_delay_review.ipynb:cell 7:2:1: NNL403 `delay_net.eval` is only read, "
        "never called: the model stays in training mode; write `delay_net.eval()` (fixable)",
    ]


def test_fixture_notebook_json_output():
    result = run_cli("check", "--format", "json", "notebooks", cwd=FIXTURES)
    assert result.returncode == 1
    got = [(item["cell"], item["line"], item["column"], item["end_column"], item["path"])
           for item in json.loads(result.stdout)]
    path = "notebooks/kestrel_delay_review.ipynb"
    assert got == [(4, 2, 5, 5 + len("optimizer.zero_grad"), path),
                   (6, 2, 1, 1 + len("delay_net.eval"), path)]


def test_a_name_from_an_earlier_cell_counts_and_noqa_works_in_a_cell(tmp_path):
    result = findings_of(tmp_path, notebook(
        ("code", "import torch\n"),
        ("code", "model = torch.nn.Linear(2, 2)\n"),
        ("code", "model.train  # noqa: NNL403\nmodel.eval\n")))
    assert [(f.cell, f.line, f.column) for f in result.findings] == [(2, 2, 1)]


@pytest.mark.parametrize("broken, line, column, detail", [
    ("scores = delay_net(\n", 1, 19, "'(' was never closed"),
    ('note = """depot\nscans\n', 1, 8, "unterminated triple-quoted string literal "
                                       "(detected at line 2)"),
])
def test_a_cell_left_open_is_reported_there_and_does_not_swallow_the_next(
        tmp_path, broken, line, column, detail):
    result = findings_of(tmp_path, notebook(("code", "import torch\n"), ("code", broken),
                                            ("code", ")\nmodel.eval\n")))
    assert [(f.code, f.cell, f.line, f.column, f.message) for f in result.findings] == [
        ("NNL001", 1, line, column, f"syntax error: {detail}; nothing else in this file was "
                                    f"checked")]


def test_a_block_header_ending_a_cell_is_reported_in_that_cell(tmp_path):
    result = findings_of(tmp_path, notebook(("code", "import torch\nfor batch in []:\n"),
                                            ("code", "model.eval\n")))
    assert [(f.code, f.cell, f.line) for f in result.findings] == [("NNL001", 0, 2)]
    assert result.findings[0].message.startswith("syntax error: expected an indented block")


def test_a_syntax_error_is_reported_in_its_cell(tmp_path):
    result = findings_of(tmp_path, notebook(("code", "import torch\n"), ("markdown", "x"),
                                            ("code", "x = 1\ndef broken(:\n")))
    assert [(f.cell, f.line, f.code) for f in result.findings] == [(2, 2, "NNL001")]


@pytest.mark.parametrize("text, line, column, detail", [
    ("", 1, 1, "notebook is not valid JSON: Expecting value"),
    ('{"nbformat": 4,\n "cells": [', 2, 12, "notebook is not valid JSON: Expecting value"),
    ("[" * 100_000, 1, 1, "notebook JSON is nested too deeply to read"),
    ("[]", 1, 1, "notebook JSON is not an object"),
    ('{"nbformat": 3, "worksheets": []}', 1, 1,
     "nbformat 3 is not supported (only nbformat 4); open and save the notebook in a current "
     "Jupyter to upgrade it"),
    ('{"nbformat": 4}', 1, 1, "notebook has no `cells` array"),
    ('{"nbformat": 4, "cells": [{"cell_type": "code", "source": 7}]}', 1, 1,
     "cell 0: `source` is neither a string nor a list of strings"),
])
def test_a_broken_notebook_is_one_parse_error_finding(tmp_path, text, line, column, detail):
    result = findings_of(tmp_path, text)
    assert [(f.code, f.cell, f.line, f.column, f.message) for f in result.findings] == [
        ("NNL001", None, line, column, f"{detail}; nothing else in this file was checked")]


def test_a_notebook_too_large_to_read_is_a_parse_error():
    result = check_notebook("huge.ipynb", 70 << 20, with_default_ignores(Settings()))
    assert [(f.code, f.message) for f in result.findings] == [
        ("NNL001", "notebook is 70.0 MiB, over the 64 MiB limit; nothing else in this file "
                   "was checked")]


def test_a_notebook_with_more_code_than_a_file_may_hold_is_a_parse_error(tmp_path):
    # 1 MiB is the engine's per-file limit (engine.MAX_FILE_BYTES)
    result = findings_of(tmp_path, notebook(("code", "import torch\n" + "x = 1\n" * 200_000)))
    assert [(f.code, f.message.split(";")[0]) for f in result.findings] == [
        ("NNL001", "code cells hold 1.1 MiB of code, over the 1 MiB limit for one file")]


def test_outputs_do_not_count_against_the_code_limit(tmp_path):
    document = json.loads(notebook(("code", "import torch\nmodel.eval\n")))
    document["cells"][0]["outputs"] = [{"output_type": "display_data", "metadata": {},
                                        "data": {"image/png": "A" * (2 << 20)}}]
    result = findings_of(tmp_path, json.dumps(document))
    assert [(f.code, f.cell, f.line) for f in result.findings] == [("NNL403", 0, 2)]


def test_not_utf8_notebook_is_a_parse_error(tmp_path):
    path = tmp_path / "latin.ipynb"
    path.write_bytes(b'{"nbformat": 4, "cells": [], "x": "\xe9"}')
    result = check_file(str(path), with_default_ignores(Settings(root=str(tmp_path))))
    assert [f.message.split(";")[0] for f in result.findings] == [
        "notebook is not UTF-8 text (byte 35)"]


def test_other_kernels_are_skipped_with_a_note_and_the_run_goes_on(tmp_path):
    (tmp_path / "depots.ipynb").write_text(notebook(("code", "library(torch)\nm$eval\n"),
                                                    language="R"))
    (tmp_path / "broken.ipynb").write_text("{not json")
    (tmp_path / "train.py").write_text("import torch\nmodel = torch.nn.Linear(2, 2)\n")
    result = run_cli("check", ".", cwd=tmp_path)
    assert result.stderr == "nnlint: depots.ipynb: kernel language 'R' is not Python; " \
                            "notebook skipped\n"
    assert result.stdout == ("broken.ipynb:1:2: NNL001 notebook is not valid JSON: Expecting "
                             "property name enclosed in double quotes; nothing else in this "
                             "file was checked\n")
    assert result.returncode == 1


def test_cached_runs_repeat_cells_and_notes(tmp_path):
    (tmp_path / "review.ipynb").write_text(notebook(("markdown", "# Depot"),
                                                    ("code", "import torch\nmodel.eval\n")))
    (tmp_path / "depots.ipynb").write_text(notebook(("code", "m$eval\n"), language="julia"))
    first = run_cli("check", ".", cwd=tmp_path)
    second = run_cli("check", ".", cwd=tmp_path)
    assert first.stdout.startswith("review.ipynb:cell 2:2:1: NNL403 ")
    assert first.stderr == "nnlint: depots.ipynb: kernel language 'julia' is not Python; " \
                           "notebook skipped\n"
    assert (second.returncode, second.stdout, second.stderr) == (1, first.stdout, first.stderr)


def test_a_clean_notebook_exits_0(tmp_path):
    (tmp_path / "ok.ipynb").write_text(notebook(("code", "import torch\n"),
                                                ("code", "%env CUDA_VISIBLE_DEVICES=\n"),
                                                language=None))
    result = run_cli("check", ".", cwd=tmp_path)
    assert (result.returncode, result.stdout, result.stderr) == (0, "", "")


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0,
                    reason="needs a POSIX user who cannot read a chmod 000 file")
def test_an_unreadable_notebook_is_named_on_stderr(tmp_path):
    path = tmp_path / "locked.ipynb"
    path.write_text(notebook(("code", "import torch\n")))
    path.chmod(0)
    result = run_cli("check", "locked.ipynb", cwd=tmp_path)
    assert result.returncode == 2
    assert result.stderr == "nnlint: locked.ipynb: cannot read: Permission denied\n"


def test_folders_yield_notebooks_beside_python_files(tmp_path):
    for name in ("a.py", "b.ipynb", "c.txt", ".hidden/d.ipynb"):
        (tmp_path / name).parent.mkdir(exist_ok=True)
        (tmp_path / name).write_text("")
    found = [Path(path).name for path in discover([str(tmp_path)])]
    assert found == ["a.py", "b.ipynb"]


JSON_SCALARS = st.none() | st.booleans() | st.integers() | st.text(max_size=8)
JSON_VALUES = st.recursive(JSON_SCALARS, lambda inner: st.lists(inner, max_size=3)
                           | st.dictionaries(st.text(max_size=6), inner, max_size=3),
                           max_leaves=8)
#: pieces of real cells, so the fuzzed programs reach the parser and the rules
CELL_LINES = ["import torch", "model.eval", "model.eval?", "%time model.eval", "!ls",
              "%%bash", "%%time", "files = !ls", "x = (", ")", '"""', "'", "\\", "if x:",
              "    model.train", "  %matplotlib inline", "# noqa", "\r", ""]
CELLS = st.fixed_dictionaries({
    "cell_type": st.sampled_from(["code", "markdown", "raw"]) | JSON_SCALARS,
    "source": st.lists(st.sampled_from(CELL_LINES), max_size=6).map("\n".join)
    | st.lists(st.sampled_from(CELL_LINES).map(lambda line: line + "\n"), max_size=6)
    | st.text(alphabet="%!?()[]'\"#\\ \nab=:.", max_size=40) | JSON_VALUES,
    "metadata": JSON_VALUES,
})


@settings(max_examples=200, deadline=None)
@given(st.fixed_dictionaries({"nbformat": st.just(4) | JSON_SCALARS,
                              "metadata": JSON_VALUES,
                              "cells": st.lists(CELLS, max_size=4) | JSON_VALUES}))
def test_no_notebook_json_makes_a_traceback(document):
    data = json.dumps(document).encode()
    result = check_notebook("fuzzed.ipynb", data, with_default_ignores(Settings()))
    for finding in result.findings:
        assert finding.line >= 1 and finding.column >= 1
        assert finding.cell is None or 0 <= finding.cell < len(document["cells"])


#: lines that keep a cell parseable, weighted so that most fuzzed notebooks reach the rules
SAFE_LINES = ["model.eval", "model.eval?", "%time model.eval", "!ls", "files = !ls",
              "  %matplotlib inline", "# noqa", "", "model.train  # noqa", "x = 1 % 2"]
#: a line holding only a backslash shifts libcst's positions of later statements by one line
#: (libcst 1.9 PositionProvider, in .py files too); that is libcst's to fix, so the position
#: check below leaves such lines out
POSITION_LINES = [line for line in CELL_LINES if line != "\\"]
CODE_CELLS = st.lists(st.sampled_from(SAFE_LINES * 6 + POSITION_LINES), max_size=8).map(
    lambda lines: {"cell_type": "code", "metadata": {}, "source": "\n".join(lines)})


@settings(max_examples=200, deadline=None)
@given(st.lists(CODE_CELLS, min_size=1, max_size=4).map(
    lambda cells: [{"cell_type": "code", "metadata": {}, "source": "import torch"}] + cells))
def test_fuzzed_cells_map_every_finding_into_its_cell(cells):
    data = json.dumps({"nbformat": 4, "metadata": {}, "cells": cells}).encode()
    result = check_notebook("fuzzed.ipynb", data, with_default_ignores(Settings()))
    for finding in result.findings:
        cell_lines = _NEWLINE.split(cells[finding.cell]["source"])
        assert 1 <= finding.line <= len(cell_lines), finding
        if finding.code == "NNL403":  # the reported expression is in that cell, at that line
            # (libcst places a statement that follows a lone backslash line on the
            # backslash's line, in .py files too, so the span extends over continuations)
            assert finding.end_line is not None, finding
            last = finding.end_line
            while last < len(cell_lines) and cell_lines[last - 1].endswith("\\"):
                last += 1
            assert "model." in "\n".join(cell_lines[finding.line - 1:last]), finding
