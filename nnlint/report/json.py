"""One JSON array of findings, exactly the DESIGN §5 schema."""
from __future__ import annotations

import json
from typing import Iterable

from nnlint.finding import Finding


def render(findings: Iterable[Finding]) -> str:
    return json.dumps([finding.to_json() for finding in findings], indent=2) + "\n"
