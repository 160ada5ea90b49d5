"""The `formgate review ...` commands: a person's decision on a held or failed cell, and the cells that wait.

Argument parsing and printing only; pipeline.station.reviewing records a review (with the
decision it gives and its letter, in one transaction that refuses when the cell's decision
changed meanwhile) and pipeline.judge.review decides what a review may do. Each command
reads the station folder's station.toml, ledger and rules folder, and is safe beside a
running station (SQLite's write-ahead log) as on a stopped one. ISO 9001:2015 clause 8.7
(control of nonconforming outputs) asks for the record each review makes: the
nonconformity, the action, any concession and who decided.
"""

from __future__ import annotations

import argparse
import datetime
import functools
import getpass
import sys
from typing import Any

from pipeline.acceptance.rules import STAGES
from pipeline.cli.exits import EXIT_OK
from pipeline.cli.lots import _known_lot, _open
from pipeline.errors import FormgateError


def cmd_review_list(args: argparse.Namespace) -> int:
    """The cells waiting for a person, oldest first: verdict, reason, how long they waited."""
    from pipeline.station.reviewing import age_words

    _, ledger = _open(args.folder)
    now = datetime.datetime.now(datetime.UTC)
    with ledger:
        waiting = ledger.reviews.waiting()
    if not waiting:
        print("no cell waits for a person")
        return EXIT_OK
    print(f"{len(waiting)} cell(s) wait for a person, oldest first")
    for lot, cell, verdict, reason, since in waiting:
        print(f"  {cell}  lot {lot}  {verdict} for {age_words((now - since).total_seconds())} "
              f"(since {since.isoformat(timespec='seconds')}): {reason}")
    return EXIT_OK


def _reviewer(args: argparse.Namespace) -> str:
    if args.by is not None:
        return str(args.by)
    try:
        return getpass.getuser()
    except (OSError, KeyError) as exc:  # no login name in this environment
        raise FormgateError(
            f"who is reviewing cannot be told from the system ({exc})", None,
            'Give the name with --by "NAME".',
        ) from exc


def _lot_of(ledger: Any, cell: str, lot: str | None) -> str:
    """The lot of ``cell``: ``lot`` when given, else the one lot that holds the cell."""
    if lot is not None:
        _known_lot(ledger, lot)
    candidates = [lot] if lot is not None else ledger.lots.names()
    lots = [name for name in candidates if ledger.decisions.latest(name, cell) is not None]
    if not lots:
        where = f" in lot {lot}" if lot is not None else ""
        raise FormgateError(f"the ledger has no decided cell {cell!r}{where}", None,
                            "Check the cell id (formgate review list shows the cells that wait).")
    if len(lots) > 1:
        raise FormgateError(
            f"cell {cell!r} is in {len(lots)} lots: {', '.join(lots)}", None,
            f"Say which with --lot, e.g. --lot {lots[0]}.",
        )
    return lots[0]


def _review(args: argparse.Namespace, action: str) -> int:
    from pipeline.judge.review import Asked
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.station.lots import report_closed_lot
    from pipeline.station.reviewing import record_review

    settings, ledger = _open(args.folder)
    rulebook = load_rules_dir(settings.rules_dir)
    asked = Asked(
        action, _reviewer(args), args.reason, getattr(args, "stage", None),
        tuple(dict.fromkeys(getattr(args, "accept", None) or ())),
    )
    now = datetime.datetime.now(datetime.UTC)
    with ledger:
        lot = _lot_of(ledger, args.cell, args.lot)
        done = record_review(settings, ledger, rulebook, lot=lot, cell_id=args.cell,
                             asked=asked, now=now,
                             report_lot=functools.partial(report_closed_lot, settings, ledger))
        certificate = _certificate(settings, ledger, rulebook, lot, args.cell, now)
    was, given = done.answered, done.decision
    print(f"cell {args.cell} of lot {lot}: review {done.review.id} by {done.review.reviewer} "
          "recorded")
    print(f"  was  {was.verdict}" + (f": {was.reason}" if was.reason else ""))
    print(f"  now  {given.verdict}" + (f" grade {given.grade}" if given.grade else "")
          + f": {given.reason}")
    if given.hazards:
        print(f"  hazards kept on its record: {', '.join(given.hazards)}")
    if certificate:
        print(f"  certificate {certificate}")
    if done.report is not None:
        print(f"  lot report {done.report} (and its export), written again: the lot is closed")
    return EXIT_OK


