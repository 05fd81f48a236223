"""`nnlint fix` on notebooks: cells rewritten line for line, every other JSON byte kept."""
import json
import shutil

import pytest

from nnlint.config import Settings, with_default_ignores
from nnlint.engine import check_file
from nnlint.fix import fix_file
from nnlint.notebooks import NotebookError, read_program, rewrite_cells
from tests.conftest import FIXTURES, run_cli

NOTEBOOK = FIXTURES / "notebooks" / "kestrel_delay_review.ipynb"
SETTINGS = with_default_ignores(Settings())


def document(*sources) -> dict:
    """nbformat 4 with one code cell per source (a str, or a list of line strings)."""
    return {"cells": [{"cell_type": "code", "execution_count": None, "metadata": {},
                       "outputs": [], "source": source} for source in sources],
            "metadata": {"kernelspec": {"language": "python", "name": "python3"}},
            "nbformat": 4, "nbformat_minor": 5}


def test_fixing_the_fixture_changes_exactly_the_two_source_lines(tmp_path):
    copy = tmp_path / NOTEBOOK.name
    shutil.copyfile(NOTEBOOK, copy)
    before = check_file(str(copy), SETTINGS).findings
    assert [(f.cell, f.line, f.fixable) for f in before] == [(4, 2, True), (6, 2, True)]
    result = run_cli("fix", NOTEBOOK.name, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "fixed 2 findings in 1 file; 0 remain" in result.stderr
    old, new = NOTEBOOK.read_text().splitlines(), copy.read_text().splitlines()
    assert len(old) == len(new)
    assert [(a, b) for a, b in zip(old, new) if a != b] == [
        ('    "    optimizer.zero_grad\\n",', '    "    optimizer.zero_grad()\\n",'),
        ('    "delay_net.eval\\n",', '    "delay_net.eval()\\n",')]
    assert copy.read_bytes().endswith(b"}\n") and NOTEBOOK.read_bytes().endswith(b"}\n")
    assert check_file(str(copy), SETTINGS).findings == []
    again = fix_file(str(copy), SETTINGS)
    assert not again.changed and again.messages == []


@pytest.mark.parametrize("indent, ensure_ascii, final_newline, crlf, bom", [
    (2, True, False, False, False),
    (4, False, True, True, False),
    (1, False, True, False, True),
])
def test_the_json_layout_of_the_file_is_kept(tmp_path, indent, ensure_ascii, final_newline,
                                             crlf, bom):
    # a string-form source with a last line that has no newline, and non-ASCII text
    source = "import torch\nnet = torch.nn.Linear(2, 2)  # Zürich depots\nnet.eval"
    text = json.dumps(document(source), indent=indent, ensure_ascii=ensure_ascii)
    text += "\n" if final_newline else ""
    text = text.replace("\n", "\r\n") if crlf else text
    data = ("\ufeff" if bom else "").encode() + text.encode("utf-8")
    path = tmp_path / "depot.ipynb"
    path.write_bytes(data)
    result = fix_file(str(path), SETTINGS)
    assert result.messages == [] and len(result.applied) == 1
    assert path.read_bytes() == data.replace(b"net.eval\"", b"net.eval()\"")


def test_a_layout_json_dumps_cannot_reproduce_is_left_alone(tmp_path):
    text = json.dumps(document(["import torch\n", "net = torch.nn.Linear(2, 2)\n",
                                "net.train\n"]), indent=3)
    path = tmp_path / "odd.ipynb"
    path.write_text(text)
    result = run_cli("fix", "odd.ipynb", cwd=tmp_path)
    assert result.returncode == 2
    assert "odd.ipynb: its JSON layout is not one nnlint can write back unchanged; " \
           "not fixed" in result.stderr
    assert path.read_text() == text


def program_of(*sources):
    data = json.dumps(document(*sources), indent=1).encode()
    return data, read_program(data)


def test_an_added_line_goes_after_the_line_before_it_in_that_cell():
    data, program = program_of(["import torch\n", "x = 1"], ["y = torch.log(x)\n"])
    fixed = program.text.replace("import torch\n", "import torch\nimport torch.nn as nn\n")
    written = json.loads(rewrite_cells(data, program, fixed))
    assert [cell["source"] for cell in written["cells"]] == [
        ["import torch\n", "import torch.nn as nn\n", "x = 1"], ["y = torch.log(x)\n"]]


def test_a_line_appended_after_a_last_line_without_newline_keeps_the_cell_ending():
    data, program = program_of("import torch\nx = 1", "y = 2\n")
    fixed = program.text.replace("x = 1\n", "x = 1\nz = 3\n")
    written = json.loads(rewrite_cells(data, program, fixed))
    assert [cell["source"] for cell in written["cells"]] == [
        "import torch\nx = 1\nz = 3", "y = 2\n"]


def test_changes_to_ipython_lines_or_across_cells_are_refused():
    data, program = program_of(["import torch\n", "%time step()\n"], ["x = 1\n"])
    assert program.text == "import torch\npass\nx = 1\n"
    with pytest.raises(NotebookError, match="touches IPython syntax"):
        rewrite_cells(data, program, "import torch\nstep()\nx = 1\n")
    with pytest.raises(NotebookError, match="spans two cells"):
        rewrite_cells(data, program, "import torch\nx = (1,\n2)\n")
