"""SARIF 2.1.0 (OASIS Static Analysis Results Interchange Format): one run, every rule.

Field meanings are those of the OASIS SARIF 2.1.0 standard (errata 01); section numbers below
refer to it. Columns are 1-based Unicode code points and a region's end column is the column
just past its last character (§3.30.8), which is what the engine computes. For a notebook the
region's lines count inside the cell named by the location's `properties.cell` (0-based index
among all cells, as in the JSON output): a notebook is JSON on disk, so its raw file lines
would point nowhere useful.
"""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Iterable, Sequence
from urllib.parse import quote

from nnlint import __version__
from nnlint.finding import Finding, Severity
from nnlint.rules.base import Rule, all_rules

#: the schema's own id (sarif-schema-2.1.0.json, errata 01)
SCHEMA_URI = ("https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/"
              "sarif-schema-2.1.0.json")
SARIF_VERSION = "2.1.0"
#: §3.27.10: a result's level; nnlint's two severities map one to one
LEVELS = {Severity.ERROR: "error", Severity.WARNING: "warning"}


def catalogue() -> list[type[Rule]]:
    """The rules a run describes (§3.19.23 tool.driver.rules): every rule not retired."""
    return [rule for rule in all_rules() if not rule.retired]


def rule_descriptor(rule: type[Rule]) -> dict:
    """A reportingDescriptor (§3.49) built from the rule's own attributes."""
    descriptor = {
        "id": rule.code,
        "name": rule.name,
        "shortDescription": {"text": rule.summary},
        "fullDescription": {"text": rule.rationale or rule.summary},
        "help": {"text": rule.explain()},
        "defaultConfiguration": {"level": LEVELS[rule.severity]},
    }
    if not rule.enabled_by_default:
        descriptor["defaultConfiguration"]["enabled"] = False
    return descriptor


def artifact_uri(path: str) -> str:
    """A relative path as a relative URI reference with forward slashes; absolute as file:."""
    if os.path.isabs(path):
        return Path(path).as_uri()
    return quote(path.replace(os.sep, "/"))


def fix_object(finding: Finding, rule: type[Rule] | None) -> dict:
    """A fix (§3.55): the rewrite `nnlint fix` applies, as replacements (§3.57) of the file.

    Each replacement deletes a region (§3.30; an empty one, start equal to end, is an
    insertion point) and inserts `insertedContent.text` there (§3.3 artifactContent).
    """
    replacements = [{
        "deletedRegion": {"startLine": edit.line, "startColumn": edit.column,
                          "endLine": edit.end_line, "endColumn": edit.end_column},
        "insertedContent": {"text": edit.text},
    } for edit in finding.edits]
    fix: dict = {"artifactChanges": [{"artifactLocation": {"uri": artifact_uri(finding.path)},
                                      "replacements": replacements}]}
    if rule is not None and rule.rewrite:
        fix["description"] = {"text": f"nnlint fix {rule.rewrite}"}
    return fix


def result_object(finding: Finding, rule_index: dict[str, int],
                  rules: Sequence[type[Rule]] = ()) -> dict:
    """A result (§3.27) with one physical location, and its fix where it has one."""
    region = {"startLine": finding.line, "startColumn": finding.column}
    if finding.end_line is not None and finding.end_column is not None:
        region["endLine"] = finding.end_line
        region["endColumn"] = finding.end_column
    location: dict = {
        "physicalLocation": {
            "artifactLocation": {"uri": artifact_uri(finding.path)},
            "region": region,
        },
    }
    if finding.cell is not None:
        location["properties"] = {"cell": finding.cell}
    result = {
        "ruleId": finding.code,
        "level": LEVELS[finding.severity],
        "message": {"text": finding.message},
        "locations": [location],
    }
    if finding.code in rule_index:
        result["ruleIndex"] = rule_index[finding.code]
    # a notebook's edits count lines inside a cell, not lines of the JSON file a SARIF
    # consumer would patch, so notebook findings carry none (`nnlint fix` fixes notebooks)
    if finding.edits and finding.cell is None:
        rule = rules[rule_index[finding.code]] if finding.code in rule_index else None
        result["fixes"] = [fix_object(finding, rule)]
    return result


def document(findings: Iterable[Finding], problems: Sequence[str] = ()) -> dict:
    """The whole SARIF log; `problems` are run-level errors (unreadable paths, our bugs)."""
    rules = catalogue()
    rule_index = {rule.code: index for index, rule in enumerate(rules)}
    invocation = {
        "executionSuccessful": not problems,
        "toolExecutionNotifications": [
            {"level": "error", "message": {"text": problem}} for problem in problems
        ],
    }
    run = {
        "tool": {"driver": {
            "name": "nnlint",
            "version": __version__,
            "semanticVersion": __version__,
            "rules": [rule_descriptor(rule) for rule in rules],
        }},
        "invocations": [invocation],
        "columnKind": "unicodeCodePoints",
        "results": [result_object(finding, rule_index, rules) for finding in findings],
    }
    return {"$schema": SCHEMA_URI, "version": SARIF_VERSION, "runs": [run]}


def render(findings: Iterable[Finding], problems: Sequence[str] = ()) -> str:
    return json.dumps(document(findings, problems), indent=2) + "\n"
