"""Test set-up: our own bugs raise instead of being reported (NNLINT_STRICT)."""
import os
import sys
from pathlib import Path

import pytest

os.environ["NNLINT_STRICT"] = "1"
ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
SHARED_STANDARDS = ROOT.parent / "shared" / "standards"


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
