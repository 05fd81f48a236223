"""Editor diagnostics: the real python-lsp-server, its flake8 plugin, and our flake8 plugin.

The client speaks the Language Server Protocol 3.17 over stdio (JSON-RPC 2.0 messages, each
after a `Content-Length` header). The server settings are the README's snippet, read from
the README, so the documented set-up is the tested one.
"""
import json
import os
import queue
import re
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from tests.conftest import ROOT

pytest.importorskip("pylsp", reason="python-lsp-server is in the test extra: pip install .[test]")

#: bounds every wait; a lint on open takes well under a second here (measured), the rest is
#: start-up on a busy machine
RESPONSE_TIMEOUT_SECONDS = 60

DOCUMENT = ("import torch\n"
            "\n"
            "depot_net = torch.nn.Sequential(torch.nn.Linear(12, 4))\n"
            "for depot_batch in []:\n"
            "    depot_net.eval\n")
#: LSP positions are 0-based (LSP 3.17, Position): line 5, column 5 of the document
HAZARD_LINE, HAZARD_CHARACTER = 4, 4


def readme_settings() -> dict:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    block = re.search(r"<!-- pylsp-settings:start -->\s*```json\n(.*?)```", readme, re.S)
    assert block, "README.md lacks the pylsp settings block between its markers"
    return json.loads(block.group(1))


class LanguageServer:
    """A python-lsp-server subprocess and a thread reading its messages into a queue."""

    def __init__(self, workspace: Path) -> None:
        environment = dict(os.environ)
        # pylsp runs `flake8` from PATH: the one beside this interpreter, with our plugin
        environment["PATH"] = os.pathsep.join([str(Path(sys.executable).parent),
                                               environment.get("PATH", "")])
        environment.pop("NNLINT_STRICT", None)
        self.process = subprocess.Popen([sys.executable, "-m", "pylsp"], cwd=workspace,
                                        stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                        stderr=subprocess.DEVNULL, env=environment)
        self.messages: queue.Queue = queue.Queue()
        self.seen: list[dict] = []
        self._next_id = 0
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self) -> None:
        stream = self.process.stdout
        while True:
            length = None
            while True:
                header = stream.readline()
                if not header:
                    return
                if header in (b"\r\n", b"\n"):
                    break
                name, _, value = header.decode("ascii").partition(":")
                if name.strip().lower() == "content-length":
                    length = int(value.strip())
            if length is None:
                return
            self.messages.put(json.loads(stream.read(length)))

    def send(self, message: dict) -> None:
        body = json.dumps({"jsonrpc": "2.0", **message}).encode("utf-8")
        self.process.stdin.write(b"Content-Length: %d\r\n\r\n" % len(body) + body)
        self.process.stdin.flush()

    def request(self, method: str, params: dict) -> dict:
        self._next_id += 1
        self.send({"id": self._next_id, "method": method, "params": params})
        return self.wait_for(lambda message: message.get("id") == self._next_id
                             and "method" not in message)

    def notify(self, method: str, params: dict) -> None:
        self.send({"method": method, "params": params})

    def wait_for(self, wanted) -> dict:
        """The first message `wanted` accepts; fails after RESPONSE_TIMEOUT_SECONDS."""
        while True:
            try:
                message = self.messages.get(timeout=RESPONSE_TIMEOUT_SECONDS)
            except queue.Empty:
                pytest.fail(f"no awaited message from pylsp in {RESPONSE_TIMEOUT_SECONDS} s; "
                            f"received: {json.dumps(self.seen)[:2000]}")
            self.seen.append(message)
            if wanted(message):
                return message

    def close(self) -> None:
        try:
            self.request("shutdown", {})
            self.notify("exit", {})
            self.process.wait(timeout=10)
        except (OSError, subprocess.TimeoutExpired):
            pass
        finally:
            if self.process.poll() is None:
                self.process.kill()
                self.process.wait(timeout=10)


def test_pylsp_publishes_the_nnl_diagnostic_on_the_hazard_line(tmp_path):
    document = tmp_path / "train_depot.py"
    document.write_text(DOCUMENT)
    uri = document.as_uri()
    server = LanguageServer(tmp_path)
    try:
        server.request("initialize", {"processId": os.getpid(), "rootUri": tmp_path.as_uri(),
                                      "capabilities": {}})
        server.notify("initialized", {})
        server.notify("workspace/didChangeConfiguration", {"settings": readme_settings()})
        server.notify("textDocument/didOpen", {"textDocument": {
            "uri": uri, "languageId": "python", "version": 1, "text": DOCUMENT}})
        published = server.wait_for(
            lambda message: message.get("method") == "textDocument/publishDiagnostics"
            and message["params"]["uri"] == uri and message["params"]["diagnostics"])
    finally:
        server.close()
    diagnostics = published["params"]["diagnostics"]
    # the other linters are off: the only diagnostic is ours, from the flake8 plugin
    assert [(d["source"], d["code"], d["range"]["start"]) for d in diagnostics] == [
        ("flake8", "NNL403", {"line": HAZARD_LINE, "character": HAZARD_CHARACTER})]
    assert diagnostics[0]["message"].startswith(
        "NNL403 `depot_net.eval` is only read, never called: the model stays in training mode")
