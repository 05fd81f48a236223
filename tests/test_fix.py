"""`nnlint fix`: only the intended bytes change, idempotent, atomic, careful with the disk."""
import os
import shutil
import stat

import pytest

from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import check_file
from nnlint.fix import fix_file, fix_text, write_atomically
from tests.conftest import FIXTURES, run_cli

SETTINGS = with_default_ignores(Settings())
SOURCE = (
    "import torch  # the framework\n"
    "\n"
    "model = torch.nn.Linear(2, 2)\n"
    "model.eval   # switch before scoring\n"
    "opt = torch.optim.SGD(model.parameters(), lr=0.1)\n"
    "opt.zero_grad  # noqa: NNL403\n"
    "(model).train\n"
)


def test_fix_changes_only_the_intended_bytes_and_keeps_noqa():
    fixed, applied, remaining = fix_text(SOURCE, "x.py", SETTINGS)
    assert fixed == SOURCE.replace("model.eval   #", "model.eval()   #").replace(
        "(model).train\n", "(model).train()\n")
    assert [(f.line, f.code) for f in applied] == [(4, "NNL403"), (7, "NNL403")]
    assert remaining == []


def test_fix_is_idempotent():
    once, _, _ = fix_text(SOURCE, "x.py", SETTINGS)
    twice, applied, _ = fix_text(once, "x.py", SETTINGS)
    assert twice == once and applied == []


def test_crlf_line_endings_bom_and_permissions_are_kept(tmp_path):
    path = tmp_path / "train.py"
    path.write_bytes(b"\xef\xbb\xbf" + SOURCE.replace("\n", "\r\n").encode())
    os.chmod(path, 0o750)
    result = fix_file(str(path), SETTINGS)
    assert result.changed and not result.messages
    data = path.read_bytes()
    assert data.startswith(b"\xef\xbb\xbf")
    assert b"model.eval()   # switch before scoring\r\n" in data
    assert data.count(b"\r\n") == SOURCE.count("\n") and b"\n\n" not in data
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o750
    assert [p.name for p in tmp_path.iterdir()] == ["train.py"]  # no temporary file left


def test_latin1_file_is_written_back_in_its_encoding(tmp_path):
    path = tmp_path / "depot.py"
    text = ("# -*- coding: latin-1 -*-\nimport torch\nville = 'Orléans'\n"
            "m = torch.nn.Linear(1, 1)\nm.eval\n")
    path.write_bytes(text.encode("latin-1"))
    fix_file(str(path), SETTINGS)
    assert path.read_bytes() == text.replace("m.eval\n", "m.eval()\n").encode("latin-1")


def test_a_file_changed_on_disk_is_not_written(tmp_path):
    path = tmp_path / "train.py"
    path.write_text(SOURCE)
    original = path.read_bytes()
    path.write_text(SOURCE + "# edited meanwhile\n")
    message = write_atomically(str(path), original, "replaced\n")
    assert message == f"nnlint: {path}: changed on disk while being fixed; not written"
    assert path.read_text() == SOURCE + "# edited meanwhile\n"


def test_diff_writes_nothing_and_exits_1(tmp_path):
    path = tmp_path / "train.py"
    path.write_text(SOURCE)
    result = run_cli("fix", "--diff", "train.py", cwd=tmp_path)
    assert result.returncode == 1
    assert path.read_text() == SOURCE
    assert result.stdout.startswith("--- a/train.py\n+++ b/train.py\n")
    assert "-model.eval   # switch before scoring\n+model.eval()   # switch before scoring\n" \
        in result.stdout
    assert result.stderr == "nnlint: would fix 2 findings in 1 file; 0 remain\n"


def test_fix_command_then_check_is_clean(tmp_path):
    path = tmp_path / "train.py"
    path.write_text(SOURCE)
    result = run_cli("fix", "train.py", cwd=tmp_path)
    assert (result.returncode, result.stdout) == (0, "")
    assert result.stderr == "nnlint: fixed 2 findings in 1 file; 0 remain\n"
    assert run_cli("check", "train.py", cwd=tmp_path).returncode == 0


FIXABLE_FIXTURES = [path for path in sorted((FIXTURES / "rules").rglob("*.py"))
                    if any(f.fixable for f in check_file(str(path), SETTINGS).findings)]


def test_some_fixtures_have_fixable_findings():
    assert FIXABLE_FIXTURES


@pytest.mark.parametrize("fixture", FIXABLE_FIXTURES,
                         ids=lambda p: str(p.relative_to(FIXTURES)))
def test_each_fix_removes_its_finding_and_adds_none(tmp_path, fixture):
    copy = tmp_path / fixture.name
    shutil.copyfile(fixture, copy)
    before = check_file(str(copy), SETTINGS, ProjectIndex(SETTINGS)).findings
    result = fix_file(str(copy), SETTINGS, ProjectIndex(SETTINGS))
    after = check_file(str(copy), SETTINGS, ProjectIndex(SETTINGS)).findings
    assert result.changed
    assert all(not finding.fixable for finding in after)
    before_unfixable = [(f.code, f.message) for f in before if not f.fixable]
    assert sorted((f.code, f.message) for f in after) == sorted(before_unfixable)
    original_lines = fixture.read_text().splitlines()
    fixed_lines = _without_added_imports(original_lines, copy.read_text().splitlines())
    assert len(original_lines) == len(fixed_lines)
    changed = {number for number, (old, new) in enumerate(zip(original_lines, fixed_lines), 1)
               if old != new}
    assert changed == {f.line for f in before if f.fixable}


