"""The command line's entry point: the parser of every command family, exit codes, bugs.

Argument parsing and exit codes only. Each command family has its module (check.py,
profile.py, station.py, lots.py, channels.py, review.py, regrade.py, verify.py, plant.py,
demo.py) with a plain function per command that returns an exit code, and adds its
sub-commands to the parser here, in the order `formgate --help` shows them. A command given
by name loads only its own family's module (a command starts in a fresh process every
time: what it does not use, it does not import); help, a version or a mistyped command
loads them all. A FormgateError or
an OSError is the user's to fix (exit 2); any other exception is a bug (exit 3, details in
a log file).
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
from collections.abc import Sequence
from pathlib import Path

from pipeline import __version__
from pipeline.cli.exits import EXIT_BUG, EXIT_INTERRUPTED, EXIT_USER
from pipeline.cli.starting import as_program, importing

# The command families (modules of pipeline.cli), in the order `formgate --help` shows them,
# and the family of each command.
FAMILIES = ("check", "profile", "station", "lots", "channels", "review", "regrade", "verify", "plant",
            "demo")
COMMANDS = {
    "check": "check",
    "rules": "check",
    "profile": "profile",
    "init": "station",
    "watch": "station",
    "status": "station",
    "mail": "station",
    "lot": "lots",
    "cell": "lots",
    "channel": "channels",
    "review": "review",
    "regrade": "regrade",
    "verify": "verify",
    "plant": "plant",
    "demo": "demo",
}


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """The parser of every command, or only of ``command``'s family when it is one of them."""
    parser = argparse.ArgumentParser(
        prog="formgate",
        description="Judge battery cells after formation and grading, and certify them.",
    )
    parser.add_argument("--version", action="version", version=f"formgate {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    family = COMMANDS.get(command or "")
    for name in FAMILIES if family is None else (family,):
        importlib.import_module(f"pipeline.cli.{name}").add_commands(sub)
    return parser


def report_bug(exc: BaseException) -> int:
    """One line for the user, the traceback and versions in a log file (exit 3)."""
    import platform
    import tempfile
    import traceback

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
    """Run the command in ``argv``; without ``argv``, the program's own (sys.argv), as the
    formgate script and ``python -m pipeline`` run it: then this process runs that one command."""
    for key, value in SINGLE_THREADED_MATH.items():
        os.environ.setdefault(key, value)  # before numpy is imported; a user's choice stands
    if argv is None:
        as_program()  # its imports may be kept out of the garbage collector's way (starting.py)
    words = sys.argv[1:] if argv is None else list(argv)
    with importing():
        # the command is the first word, as the parser reads it (a word after an option such
        # as --help is not a command: then every family is loaded, as for a mistyped command)
        parser = build_parser(words[0] if words else None)
        args = parser.parse_args(words)
        from pipeline.errors import FormgateError

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
