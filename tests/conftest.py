"""Test set-up: our own bugs raise instead of being reported (NNLINT_STRICT)."""
import os
import sys
from pathlib import Path

import pytest

os.environ["NNLINT_STRICT"] = "1"
ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
#: published standards documents (shared/standards/README.md); NNLINT_STANDARDS_DIR overrides
#: the default `../shared/standards` beside the project root, e.g. for a git worktree
SHARED_STANDARDS = Path(os.environ.get("NNLINT_STANDARDS_DIR")
                        or ROOT.parent / "shared" / "standards")


@pytest.fixture
def root() -> Path:
    return ROOT


def run_cli(*args: str, cwd: Path | None = None, env: dict | None = None):
    """Run `python -m nnlint` in a subprocess; returns CompletedProcess (text)."""
    import subprocess

    full_env = dict(os.environ)
    full_env.pop("NNLINT_STRICT", None)
    if env:
        full_env.update(env)
    return subprocess.run([sys.executable, "-m", "nnlint", *args], cwd=cwd or ROOT,
                          capture_output=True, text=True, env=full_env, timeout=300)
