"""The `nnlint` command: check, rules, explain. Exit 0 clean, 1 findings, 2 usage/internal error."""
from __future__ import annotations

import argparse
import difflib
import json
import os
import sys
import time
from typing import TYPE_CHECKING, Sequence

from nnlint import __version__
from nnlint.cache import FOLDER_NAME
from nnlint.config import ConfigError, PRECISIONS, Settings, load, override

if TYPE_CHECKING:
    from nnlint.rules.base import Rule

EXIT_CLEAN, EXIT_FINDINGS, EXIT_ERROR = 0, 1, 2
FORMATS = ("text", "json")
CHECK_FORMATS = (*FORMATS, "sarif")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="nnlint",
        description="Find silent bugs in neural-network training code before the run.",
        epilog="Exit status: 0 no findings, 1 findings, 2 usage, configuration or internal error.",
    )
    parser.add_argument("--version", action="version", version=f"nnlint {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    check = commands.add_parser("check", help="check files, folders and notebooks",
                                description="Check Python files and folders for training hazards.")
    check.add_argument("paths", nargs="*", default=["."], metavar="PATH",
                       help="files or folders to check (default: the current folder)")
    check.add_argument("--format", choices=CHECK_FORMATS, default="text",
                       help="output format (default: text, `path:line:col: CODE message`)")
    _add_selection_flags(check)
    check.add_argument("--no-cache", action="store_true",
                       help=f"do not read or write the result cache ({FOLDER_NAME}/ under the "
                            f"project root; delete that folder to clear it)")
    check.add_argument("-j", "--jobs", type=_positive_int, default=None, metavar="N",
                       help="worker processes (default: all CPUs; output does not depend on it)")

    fix = commands.add_parser("fix", help="apply the safe automatic fixes",
                              description="Rewrite findings that have one unambiguous fix; "
                                          "everything else in the file stays byte-identical.")
    fix.add_argument("paths", nargs="*", default=["."], metavar="PATH",
                     help="files or folders to fix (default: the current folder)")
    fix.add_argument("--diff", action="store_true",
                     help="print a unified diff of the fixes and write nothing")
    _add_selection_flags(fix)

    rules = commands.add_parser("rules", help="list the rules",
                                description="List every rule: code, name, severity, summary.")
    rules.add_argument("--format", choices=FORMATS, default="text")

    explain = commands.add_parser("explain", help="explain one rule",
                                  description="Print a rule's rationale, examples and references.")
    explain.add_argument("code", metavar="CODE", help="a rule code (NNL301) or name")
    return parser


def _add_selection_flags(command: argparse.ArgumentParser) -> None:
    command.add_argument("--select", metavar="CODES",
                         help="comma-separated code prefixes to report (default: all on by "
                              "default)")
    command.add_argument("--ignore", metavar="CODES",
                         help="comma-separated code prefixes to skip")
    command.add_argument("--exclude", metavar="GLOBS",
                         help="comma-separated globs of paths to skip")
    command.add_argument("--per-file-ignores", metavar="PAIRS",
                         help='space-separated "glob:CODES" pairs, as in flake8')
    command.add_argument("--precision", choices=PRECISIONS,
                         help="float format the arithmetic runs in (default: from the code, "
                              "else float32)")
    command.add_argument("--config", metavar="PYPROJECT",
                         help="read [tool.nnlint] from this file instead of searching for one")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError("must be at least 1")
    return value


def main(argv: Sequence[str] | None = None) -> int:
    parser = _parser()
    arguments = parser.parse_args(argv)
    if arguments.command == "check":
        return _check(arguments)
    if arguments.command == "fix":
        return _fix(arguments)
    if arguments.command == "rules":
        return _rules(arguments.format)
    if arguments.command == "explain":
        return _explain(arguments.code)
    parser.print_help(sys.stderr)
    return EXIT_ERROR


def _settings(arguments: argparse.Namespace) -> Settings:
    settings = load(arguments.paths, arguments.config)
    return override(settings, select=arguments.select, ignore=arguments.ignore,
                    exclude=arguments.exclude, per_file_ignores=arguments.per_file_ignores,
                    precision=arguments.precision)


def _check(arguments: argparse.Namespace) -> int:
    from nnlint.runner import run_paths
    from nnlint.report import json as json_report
    from nnlint.report import text as text_report

    started = time.perf_counter()
    try:
        settings = _settings(arguments)
    except ConfigError as error:
        print(error, file=sys.stderr)
        return EXIT_ERROR
    progress = Progress(sys.stderr) if arguments.format == "text" else None
    report = run_paths(arguments.paths, settings, arguments.jobs,
                       use_cache=not arguments.no_cache,
                       progress=progress.update if progress else None)
    if progress is not None:
        progress.close()
    if arguments.format == "json":
        sys.stdout.write(json_report.render(report.findings))
    elif arguments.format == "sarif":
        from nnlint.report import sarif as sarif_report

        problems = report.messages + [error.describe() for error in report.errors]
        sys.stdout.write(sarif_report.render(report.findings, problems))
    else:
        sys.stdout.write(text_report.render(report.findings))
    sys.stdout.flush()
    for message in report.messages + report.notes:
        print(message, file=sys.stderr)
    for error in report.errors:
        print(error.describe(), file=sys.stderr)
    if arguments.format == "text" and _is_terminal(sys.stderr):
        print(text_report.summary_line(report.findings, report.files_checked,
                                       time.perf_counter() - started), file=sys.stderr)
    if report.errors or report.messages:
        return EXIT_ERROR
    return EXIT_FINDINGS if report.findings else EXIT_CLEAN