def _without_added_imports(original_lines, fixed_lines):
    """`fixed_lines` less the import lines a fix added (Fix.imports), so the rest lines up.

    An added import is a new top-level `import`/`from` line placed right after the original
    ones or the docstring: lines before it are unchanged, so removing it restores numbering.
    """
    added = [index for index, line in enumerate(fixed_lines)
             if line.startswith(("import ", "from ")) and line not in original_lines]
    if added:
        first = added[0]
        assert fixed_lines[:first] == original_lines[:first]  # nothing above them moved
        assert added == list(range(first, first + len(added)))  # one block
    return [line for index, line in enumerate(fixed_lines) if index not in added]


def test_fixing_a_copy_of_the_demo_leaves_only_unfixable_findings(tmp_path):
    demo = tmp_path / "demo"
    shutil.copytree(FIXTURES / "demo", demo)
    before = run_cli("check", "--no-cache", ".", cwd=demo).stdout.splitlines()
    result = run_cli("fix", ".", cwd=demo)
    assert result.returncode in (0, 1)
    after = run_cli("check", "--no-cache", ".", cwd=demo).stdout.splitlines()
    unfixable = [line for line in before if not line.endswith(" (fixable)")]
    # nothing new appears; a finding that the fixed bug caused may go with it (fixing
    # `damage_net.eval` also ends the evaluation in training mode, NNL401)
    assert set(after) <= set(unfixable)
    assert [line for line in unfixable if line not in after] == [
        line for line in unfixable if " NNL401 " in line and "damage_net" in line]
    fixed_lines = {(line.split(":")[0], int(line.split(":")[1])) for line in before
                   if line.endswith(" (fixable)")}
    changed = set()
    for original in sorted((FIXTURES / "demo").rglob("*.py")):
        relative = original.relative_to(FIXTURES / "demo")
        old, new = original.read_text().splitlines(), (demo / relative).read_text().splitlines()
        assert len(old) == len(new)
        changed |= {(str(relative), number) for number, (a, b) in enumerate(zip(old, new), 1)
                    if a != b}
    assert changed == fixed_lines


def test_rules_declare_their_rewrite_exactly_when_their_findings_are_fixable():
    from nnlint.rules.base import all_rules

    fixable_codes = {finding.code for path in FIXABLE_FIXTURES
                     for finding in check_file(str(path), SETTINGS).findings if finding.fixable}
    declared = {rule.code for rule in all_rules() if rule.rewrite}
    assert fixable_codes == declared


@pytest.mark.parametrize("source, expected", [
    # after the last import of the top block, not between later definitions
    ('"""Doc."""\nimport torch\nimport numpy as np\n\nX = 1\n',
     '"""Doc."""\nimport torch\nimport numpy as np\nimport torch.nn.functional as F\n\nX = 1\n'),
    # no import before the first definition: after the docstring
    ('"""Doc."""\n\ndef f():\n    import torch\n',
     '"""Doc."""\nimport torch.nn.functional as F\n\ndef f():\n    import torch\n'),
    # already there (other spacing before it): nothing added
    ('import torch\n\n\nimport torch.nn.functional as F\n',
     'import torch\n\n\nimport torch.nn.functional as F\n'),
])
def test_imports_a_fix_needs_are_added_once_after_the_import_block(source, expected):
    import libcst as cst

    from nnlint.edits import with_imports

    imports = ["import torch.nn.functional as F", "import torch.nn.functional as F"]
    assert with_imports(cst.parse_module(source), imports).code == expected


@pytest.mark.parametrize("source", [
    '"""Doc."""\nimport torch  # framework\n\nscores = torch.log(torch.sigmoid(x))\n',
    "import torch\nimport torch.nn.functional as F\nscores = torch.log(torch.sigmoid(x))\n",
    "import torch\n\n\ndef score(x):\n    return torch.log(\n        torch.sigmoid(x))\n",
])
def test_text_edits_of_a_fix_make_the_same_text_as_the_tree_rewrite(source):
    # SARIF carries fixes as text edits; applied, they must give what `nnlint fix` writes
    import libcst as cst
    from libcst.metadata import MetadataWrapper, PositionProvider

    from nnlint.edits import apply_edits, edits_of, with_imports
    from nnlint.fix import _Replacer
    from nnlint.rules.base import Fix

    module = cst.parse_module(source)
    positions = MetadataWrapper(module, unsafe_skip_copy=True).resolve(PositionProvider)
    target = next(node for node in positions if isinstance(node, cst.Call)
                  and module.code_for_node(node.func) == "torch.log")
    fix = Fix(target, cst.parse_expression("F.logsigmoid(x)"),
              imports=("import torch.nn.functional as F",))
    tree = with_imports(module.visit(_Replacer({id(target): fix.replacement})), list(fix.imports))
    assert apply_edits(source, edits_of(fix, module, positions)) == tree.code
    assert "F.logsigmoid(x)" in tree.code and tree.code.count("import torch.nn.functional") == 1


def test_findings_with_one_message_are_counted_one_by_one():
    # one message twice, one finding fixable: after fixing, one remains, so one was fixed
    from nnlint.finding import Finding, Severity
    from nnlint.fix import _fixed_findings

    def finding(line, fixable):
        return Finding("x.py", None, line, 1, "NNL602", "n", Severity.WARNING,
                       "`total` keeps graphs", fixable=fixable)

    fixable, unfixable = finding(4, True), finding(9, False)
    assert _fixed_findings([fixable, unfixable], [finding(9, False)]) == [fixable]
    assert _fixed_findings([fixable, unfixable], [finding(4, True), finding(9, False)]) == []
    assert _fixed_findings([fixable, finding(6, True)], []) == [fixable, finding(6, True)]
