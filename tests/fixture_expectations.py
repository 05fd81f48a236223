"""Reading `# expect: NNL301` / `# expect: NNL301:9, NNL403` and `# ok` markers in fixtures."""
from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

EXPECT = re.compile(r"#\s*expect:\s*(?P<codes>NNL\d{3}(?::\d+)?(?:\s*,\s*NNL\d{3}(?::\d+)?)*)")
OK = re.compile(r"#\s*ok\b")
CODE = re.compile(r"(NNL\d{3})(?::(\d+))?")


@dataclass(frozen=True)
class Expected:
    line: int
    code: str
    #: 1-based column, or None when the fixture does not pin it
    column: int | None


def read_expectations(path: Path) -> tuple[list[Expected], int]:
    """(expected findings, number of `# ok` lines) of a fixture file."""
    expected: list[Expected] = []
    ok_lines = 0
    text = path.read_bytes().decode("utf-8", errors="replace")
    for number, line in enumerate(text.splitlines(), start=1):
        match = EXPECT.search(line)
        if match:
            for code, column in CODE.findall(match.group("codes")):
                expected.append(Expected(number, code, int(column) if column else None))
        if OK.search(line):
            ok_lines += 1
    return expected, ok_lines


def compare(expected: list[Expected], actual: list[tuple[int, int, str]]) -> tuple[list, list]:
    """(missing, unexpected): exact agreement means both are empty."""
    remaining = sorted(actual)
    missing = []
    # Pinned columns first, so an unpinned expectation cannot steal a pinned one's finding.
    for item in sorted(expected, key=lambda e: e.column is None):
        for index, (line, column, code) in enumerate(remaining):
            if line == item.line and code == item.code and item.column in (None, column):
                del remaining[index]
                break
        else:
            missing.append(item)
    return missing, remaining