class Progress:
    """`files done/total (rate)` on a terminal's stderr once a run passes ~2 s; then erased.

    Never shown in pipes, under CI (the CI variable set) or with machine-readable output.
    """

    DELAY = 2.0  # seconds; shorter runs finish before a display would help (common practice)

    def __init__(self, stream) -> None:
        self.stream = stream
        self.enabled = _is_terminal(stream) and not os.environ.get("CI")
        self.started = time.perf_counter()
        self.shown = False

    def update(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        elapsed = time.perf_counter() - self.started
        if elapsed < self.DELAY:
            return
        rate = done / elapsed if elapsed > 0 else 0.0
        self.stream.write(f"\r\x1b[Knnlint: {done}/{total} files ({rate:.0f} files/s)")
        self.stream.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            self.stream.write("\r\x1b[K")
            self.stream.flush()


def _fix(arguments: argparse.Namespace) -> int:
    from nnlint.analysis.project import ProjectIndex
    from nnlint.files import discover
    from nnlint.fix import fix_file
    from nnlint.report import text as text_report

    try:
        settings = _settings(arguments)
    except ConfigError as error:
        print(error, file=sys.stderr)
        return EXIT_ERROR
    messages = [f"nnlint: {path}: no such file or folder" for path in arguments.paths
                if not os.path.lexists(path)]
    project = ProjectIndex(settings)
    changed_files = fixed_count = 0
    remaining = []
    for path in discover([p for p in arguments.paths if os.path.lexists(p)], settings.exclude,
                         settings.root):
        result = fix_file(path, settings, project, write=not arguments.diff)
        messages += result.messages
        remaining += result.remaining
        if result.changed:
            changed_files += 1
            fixed_count += len(result.applied)
            if arguments.diff:
                sys.stdout.write(result.diff())
    if not arguments.diff:
        sys.stdout.write(text_report.render(remaining))
    for message in messages:
        print(message, file=sys.stderr)
    verb = "would fix" if arguments.diff else "fixed"
    print(f"nnlint: {verb} {fixed_count} finding{'s' if fixed_count != 1 else ''} in "
          f"{changed_files} file{'s' if changed_files != 1 else ''}; "
          f"{len(remaining)} remain", file=sys.stderr)
    if messages:
        return EXIT_ERROR
    if arguments.diff:
        return EXIT_FINDINGS if changed_files else EXIT_CLEAN
    return EXIT_FINDINGS if remaining else EXIT_CLEAN


def _is_terminal(stream) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def _rules(output_format: str) -> int:
    from nnlint.rules.base import all_rules

    rules = [rule for rule in all_rules() if not rule.retired]
    if output_format == "json":
        catalogue = [{"code": rule.code, "name": rule.name, "severity": rule.severity.value,
                      "summary": rule.summary, "enabled_by_default": rule.enabled_by_default}
                     for rule in rules]
        sys.stdout.write(json.dumps(catalogue, indent=2) + "\n")
        return EXIT_CLEAN
    name_width = max(len(rule.name) for rule in rules)
    for rule in rules:
        print(f"{rule.code}  {rule.name:<{name_width}}  {rule.severity.value:<7}  {rule.summary}")
    return EXIT_CLEAN


def _explain(wanted: str) -> int:
    from nnlint.rules.base import all_rules

    rules = all_rules()
    by_key: dict[str, type["Rule"]] = {}
    for rule in rules:
        by_key[rule.code] = rule
        by_key[rule.name] = rule
    rule = by_key.get(wanted.strip().upper()) or by_key.get(wanted.strip().lower())
    if rule is None:
        near = difflib.get_close_matches(wanted.strip().upper(), [r.code for r in rules], n=3,
                                         cutoff=0.6)
        near += [r.code for r in rules
                 if r.name in difflib.get_close_matches(wanted.strip().lower(),
                                                        [r.name for r in rules], n=3)]
        hint = f"; did you mean {', '.join(dict.fromkeys(near))}?" if near else ""
        print(f"nnlint: unknown rule {wanted!r}{hint} (`nnlint rules` lists them all)",
              file=sys.stderr)
        return EXIT_ERROR
    sys.stdout.write(rule.explain())
    return EXIT_CLEAN


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
