"""Progress display: only on a terminal, never under CI or in pipes, erased when done."""
import io

import pytest

from nnlint.cli import Progress


class FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.fixture
def no_delay(monkeypatch):
    monkeypatch.setattr(Progress, "DELAY", 0.0)
    monkeypatch.delenv("CI", raising=False)


def test_shown_on_a_terminal_and_erased(no_delay):
    stream = FakeTerminal()
    progress = Progress(stream)
    progress.update(3, 10)
    progress.close()
    text = stream.getvalue()
    assert text.startswith("\r\x1b[Knnlint: 3/10 files (")
    assert text.endswith(" files/s)\r\x1b[K")


def test_not_shown_before_the_delay(monkeypatch):
    monkeypatch.delenv("CI", raising=False)
    stream = FakeTerminal()
    progress = Progress(stream)
    progress.update(1, 2)
    progress.close()
    assert stream.getvalue() == ""


def test_never_in_pipes_or_under_ci(no_delay, monkeypatch):
    pipe = io.StringIO()
    progress = Progress(pipe)
    progress.update(1, 2)
    progress.close()
    assert pipe.getvalue() == ""
    monkeypatch.setenv("CI", "true")
    stream = FakeTerminal()
    progress = Progress(stream)
    progress.update(1, 2)
    assert stream.getvalue() == ""
