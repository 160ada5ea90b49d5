"""`formgate check` and `formgate rules check`: judge files given by hand, validate a rules folder.

Argument parsing and printing only; the work is the runner's (one file: read, judge,
write) and the rulebook's (every located problem of a rule file or profile).
"""

from __future__ import annotations

import argparse
import datetime
import os
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline.cli.exits import EXIT_OK, EXIT_REJECTED, EXIT_USER
from pipeline.cli.starting import importing
from pipeline.errors import FormgateError

if TYPE_CHECKING:
    from pipeline.acceptance.results import CellResult
    from pipeline.runner import FileOutcome


def analysis_time(
    text: str | None, environ: Mapping[str, str]
) -> datetime.datetime:
    """--analysed-at, else SOURCE_DATE_EPOCH (reproducible output), else now; UTC, whole seconds."""
    if text:
        try:
            value = datetime.datetime.fromisoformat(text)
        except ValueError:
            raise FormgateError(
                f"--analysed-at {text!r} is not a date and time",
                None,
                "Write it in ISO 8601 with a time zone, e.g. 2026-12-01T08:00:00+00:00.",
            ) from None
        if value.tzinfo is None:
            raise FormgateError(
                f"--analysed-at {text!r} has no time zone",
                None,
                "Add one, e.g. 2026-12-01T08:00:00+00:00.",
            )
        return value.astimezone(datetime.UTC)
    epoch = environ.get("SOURCE_DATE_EPOCH")
    if epoch and epoch.isdigit():
        return datetime.datetime.fromtimestamp(int(epoch), datetime.UTC)
    return datetime.datetime.now(datetime.UTC).replace(microsecond=0)


def _reason(outcome: FileOutcome) -> str:
    from pipeline.report.summary import reason_line

    if outcome.error is not None:
        return str(outcome.error).splitlines()[0]
    assert outcome.result is not None
    return reason_line(outcome.result)


def _stage_words(result: CellResult) -> str:
    """' and stage (grading)' for a file of one stage; '' for a file of the whole program."""
    from pipeline.acceptance.rules import WHOLE_PROGRAM

    if tuple(result.stages) == WHOLE_PROGRAM:
        return ""
    return f" and stage ({' and '.join(result.stages)})"


def cmd_check(args: argparse.Namespace) -> int:
    """Judge cycle files given on the command line."""
    with importing():
        from pipeline.read.profile import load_profile
        from pipeline.rulebook.book import load_rules_dir
        from pipeline.runner import check_file

    rulebook = load_rules_dir(Path(args.rules))
    profile = None
    if args.profile:
        path = Path(args.profile)
        profile = load_profile(path.read_text(encoding="utf-8"), str(path))
    analysed_at = analysis_time(args.analysed_at, os.environ)
    out = Path(args.out) if args.out else None
    if len(args.files) > 1 and not args.no_pdf:
        from pipeline.station.worker import prepare_process

        prepare_process()  # many certificates: pay the start-up once, then render faster
    worst = EXIT_OK
    seen: dict[Path, str] = {}  # an output file -> the file that wrote it first
    for name in args.files:
        outcome = check_file(
            Path(name),
            rulebook,
            out,
            analysed_at=analysed_at,
            profile=profile,
            certificate=not args.no_pdf,
        )
        if outcome.error is not None:
            print(f"{name}  error  {_reason(outcome)}")
            for line in str(outcome.error).splitlines()[1:]:
                print(f"    {line.strip()}")
            worst = max(worst, EXIT_USER)
            continue
        assert outcome.result is not None
        kind = outcome.result.verdict.kind.value
        print(f"{Path(name).name}  {outcome.result.cell_id}  {kind}  {_reason(outcome)}")
        written = outcome.published
        if written is not None:
            # a cell's files of different stages have outputs of their own: only one that
            # wrote the same output file as an earlier one replaced it
            if written.result_json in seen:
                print(f"    note: {Path(seen[written.result_json]).name} holds the same cell"
                      f"{_stage_words(outcome.result)}; this file's "
                      f"{'result and certificate' if written.certificate else 'result'} "
                      "replaced that one's in the output folder")
            seen.setdefault(written.result_json, name)
        if kind != "pass":
            worst = max(worst, EXIT_REJECTED)
    return worst


def cmd_rules_check(args: argparse.Namespace) -> int:
    """Validate every rule file in a folder and every import profile in its profiles/."""
    from pipeline.rulebook.book import check_profiles_dir, check_rules_dir

    folder = Path(args.folder)
    problems: list[FormgateError] = list(check_rules_dir(folder))
    profiles = sorted(p for p in (folder / "profiles").glob("*.toml") if p.is_file())
    problems += check_profiles_dir(folder / "profiles")
    for problem in problems:
        print(problem, file=sys.stderr)
    if problems:
        print(f"{len(problems)} problem(s) found in {args.folder}", file=sys.stderr)
        return EXIT_USER

    def count(n: int, thing: str) -> str:
        return f"{n} {thing}" + ("" if n == 1 else "s")

    rule_files = sum(1 for p in folder.glob("*.toml") if p.is_file())
    checked = count(rule_files, "rule file")
    if profiles:
        checked += " and " + count(len(profiles), "import profile")
    print(f"{args.folder}: {checked}, all valid")
    return EXIT_OK


def add_commands(sub: Any) -> None:
    """Add `check` and `rules check` to the command line's sub-commands."""
    check = sub.add_parser(
        "check",
        help="judge cycle files and write results and certificates",
        description="Judge cycle files: one line per file with cell, verdict and reason.",
        epilog="example: formgate check inbox/*.csv --rules rules/ --out out/",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    check.add_argument(
        "files",
        nargs="+",
        metavar="FILE",
        help="cycle files: version 1 text (.csv or .csv.gz) or, through --profile, other delimited "
        "text, a workbook (.xlsx, .xlsm, .xls, .ods) or a Parquet file",
    )
    check.add_argument("--rules", default="rules", help="folder of rule files (default: rules)")
    check.add_argument(
        "--out", help="folder for results/ and certificates/ (default: write nothing)"
    )
    check.add_argument(
        "--profile", help="import profile (TOML) for files not in the cycle file v1 layout"
    )
    check.add_argument(
        "--no-pdf", action="store_true", help="write JSON results only, no certificates"
    )
    check.add_argument(
        "--analysed-at", help="analysis time to record, ISO 8601 with zone (default: now)"
    )
    check.set_defaults(func=cmd_check)

    rules = sub.add_parser(
        "rules", help="work with rule files", epilog="example: formgate rules check rules/"
    )
    rules_sub = rules.add_subparsers(dest="rules_command", required=True, metavar="ACTION")
    rules_check = rules_sub.add_parser(
        "check",
        help="validate every rule file and import profile in a folder",
        description="Validate the rule files (*.toml) in a folder and the import profiles in "
        "its profiles/ subfolder; each problem names file, line and what to do.",
        epilog="example: formgate rules check rules/",
    )
    rules_check.add_argument(
        "folder",
        metavar="FOLDER",
        help="folder holding the rule files (and a profiles/ folder, if any)",
    )
    rules_check.set_defaults(func=cmd_rules_check)
