"""The command line's entry point: the parser of every command family, exit codes, bugs.

Argument parsing and exit codes only. Each command family has its module (check.py,
profile.py, station.py, lots.py, review.py, regrade.py, verify.py, demo.py) with a plain
function per command that returns an exit code, and adds its sub-commands to the parser
here, in the order `formgate --help` shows them. A FormgateError or an OSError is the
user's to fix (exit 2); any other exception is a bug (exit 3, details in a log file).
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import traceback
from collections.abc import Sequence
from pathlib import Path

from pipeline import __version__
from pipeline.cli import check, demo, lots, profile, regrade, review, station, verify
from pipeline.cli.exits import EXIT_BUG, EXIT_INTERRUPTED, EXIT_USER
from pipeline.errors import FormgateError


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="formgate",
        description="Judge battery cells after formation and grading, and certify them.",
    )
    parser.add_argument("--version", action="version", version=f"formgate {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for family in (check, profile, station, lots, review, regrade, verify, demo):
        family.add_commands(sub)
    return parser


def report_bug(exc: BaseException) -> int:
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
        return report_bug(exc)
