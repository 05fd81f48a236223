"""Rules about the file itself rather than its training logic."""
from __future__ import annotations

from nnlint.finding import Severity
from nnlint.rules.base import Rule, register


@register
class ParseError(Rule):
    code = "NNL001"
    name = "parse-error"
    severity = Severity.ERROR
    summary = "the file cannot be read or parsed, so nothing in it was checked"
    message = "{detail}; nothing else in this file was checked"
    rationale = (
        "A file nnlint cannot decode or parse is not analysed at all, so its hazards go "
        "unreported. The standalone CLI reports it so that a clean run really means every "
        "file was read. Under flake8 this code is never emitted: flake8 reports syntax "
        "errors itself as E999."
    )
    bad = "def train(model:\n    model.train()"
    good = "def train(model):\n    model.train()"
    references = ("Python Language Reference, 2. Lexical analysis: encoding declarations "
                  "(PEP 263)",)
    engine_only = True
