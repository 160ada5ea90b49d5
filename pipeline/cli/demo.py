"""`formgate demo`: a station on invented lots fed by a simulated cycler (or, with --batch, a check).

Argument parsing only; the demo part (pipeline.demo) simulates, runs and shows.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path
from typing import Any

from pipeline.cli.check import analysis_time


def cmd_demo(args: argparse.Namespace) -> int:
    """Run a station on the invented demo lots (or, with --batch, just check them)."""
    if args.batch:
        from pipeline.demo.batch import run_demo

        return run_demo(Path(args.folder or "demo-output"), analysed_at=analysis_time(None, os.environ))
    from pipeline.demo.station_demo import run_station_demo

    return run_station_demo(Path(args.folder) if args.folder else None)


def add_commands(sub: Any) -> None:
    """Add `demo` to the command line's sub-commands."""
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