def _certificate(
    settings: Any, ledger: Any, rulebook: Any, lot: str, cell: str, now: datetime.datetime
) -> str:
    """Publish the cell's certificate now, so that it shows the review at once; "" when it
    cannot be written now (the review stands: the station publishes it when it runs)."""
    from pipeline.station.cellpublish import publish_cell_now

    try:
        published = publish_cell_now(settings, ledger, rulebook, lot, cell, now)
    except (FormgateError, OSError) as exc:
        print(f"formgate: the review is recorded, but the cell certificate cannot be written "
              f"now ({exc}); the station publishes it when it runs.", file=sys.stderr)
        return ""
    return "" if published.pdf_path is None else str(published.pdf_path)


def cmd_review_release(args: argparse.Namespace) -> int:
    """Release a held cell, or a failed one as a concession naming its failed checks."""
    return _review(args, "release")


def cmd_review_reject(args: argparse.Namespace) -> int:
    """Reject a held or failed cell."""
    return _review(args, "reject")


def cmd_review_retest(args: argparse.Namespace) -> int:
    """Hold a cell until a new record of one stage decides it again."""
    return _review(args, "retest")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("folder", metavar="FOLDER", help="the station folder")
    p.add_argument("cell", metavar="CELL", help="the cell id")


def _who_and_why(p: argparse.ArgumentParser) -> None:
    p.add_argument("--reason", required=True, help="why: recorded with the review and mailed")
    p.add_argument("--by", metavar="NAME",
                   help="who decides (default: the operating-system user)")
    p.add_argument("--lot", help="the cell's lot, when its id recurs in several lots")


def add_commands(sub: Any) -> None:
    """Add `review` to the command line's sub-commands."""
    review = sub.add_parser(
        "review", help="a person's decision on held and failed cells: list, release, reject, retest",
        epilog='example: formgate review release station/ L01-011 --reason "DCIR within the '
               'customer\'s wider window"',
    )
    review_sub = review.add_subparsers(dest="review_command", required=True, metavar="ACTION")
    listing = review_sub.add_parser(
        "list", help="the cells waiting for a person, oldest first",
        description="The cells waiting for a person (a fail, or a hold for a reason other than "
                    "a stage still to come, with no review since), oldest first.",
        epilog="example: formgate review list station/",
    )
    listing.add_argument("folder", metavar="FOLDER", help="the station folder")
    listing.set_defaults(func=cmd_review_list)
    release = review_sub.add_parser(
        "release", help="release a held cell, or a failed one as a concession",
        description="Release a held cell (it passes), or a failed one as a concession that "
                    "names every failed check with --accept.",
        epilog='example: formgate review release station/ L01-011 --accept capacity '
               '--reason "customer concession 14 accepts 1.75 Ah"',
    )
    _common(release)
    release.add_argument("--accept", action="append", metavar="CHECK",
                         help="a failed check the concession accepts (its id in the result "
                              "JSON); once per failed check")
    _who_and_why(release)
    release.set_defaults(func=cmd_review_release)
    reject = review_sub.add_parser(
        "reject", help="reject a held or failed cell",
        description="Reject a held or failed cell: it fails, keeping its hazards.",
        epilog='example: formgate review reject station/ L01-011 --reason "swollen at '
               'inspection"',
    )
    _common(reject)
    _who_and_why(reject)
    reject.set_defaults(func=cmd_review_reject)
    retest = review_sub.add_parser(
        "retest", help="hold a cell until a new record of one stage decides it again",
        description="Ask for one stage of a held or failed cell to be tested again: the cell is "
                    "held until that stage's next record, which decides it again.",
        epilog='example: formgate review retest station/ L01-011 grading --reason "channel 12 '
               'contact fault"',
    )
    _common(retest)
    retest.add_argument("stage", metavar="STAGE", choices=STAGES,
                        help=f"the stage to test again: {', '.join(STAGES)}")
    _who_and_why(retest)
    retest.set_defaults(func=cmd_review_retest)
