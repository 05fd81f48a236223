"""Generated documentation: the README rule table, from the registry (the single source).

Regenerate with `python -m nnlint.docs --write`; tests/test_docs.py fails when it is stale.
"""
from __future__ import annotations

import re
import sys
from pathlib import Path

from nnlint.rules.base import all_rules

START, END = "<!-- rule-table:start -->", "<!-- rule-table:end -->"


def rule_table() -> str:
    rows = ["| code | name | severity | flags | fix |", "|---|---|---|---|---|"]
    for rule in all_rules():
        if rule.retired:
            continue
        default = "" if rule.enabled_by_default else " (off by default)"
        rows.append(f"| {rule.code} | {rule.name} | {rule.severity.value}{default} | "
                    f"{rule.summary} | {'yes' if rule.rewrite else ''} |")
    return "\n".join(rows)


def updated_readme(text: str) -> str:
    pattern = re.compile(re.escape(START) + r".*?" + re.escape(END), re.S)
    return pattern.sub(lambda _: f"{START}\n{rule_table()}\n{END}", text)


def main(argv: list[str]) -> int:
    readme = Path(__file__).resolve().parent.parent / "README.md"
    text = readme.read_text(encoding="utf-8")
    new = updated_readme(text)
    if "--write" in argv:
        readme.write_text(new, encoding="utf-8")
        return 0
    sys.stdout.write(rule_table() + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
