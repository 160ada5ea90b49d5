"""Command line: argument parsing and exit codes only; the work is done by runner, rulebook, demo.

Exit codes: 0 every cell passed, 1 a cell failed or was held, 2 a problem the user
can fix (bad rules, unreadable or unjudgeable file), 3 a bug in formgate, 130 Ctrl-C.
"""

from __future__ import annotations

import argparse
import datetime
import os
import platform
import sys
import tempfile
import traceback
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from pipeline import __version__
from pipeline.errors import FormgateError
from pipeline.shipped import RULES_DIR

if TYPE_CHECKING:
    from pipeline.runner import FileOutcome
    from pipeline.station.settings import Settings

EXIT_OK, EXIT_REJECTED, EXIT_USER, EXIT_BUG, EXIT_INTERRUPTED = 0, 1, 2, 3, 130


def _analysis_time(
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
    from pipeline.judge.evaluate import decision_line

    if outcome.error is not None:
        return str(outcome.error).splitlines()[0]
    assert outcome.result is not None
    verdict = outcome.result.verdict
    text = decision_line(verdict, outcome.result.notes)
    if verdict.hazards:
        text += " [hazard: " + ", ".join(h.value for h in verdict.hazards) + "]"
    return text


def cmd_check(args: argparse.Namespace) -> int:
    """Judge cycle files given on the command line."""
    from pipeline.read.profile import load_profile
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import check_file

    rulebook = load_rules_dir(Path(args.rules))
    profile = None
    if args.profile:
        path = Path(args.profile)
        profile = load_profile(path.read_text(encoding="utf-8"), str(path))
    analysed_at = _analysis_time(args.analysed_at, os.environ)
    out = Path(args.out) if args.out else None
    if len(args.files) > 1 and not args.no_pdf:
        from pipeline.station.worker import prepare_process

        prepare_process()  # many certificates: pay the start-up once, then render faster
    worst = EXIT_OK
    seen: dict[tuple[str, str], str] = {}  # (lot, cell) -> the file that judged it first
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
        key = (outcome.result.lot, outcome.result.cell_id)
        if key in seen and out is not None:
            print(f"    note: {Path(seen[key]).name} holds the same cell; this file's result and "
                  "certificate replaced that one's in the output folder")
        seen.setdefault(key, name)
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


def cmd_demo(args: argparse.Namespace) -> int:
    """Run a station on the invented demo lots (or, with --batch, just check them)."""
    if args.batch:
        from pipeline.demo.batch import run_demo

        return run_demo(Path(args.folder or "demo-output"), analysed_at=_analysis_time(None, os.environ))
    from pipeline.demo.station_demo import run_station_demo

    return run_station_demo(Path(args.folder) if args.folder else None)


def cmd_init(args: argparse.Namespace) -> int:
    """Write a commented station.toml and the folder layout."""
    from pipeline.station.settings import init_station

    folder = Path(args.folder)
    created = init_station(folder, rules_from=RULES_DIR)
    print(f"station created in {folder} ({len(created)} files and folders)")
    print(f"  edit {folder / 'station.toml'}, then run: formgate watch {folder}")
    return EXIT_OK


def _station_settings(folder: str) -> Settings:
    from pipeline.station.settings import read_settings

    return read_settings(Path(folder))


def cmd_watch(args: argparse.Namespace) -> int:
    """Run the station until SIGTERM or Ctrl-C."""
    import signal
    import threading

    from pipeline.station.settings import check_filesystems, smtp_settings
    from pipeline.station.station import Station

    settings = _station_settings(args.folder)
    check_filesystems(settings)
    smtp = smtp_settings(settings, os.environ)
    from pipeline.logs import setup_logging

    setup_logging(settings.logs, settings.log_max_MB, settings.log_keep, verbose=not args.quiet)
    stop = threading.Event()
    interrupted = []

    def on_signal(signum: int, frame: object) -> None:
        interrupted.append(signum)
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    code = Station(settings, smtp).run(stop)
    return EXIT_INTERRUPTED if signal.SIGINT in interrupted else code


def cmd_status(args: argparse.Namespace) -> int:
    """Print the station's queue, last cells, counts, outbox, errors and health."""
    from pipeline.station.status import status_text

    settings = _station_settings(args.folder)
    now = datetime.datetime.now(datetime.UTC)
    print(status_text(settings, now), end="")
    return EXIT_OK


def cmd_mail_retry(args: argparse.Namespace) -> int:
    """Send every pending mail now (and parked ones with --parked)."""
    from pipeline.ledger.ledger import Ledger
    from pipeline.station.mailer import deliver_due
    from pipeline.station.settings import smtp_settings

    settings = _station_settings(args.folder)
    smtp = smtp_settings(settings, os.environ)
    now = datetime.datetime.now(datetime.UTC)
    with Ledger(settings.ledger, now=now) as ledger:
        if args.parked:
            for mail in ledger.outbox.in_state("parked"):
                ledger.outbox.requeue(mail.id, now=now)
        ledger.outbox.hurry_pending(now=now)
        counts = deliver_due(
            ledger, smtp, station=settings.station_name, alerts_to=settings.routing.alerts_to,
            domain=settings.routing.domain,
        )
        left = ledger.outbox.counts()
    print(f"sent {counts['sent']}, delayed {counts['retry']}, parked {counts['park']}; "
          f"outbox now {left.get('pending', 0)} pending, {left.get('parked', 0)} parked")
    parked = left.get("parked", 0)
    if parked and not args.parked:
        # parked mail was refused for good by the server: only a deliberate retry sends it
        print(f"  {parked} parked mail(s) were not retried: fix what the server refused "
              f"(see formgate status), then run: formgate mail retry {args.folder} --parked")
    unsent = counts["retry"] or counts["park"] or (parked and not args.parked)
    return EXIT_USER if unsent else EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="formgate",
        description="Judge battery cells after formation and grading, and certify them.",
    )
    parser.add_argument("--version", action="version", version=f"formgate {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    check = sub.add_parser(
        "check",
        help="judge cycle files and write results and certificates",
        description="Judge cycle files: one line per file with cell, verdict and reason.",
        epilog="example: formgate check inbox/*.csv --rules rules/ --out out/",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    check.add_argument("files", nargs="+", metavar="FILE", help="cycle files (.csv or .csv.gz)")
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

    init = sub.add_parser(
        "init", help="create a station folder with a commented station.toml",
        description="Create a station: station.toml (commented), the folder layout and a copy "
        "of the rules.",
        epilog="example: formgate init station/",
    )
    init.add_argument("folder", metavar="FOLDER", help="the station folder to create")
    init.set_defaults(func=cmd_init)

    watch = sub.add_parser(
        "watch", help="run the station until stopped (SIGTERM or Ctrl-C)",
        description="Watch the inboxes, judge every finished file, record, publish and mail.",
        epilog="example: formgate watch station/",
    )
    watch.add_argument("folder", metavar="FOLDER", help="the station folder (holding station.toml)")
    watch.add_argument("--quiet", action="store_true", help="log to the log file only")
    watch.set_defaults(func=cmd_watch)

    status = sub.add_parser(
        "status", help="show queue, last cells, counts today, outbox, errors and health",
        description="Report on a station without disturbing it.",
        epilog="example: formgate status station/",
    )
    status.add_argument("folder", metavar="FOLDER", help="the station folder")
    status.set_defaults(func=cmd_status)

    mail = sub.add_parser("mail", help="work with the station's outbox",
                          epilog="example: formgate mail retry station/")
    mail_sub = mail.add_subparsers(dest="mail_command", required=True, metavar="ACTION")
    retry = mail_sub.add_parser(
        "retry", help="send pending mail now",
        description="Send every pending mail now instead of waiting for its next try.",
        epilog="example: formgate mail retry station/ --parked",
    )
    retry.add_argument("folder", metavar="FOLDER", help="the station folder")
    retry.add_argument(
        "--parked", action="store_true", help="also retry mail the server refused for good"
    )
    retry.set_defaults(func=cmd_mail_retry)

    from pipeline.cli_lots import add_commands

    add_commands(sub)

    demo = sub.add_parser(
        "demo",
        help="run a station on invented demo lots fed by a simulated cycler",
        description="Start a station on a new folder, let a simulated cycler hand over invented "
        "lots (normal cells and one of each defect, a bad file, a duplicate), drain it, and show "
        "where the certificates, results, mails and ledger are.",
        epilog="examples: formgate demo (in a new temporary folder); "
        "formgate demo --batch demo-output/",
    )
    demo.add_argument(
        "folder",
        nargs="?",
        metavar="FOLDER",
        help="station folder to create (default: a new temporary folder; with --batch, "
        "demo-output)",
    )
    demo.add_argument(
        "--batch",
        action="store_true",
        help="no station: write the lots into FOLDER/inbox and check them in one go",
    )
    demo.set_defaults(func=cmd_demo)
    return parser


def _report_bug(exc: BaseException) -> int:
    """One line for the user, the traceback and versions in a log file (exit 3)."""
    home = Path(os.environ.get("FORMGATE_HOME", tempfile.gettempdir()))
    log = home / "formgate-crash.log"
    try:
        home.mkdir(parents=True, exist_ok=True)
        with log.open("a", encoding="utf-8") as fh:
            fh.write(
                f"formgate {__version__}, Python {platform.python_version()}, {platform.platform()}\n"
            )
            fh.write("".join(traceback.format_exception(exc)))
    except OSError:
        log = Path("(log could not be written)")
    print(
        f"formgate: internal error: {type(exc).__name__}: {exc}. This is a bug; details are in {log}.",
        file=sys.stderr,
    )
    return EXIT_BUG


# formgate's arrays are small and its parallelism is by process: one BLAS thread each
# avoids thread hand-over costs that dominate small products on a busy machine.
SINGLE_THREADED_MATH = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def main(argv: Sequence[str] | None = None) -> int:
    for key, value in SINGLE_THREADED_MATH.items():
        os.environ.setdefault(key, value)  # before numpy is imported; a user's choice stands
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args))
    except FormgateError as exc:
        print(exc, file=sys.stderr)
        return EXIT_USER
    except OSError as exc:
        # a missing file, a folder where a file belongs, no permission: the user's to fix
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"{where}{exc.strerror or exc}.\n  Check the path and its permissions.", file=sys.stderr)
        return EXIT_USER
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:
        return _report_bug(exc)
