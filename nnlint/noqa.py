"""`# noqa` suppression with flake8's semantics, so both front ends agree.

The regular expressions are flake8's (flake8/defaults.py, 7.x); a test pins the behaviour to
flake8 itself. As in flake8, a comment anywhere on a multi-line string token's lines covers
every line of that token.
"""
from __future__ import annotations

import io
import re
import tokenize

from nnlint.files import split_lines

#: flake8 defaults.NOQA_INLINE_REGEXP
NOQA_INLINE = re.compile(r"# noqa(?::[\s]?(?P<codes>([A-Z]+[0-9]+(?:[,\s]+)?)+))?", re.IGNORECASE)
#: flake8 defaults.NOQA_FILE (matched at the start of a line)
NOQA_FILE = re.compile(r"\s*# flake8[:=]\s*noqa", re.I)
_SEPARATOR = re.compile(r"[,\s]")


def file_is_skipped(lines: list[str]) -> bool:
    """True when a line is a file-level `# flake8: noqa` comment."""
    return any(NOQA_FILE.match(line) for line in lines)


def _codes(text: str) -> set[str]:
    return {code.strip() for code in _SEPARATOR.split(text) if code.strip()}


def is_suppressed(code: str, noqa_text: str) -> bool:
    """Whether `code` is suppressed by the noqa comment (if any) in `noqa_text`."""
    match = NOQA_INLINE.search(noqa_text)
    if match is None:
        return False
    codes_text = match.group("codes")
    if codes_text is None:
        return True
    codes = _codes(codes_text)
    return code in codes or code.startswith(tuple(codes))


def noqa_lines(text: str) -> dict[int, str]:
    """1-based line -> the text flake8 searches for noqa on that line."""
    lines = split_lines(text)
    mapping: dict[int, str] = {}
    try:
        tokens = list(tokenize.generate_tokens(io.StringIO(text).readline))
    except (tokenize.TokenError, SyntaxError):
        return {number: line for number, line in enumerate(lines, start=1)}
    first, last = len(lines) + 2, -1
    for token in tokens:
        if token.type in (tokenize.ENDMARKER, tokenize.DEDENT):
            continue
        first = min(first, token.start[0])
        last = max(last, token.end[0])
        if token.type in (tokenize.NL, tokenize.NEWLINE):
            joined = "".join(lines[first - 1:last])
            for number in range(first, last + 1):
                mapping[number] = joined
            first, last = len(lines) + 2, -1
    for number, line in enumerate(lines, start=1):
        mapping.setdefault(number, line)
    return mapping
