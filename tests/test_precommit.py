"""The real `pre-commit try-repo` installs this checkout's hook and runs it on a project.

pre-commit builds the hook's own virtual environment from this checkout (it needs the
package index), so this test takes a minute or two. `try-repo` uses the checkout's HEAD plus
its staged and modified tracked files: a new, untracked `.pre-commit-hooks.yaml` is not seen.
"""
import json
import os
import re
import shutil
import subprocess
import sys

import pytest

from tests.conftest import ROOT

pytest.importorskip("pre_commit", reason="pre-commit is in the test extra: pip install .[test]")

#: generous: creating the hook environment downloads and installs libcst, flake8 and numpy
INSTALL_TIMEOUT_SECONDS = 900

HAZARD = "import torch\nroute_net = torch.nn.Linear(12, 4)\nroute_net.eval\n"
FIXED = "import torch\nroute_net = torch.nn.Linear(12, 4)\nroute_net.eval()\n"


def notebook(source: str) -> str:
    return json.dumps({"nbformat": 4, "nbformat_minor": 5,
                       "metadata": {"kernelspec": {"name": "python3", "language": "python"}},
                       "cells": [{"cell_type": "markdown", "metadata": {}, "source": ["# Depot"]},
                                 {"cell_type": "code", "metadata": {}, "outputs": [],
                                  "execution_count": None,
                                  "source": source.splitlines(keepends=True)}]})


def git(*args: str, cwd) -> str:
    result = subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True,
                            timeout=60)
    assert result.returncode == 0, result.stderr
    return result.stdout


def clean_environment(tmp_path) -> dict:
    environment = dict(os.environ)
    # the hook must run the nnlint pre-commit installed, not this checkout via PYTHONPATH
    for name in ("PYTHONPATH", "NNLINT_STRICT", "VIRTUAL_ENV"):
        environment.pop(name, None)
    environment["PRE_COMMIT_HOME"] = str(tmp_path / "pre-commit-home")
    environment.update(GIT_AUTHOR_NAME="Kestrel Dev", GIT_AUTHOR_EMAIL="dev@kestrel.invalid",
                       GIT_COMMITTER_NAME="Kestrel Dev",
                       GIT_COMMITTER_EMAIL="dev@kestrel.invalid")
    return environment


def try_repo(project, environment) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "pre_commit", "try-repo", str(ROOT), "nnlint", "--all-files",
         "--color", "never"],
        cwd=project, capture_output=True, text=True, env=environment,
        timeout=INSTALL_TIMEOUT_SECONDS)


@pytest.fixture
def checkout():
    if shutil.which("git") is None:
        pytest.skip("git is not installed")
    inside = subprocess.run(["git", "rev-parse", "--is-inside-work-tree"], cwd=ROOT,
                            capture_output=True, text=True)
    if inside.stdout.strip() != "true":
        pytest.skip(f"{ROOT} is not a git checkout, so pre-commit cannot use it as a repo")
    tracked = subprocess.run(["git", "ls-files", "--error-unmatch", ".pre-commit-hooks.yaml"],
                             cwd=ROOT, capture_output=True, text=True)
    assert tracked.returncode == 0, (".pre-commit-hooks.yaml is not tracked by git, so "
                                     "`pre-commit try-repo` cannot see it: git add it")
    return ROOT


def test_hook_fails_on_a_hazard_and_passes_once_fixed(checkout, tmp_path):
    project = tmp_path / "kestrel-depot"
    project.mkdir()
    environment = clean_environment(tmp_path)
    git("init", "-q", cwd=project)
    (project / "train_routes.py").write_text(HAZARD)
    (project / "depot_review.ipynb").write_text(notebook("route_net.train\n" + FIXED))
    (project / "notes.txt").write_text("route_net.eval\n")  # not Python: the hook skips it
    git("add", ".", cwd=project)

    failing = try_repo(project, environment)
    output = failing.stdout + failing.stderr
    assert failing.returncode == 1, output
    assert "nnlint" in output and "Failed" in output, output
    assert ("train_routes.py:3:1: NNL403 `route_net.eval` is only read, never called: "
            "the model stays in training mode; write `route_net.eval()`") in output
    assert "depot_review.ipynb:cell 2:1:1: NNL403 `route_net.train`" in output, output
    assert "notes.txt" not in output

    (project / "train_routes.py").write_text(FIXED)
    (project / "depot_review.ipynb").write_text(notebook(FIXED))
    git("add", ".", cwd=project)
    passing = try_repo(project, environment)
    output = passing.stdout + passing.stderr
    assert passing.returncode == 0, output
    assert "NNL403" not in output
    assert "Passed" in output, output


def readme_block(name: str) -> str:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    block = re.search(rf"<!-- {name}:start -->\s*```yaml\n(.*?)```", readme, re.S)
    assert block, f"README.md lacks the {name} block between its markers"
    return block.group(1)


def test_readme_remote_snippet_is_a_valid_config_for_this_hook(tmp_path):
    from pre_commit.clientlib import load_config, load_manifest

    config_file = tmp_path / ".pre-commit-config.yaml"
    config_file.write_text(readme_block("pre-commit-remote"))
    config = load_config(str(config_file))
    hook_ids = {hook["id"] for hook in load_manifest(str(ROOT / ".pre-commit-hooks.yaml"))}
    assert [hook["id"] for hook in config["repos"][0]["hooks"]] == ["nnlint"]
    assert hook_ids == {"nnlint"}


def test_readme_local_snippet_runs_the_installed_nnlint(tmp_path):
    if shutil.which("git") is None:
        pytest.skip("git is not installed")
    project = tmp_path / "kestrel-depot"
    project.mkdir()
    environment = clean_environment(tmp_path)
    # a `language: system` hook runs the nnlint of the committing environment: this one
    environment["PATH"] = os.pathsep.join([os.path.dirname(sys.executable),
                                           environment.get("PATH", "")])
    if os.environ.get("PYTHONPATH"):
        environment["PYTHONPATH"] = os.environ["PYTHONPATH"]
    git("init", "-q", cwd=project)
    (project / ".pre-commit-config.yaml").write_text(readme_block("pre-commit-local"))
    (project / "train_routes.py").write_text(HAZARD)
    git("add", ".", cwd=project)
    command = [sys.executable, "-m", "pre_commit", "run", "--all-files", "--color", "never"]
    failing = subprocess.run(command, cwd=project, capture_output=True, text=True,
                             env=environment, timeout=300)
    assert failing.returncode == 1, failing.stdout + failing.stderr
    assert "train_routes.py:3:1: NNL403 `route_net.eval`" in failing.stdout
    (project / "train_routes.py").write_text(FIXED)
    git("add", ".", cwd=project)
    passing = subprocess.run(command, cwd=project, capture_output=True, text=True,
                             env=environment, timeout=300)
    assert passing.returncode == 0, passing.stdout + passing.stderr
