"""The result cache: same output warm and cold, invalidated by content, dependencies and
settings, atomic, and never writing through symlinks."""
import os

from nnlint.cache import FOLDER_NAME, ResultCache
from nnlint.config import Settings, with_default_ignores
from nnlint.runner import run_paths
from tests.conftest import run_cli

HAZARD = "import torch\nm = torch.nn.Linear(1, 1)\nm.eval\n"


def test_warm_run_prints_the_same_and_writes_entries(tmp_path):
    (tmp_path / "train.py").write_text(HAZARD)
    cold = run_cli("check", ".", cwd=tmp_path)
    entries = sorted(p.name for p in (tmp_path / FOLDER_NAME).iterdir())
    assert "CACHEDIR.TAG" in entries and ".gitignore" in entries
    assert len([name for name in entries if name.endswith(".json")]) == 1
    warm = run_cli("check", ".", cwd=tmp_path)
    assert (warm.returncode, warm.stdout, warm.stderr) == (cold.returncode, cold.stdout,
                                                           cold.stderr)


def test_no_cache_neither_reads_nor_writes(tmp_path):
    (tmp_path / "train.py").write_text(HAZARD)
    run_cli("check", "--no-cache", ".", cwd=tmp_path)
    assert not (tmp_path / FOLDER_NAME).exists()


def test_changed_content_and_changed_settings_miss(tmp_path):
    train = tmp_path / "train.py"
    train.write_text(HAZARD)
    settings = with_default_ignores(Settings(root=str(tmp_path)))
    first = run_paths([str(train)], settings, jobs=1, use_cache=True).findings
    train.write_text(HAZARD.replace("m.eval\n", "m.eval()\n"))
    assert run_paths([str(train)], settings, jobs=1, use_cache=True).findings == []
    train.write_text(HAZARD)
    assert run_paths([str(train)], settings, jobs=1, use_cache=True).findings == first
    ignoring = with_default_ignores(Settings(root=str(tmp_path), ignore=("NNL403",)))
    assert run_paths([str(train)], ignoring, jobs=1, use_cache=True).findings == []


def test_entry_is_invalidated_when_a_consulted_module_changes(tmp_path):
    cache = ResultCache(str(tmp_path), "key")
    dependency = tmp_path / "models.py"
    dependency.write_text("import torch\n")
    from nnlint.analysis.project import content_hash

    cache.put("train.py", b"data", [], {str(dependency): content_hash(dependency.read_bytes())})
    assert cache.get("train.py", b"data") == []
    dependency.write_text("import torch\nclass Net(torch.nn.Module):\n    pass\n")
    assert cache.get("train.py", b"data") is None


def test_symlinked_cache_folder_is_not_used(tmp_path):
    outside = tmp_path / "outside"
    outside.mkdir()
    project = tmp_path / "project"
    project.mkdir()
    (project / FOLDER_NAME).symlink_to(outside, target_is_directory=True)
    (project / "train.py").write_text(HAZARD)
    result = run_cli("check", ".", cwd=project)
    assert result.returncode == 1
    assert os.listdir(outside) == []


def test_entries_are_written_atomically_and_not_through_symlinks(tmp_path):
    cache = ResultCache(str(tmp_path), "key")
    assert cache.folder is not None
    victim = tmp_path / "victim.txt"
    victim.write_text("keep me")
    from nnlint.analysis.project import content_hash

    name = cache._entry_name("train.py", content_hash(b"x"))
    # a planted symlink at the entry's temporary name must not be written through
    planted = cache.folder / f".{name}.{os.getpid()}.tmp"
    planted.symlink_to(victim)
    cache.put("train.py", b"x", [], {})
    assert victim.read_text() == "keep me"
    leftovers = [p for p in cache.folder.iterdir() if p.name.endswith(".tmp")]
    assert leftovers == [planted]
    assert not (cache.folder / name).exists()  # the write was refused, not redirected


def test_a_fully_cached_run_imports_neither_the_parser_nor_the_rules(tmp_path):
    # what keeps a warm re-run fast (issue 9: warm/cold <= 0.05) is not importing libcst,
    # numpy or the rule modules at all when every file's result is in the cache
    import subprocess
    import sys

    (tmp_path / "train.py").write_text(HAZARD)
    assert run_cli("check", ".", cwd=tmp_path).returncode == 1
    probe = ("import sys\nfrom nnlint.cli import main\nstatus = main(['check', '.'])\n"
             "heavy = [name for name in ('libcst', 'numpy', 'nnlint.rules', 'nnlint.engine')\n"
             "         if name in sys.modules]\n"
             "print(status, heavy, file=sys.stderr)\n")
    warm = subprocess.run([sys.executable, "-c", probe], cwd=tmp_path, capture_output=True,
                          text=True, timeout=120)
    assert warm.stderr.strip().splitlines()[-1] == "1 []", warm.stderr
    assert "NNL403" in warm.stdout
    (tmp_path / "train.py").write_text(HAZARD + "m.train\n")  # a miss imports them, once
    cold = subprocess.run([sys.executable, "-c", probe], cwd=tmp_path, capture_output=True,
                          text=True, timeout=120)
    assert "'libcst'" in cold.stderr.strip().splitlines()[-1], cold.stderr
