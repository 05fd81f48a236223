"""Parse source text with libcst, turning every failure into a ParseFailure."""
from __future__ import annotations

import ast
import warnings

import libcst as cst


class ParseFailure(Exception):
    """The text cannot be parsed; line and column are 1-based."""

    def __init__(self, message: str, line: int = 1, column: int = 1) -> None:
        super().__init__(message)
        self.message = message
        self.line = line
        self.column = column


#: CPython's tokenizer refuses more than 200 nested brackets (MAXLEVEL, Parser/tokenizer.h,
#: from memory); libcst's native parser crashes the process at about 2,000, so files past
#: CPython's limit never reach it
MAX_BRACKET_DEPTH = 200


class _Brackets(dict):
    """str.translate table that deletes every character but brackets."""

    def __missing__(self, key: int) -> None:
        return None


_BRACKETS = _Brackets({ord(c): ord(c) for c in "()[]{}"})


def bracket_depth_exceeds(text: str, limit: int = MAX_BRACKET_DEPTH) -> bool:
    """Cheap upper-bound test of bracket nesting (brackets inside strings count too)."""
    if text.count("(") + text.count("[") + text.count("{") <= limit:
        return False
    depth = 0
    for character in text.translate(_BRACKETS):
        if character in "([{":
            depth += 1
            if depth > limit:
                return True
        elif depth:
            depth -= 1
    return False


def parse(text: str) -> cst.Module:
    """libcst.parse_module, with syntax, recursion and parser errors as ParseFailure."""
    if bracket_depth_exceeds(text):
        failure = _python_syntax_error(text)
        if failure is not None:
            raise failure
        raise ParseFailure("brackets nested too deeply to parse safely")
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise ParseFailure("source contains a NUL byte", line, 1)
    try:
        return cst.parse_module(text)
    except cst.ParserSyntaxError as error:
        raise _explain_syntax_error(text, error) from None
    except RecursionError:
        raise ParseFailure("file is nested too deeply to parse") from None
    except (ValueError, TypeError, MemoryError, OverflowError) as error:
        raise ParseFailure(f"cannot parse: {type(error).__name__}: {error}") from None


def _explain_syntax_error(text: str, error: cst.ParserSyntaxError) -> ParseFailure:
    """Prefer CPython's message and position, which users know; libcst's otherwise."""
    failure = _python_syntax_error(text)
    if failure is not None:
        return failure
    # ParserSyntaxError: raw_line is 1-based, raw_column 0-based (libcst docs)
    return ParseFailure("syntax libcst cannot parse", error.raw_line, error.raw_column + 1)


def _python_syntax_error(text: str) -> ParseFailure | None:
    """CPython's verdict on the text: a ParseFailure, or None when it parses."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ast.parse(text)
    except SyntaxError as python_error:
        line = python_error.lineno or 1
        column = python_error.offset or 1  # SyntaxError.offset is 1-based
        return ParseFailure(f"syntax error: {python_error.msg}", line, column)
    except (RecursionError, MemoryError, ValueError):
        return ParseFailure("file is nested too deeply to parse")
    return None
