"""The `formgate plant ...` commands: the plant database that every station forwards its ledger to.

Argument parsing and printing only; pipeline.plant holds the queries and the decisions.
Each command connects with ``--database URL`` (the password as libpq finds it: a
``~/.pgpass`` file or PGPASSWORD, as for psql) or with ``--station FOLDER`` (that
station's [plant] settings and password file). A cell whose records are at several
stations is decided by the plant here, and the decision recorded in the plant database
under the name of whoever ran the command; the command that decides or reviews it sends its
letters with the [smtp] and [mail] settings of ``--letters FOLDER`` (or of ``--station``),
and says on stderr which letters are due when it was given none (docs/plant.md).
"""

from __future__ import annotations

import argparse
import datetime
import functools
import getpass
import os
import socket
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from pipeline.acceptance.rules import STAGES
from pipeline.cli.exits import EXIT_OK, EXIT_USER
from pipeline.errors import FormgateError


def _connect(args: argparse.Namespace) -> Any:
    import psycopg

    from pipeline.plant.connect import PlantTarget

    if args.station:
        from pipeline.station.plantfeed import plant_target
        from pipeline.station.settings import read_settings

        settings = read_settings(Path(args.station))
        if settings.plant is None:
            raise FormgateError(f"{settings.source}: the station names no [plant] database", None,
                                "Add [plant] database = \"postgresql://…\", or give --database.")
        target = plant_target(settings.plant)
    elif args.database:
        from pipeline.plant.connect import url_problem

        problem = url_problem(args.database)
        if problem is not None:
            raise FormgateError(f"--database cannot be used: {problem}", None,
                                "Give postgresql://ROLE@HOST:PORT/DATABASE; keep the password in "
                                "~/.pgpass or PGPASSWORD.")
        target = PlantTarget(args.database, "plant command")
    else:
        raise FormgateError("no plant database given", None,
                            "Give --database postgresql://ROLE@HOST:PORT/DATABASE, or --station "
                            "FOLDER of a station whose station.toml names it under [plant].")
    try:
        return psycopg.connect(target.conninfo(), autocommit=True)
    except psycopg.OperationalError as exc:
        raise FormgateError(f"cannot connect to the plant database {target.shown()} "
                            f"({str(exc).strip().splitlines()[0]})", None,
                            "Check the address, the role and its password, and that the "
                            "database server runs.") from None


def _mail(args: argparse.Namespace) -> Any:
    """The plant's mail settings (a PlantMail) from ``--letters FOLDER``, else from ``--station``'s
    station.toml; None when neither is given."""
    folder = getattr(args, "letters", None) or args.station
    if not folder:
        return None
    from pipeline.plant.letters import mail_settings
    from pipeline.station.settings import read_settings, smtp_settings

    settings = read_settings(Path(folder))
    return mail_settings(smtp_settings(settings, os.environ), settings.routing, settings.source)


def _letters(conn: Any, scope: list[tuple[str, str | None]] | None, mail: Any) -> int:
    """Send the letters the plant decisions in ``scope`` call for; tell of them on stderr.
    EXIT_USER when one could not be sent (it stays due), else EXIT_OK."""
    from pipeline.plant.letters import report_lines, send_letters

    report = send_letters(conn, scope, mail, sent_by=_who(), now=_now())
    for line in report_lines(report, mail):
        print(line, file=sys.stderr)
    return EXIT_USER if report.failed else EXIT_OK


def _database_errors(func: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    """A database that refuses a statement (a role without the grant, a connection lost) is the
    user's to fix (exit 2), not a bug."""

    @functools.wraps(func)
    def run(args: argparse.Namespace) -> int:
        import psycopg

        try:
            return func(args)
        except psycopg.Error as exc:
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            hint = ("Ask the plant database's owner for the grants in docs/plant.md (Roles and "
                    "grants)." if isinstance(exc, psycopg.errors.InsufficientPrivilege) else
                    "Check that the database server runs and can be reached, and try again.")
            raise FormgateError(f"the plant database refused: {first}", None, hint) from None

    return run


def _who() -> str:
    return f"{getpass.getuser()}@{socket.gethostname()}"


def _now() -> datetime.datetime:
    return datetime.datetime.now(datetime.UTC)


def _time(at: datetime.datetime | None) -> str:
    return "-" if at is None else at.astimezone(datetime.UTC).isoformat(timespec="seconds")


@_database_errors
def cmd_migrate(args: argparse.Namespace) -> int:
    """Set up or bring up to date the plant's schema (as the role that owns it)."""
    from pipeline.plant.schema import PLANT_SCHEMA_VERSION, migrate

    with _connect(args) as conn:
        conn.autocommit = False
        done = migrate(conn, where="")
    print(f"plant schema at version {PLANT_SCHEMA_VERSION}"
          + (f" (applied: {', '.join(done)})" if done else " (nothing to do)"))
    return EXIT_OK


@_database_errors
def cmd_cell_show(args: argparse.Namespace) -> int:
    """A cell at every station: its records, readings, each station's decision, the plant's."""
    from pipeline.plant.cells import decide_in_plant, fetch_cell, lots_of_cell

    mail = _mail(args)
    with _connect(args) as conn:
        lots = [args.lot] if args.lot else lots_of_cell(conn, args.cell)
        if not lots:
            raise FormgateError(f"the plant database has no cell {args.cell!r}", None,
                                "Check the cell id (formgate plant find CELL looks for it).")
        for lot in lots:
            cell = fetch_cell(conn, lot, args.cell)
            print(f"cell {args.cell}, lot {lot}, at {len(cell.stations)} station(s): "
                  f"{', '.join(cell.stations)}")
            print(f"  records ({len(cell.records)})")
            for r in cell.records:
                stages = " and ".join(r.document.get("stages") or ("formation", "grading"))
                why = f": {r.document.get('decision')}" if r.verdict != "pass" else ""
                print(f"    {_time(r.analysed_at)}  station {r.station_id}  {r.input_name}  "
                      f"{stages}  {r.verdict}{why}")
            if cell.readings:
                print(f"  aging readings ({len(cell.readings)})")
                for station, name, _, reading in cell.readings:
                    print(f"    {_time(reading.at)}  {reading.ocv_v:.4f} V  station {station}  "
                          f"{name} line {reading.line}")
            print(f"  station decisions ({len(cell.decisions)})")
            for d in cell.decisions:
                print(f"    station {d.station_id}  {_time(d.decided_at)}  {d.verdict}  ({d.cause})"
                      + (f": {d.reason}" if d.reason else ""))
            made = decide_in_plant(conn, cell, decided_by=_who(), now=_now())
            if made is None:
                print("  plant decision: none (every record is at one station, which decides it)")
                continue
            decision, new = made
            print(f"  plant decision{' (new)' if new and decision.id else ''}: {decision.verdict}"
                  + (f": {decision.reason}" if decision.reason else "")
                  + (f"  hazard: {', '.join(decision.hazards)}" if decision.hazards else ""))
            print(f"    over {', '.join(decision.stations)}, rule set {decision.rule_set_sha256[:16]}, "
                  f"by {decision.decided_by} at {_time(decision.decided_at)}")
        return _letters(conn, [(lot, args.cell) for lot in lots], mail)


@_database_errors
def cmd_lot_show(args: argparse.Namespace) -> int:
    """Every station's cells of a lot with their standing decisions, one yield, the screens."""
    from pipeline.plant.lots import Books, lot_cells, screens_text

    mail = _mail(args)
    with _connect(args) as conn:
        cells, held = lot_cells(conn, args.lot, decided_by=_who(), now=_now())
        stations = sorted({s for c in cells for s in c.stations})
        counts = {v: sum(c.verdict == v for c in cells) for v in ("pass", "fail", "hold", "")}
        share = 100.0 * counts["pass"] / len(cells)
        print(f"lot {args.lot}: {len(cells)} cell(s) at {len(stations)} station(s) "
              f"({', '.join(stations)}): {counts['pass']} pass, {counts['fail']} fail, "
              f"{counts['hold']} hold" + (f", {counts['']} not decided" if counts[""] else "")
              + f"; yield {share:.1f} %")
        order = {"fail": 0, "hold": 1, "": 2, "pass": 3}
        for c in sorted(cells, key=lambda c: (order[c.verdict], c.cell_id)):
            print(f"  {c.cell_id}  {c.verdict or 'not decided'}"
                  + (f": {c.reason}" if c.reason and c.verdict else "")
                  + f"  ({c.decided_by or 'no decision'}; {', '.join(c.stations)})")
        for line in screens_text(args.lot, held, Books(conn)):
            print(line)
        return _letters(conn, [(args.lot, None)], mail)


@_database_errors
def cmd_lot_export(args: argparse.Namespace) -> int:
    """One row per cell of the lot over every station, as CSV or Parquet (by the file's suffix)."""
    from pipeline.plant.lots import export_csv, export_parquet, lot_cells
    from pipeline.writing import write_atomic

    out = Path(args.out)
    if out.suffix.lower() not in (".csv", ".parquet"):
        raise FormgateError(f"{out}: the export is written as .csv or .parquet", None,
                            "Name the file LOT.csv or LOT.parquet.")
    mail = _mail(args)
    with _connect(args) as conn:
        cells, _ = lot_cells(conn, args.lot, decided_by=_who(), now=_now())
        data = export_parquet(cells) if out.suffix.lower() == ".parquet" else export_csv(cells)
        write_atomic(data, out)
        print(f"{out}: {len(cells)} cell(s)")
        return _letters(conn, [(args.lot, None)], mail)


@_database_errors
def cmd_yield(args: argparse.Namespace) -> int:
    """Cells, passes and yield by station, cell type or day, over every lot."""
    from pipeline.plant.lots import yield_rows

    since = None
    if args.since:
        try:
            since = datetime.datetime.fromisoformat(args.since).replace(tzinfo=datetime.UTC)
        except ValueError:
            raise FormgateError(f"--since {args.since!r} is not a date", None,
                                "Give a date as YYYY-MM-DD (UTC).") from None
    mail = _mail(args)
    with _connect(args) as conn:
        rows = yield_rows(conn, args.by, decided_by=_who(), now=_now(), since=since)
        if not rows:
            print("no cells yet")
            return EXIT_OK
        width = max(len(args.by), *(len(r[0]) for r in rows))
        print(f"{args.by:<{width}}  cells   pass   fail   hold   yield")
        for group, cells, passed, failed, held in rows:
            print(f"{group:<{width}}  {cells:5d}  {passed:5d}  {failed:5d}  {held:5d}  "
                  f"{100.0 * passed / cells:5.1f} %")
        return _letters(conn, None, mail)


@_database_errors
def cmd_find(args: argparse.Namespace) -> int:
    """Every input with this SHA-256, or every record of a cell with this id, at every station."""
    from pipeline.plant.lots import find

    with _connect(args) as conn:
        lines = find(conn, args.text)
    if not lines:
        raise FormgateError(f"the plant database holds no input or cell {args.text!r}", None,
                            "Give a cell id or an input file's SHA-256 (64 hex digits).")
    for line in lines:
        print(line)
    return EXIT_OK


def _review(args: argparse.Namespace, action: str) -> int:
    from pipeline.judge.review import Asked
    from pipeline.plant.cells import lots_of_cell
    from pipeline.plant.reviews import record_plant_review

    asked = Asked(action, args.by or getpass.getuser(), args.reason,
                  getattr(args, "stage", None), tuple(getattr(args, "accept", None) or ()))
    mail = _mail(args)
    with _connect(args) as conn:
        lots = [args.lot] if args.lot else lots_of_cell(conn, args.cell)
        if len(lots) != 1:
            raise FormgateError(
                f"the plant database has {'no' if not lots else 'several'} cell {args.cell!r}"
                + (f" (lots {', '.join(lots)})" if lots else ""), None,
                "Give --lot LOT." if lots else "Check the cell id (formgate plant find CELL).")
        was, gave = record_plant_review(conn, lots[0], args.cell, asked, recorded_by=_who(),
                                        now=_now())
        print(f"cell {args.cell}, lot {lots[0]}: {gave.verdict}"
              + (f": {gave.reason}" if gave.reason else ""))
        print(f"  was {was.verdict}" + (f": {was.reason}" if was.reason else "")
              + f"; over {', '.join(gave.stations)}; recorded in the plant database")
        return _letters(conn, [(lots[0], args.cell)], mail)


@_database_errors
def cmd_review_release(args: argparse.Namespace) -> int:
    """Release a held cell of several stations, or a failed one as a concession."""
    return _review(args, "release")


@_database_errors
def cmd_review_reject(args: argparse.Namespace) -> int:
    """Reject a held or failed cell of several stations."""
    return _review(args, "reject")


@_database_errors
def cmd_review_retest(args: argparse.Namespace) -> int:
    """Hold a cell of several stations until a new record of one stage decides it again."""
    return _review(args, "retest")


def cmd_resend(args: argparse.Namespace) -> int:
    """Log a station's every row to be forwarded again (the plant restored from a backup)."""
    from pipeline.ledger.ledger import Ledger
    from pipeline.plant.forward import resend_all
    from pipeline.station.settings import read_settings

    settings = read_settings(Path(args.folder))
    if not settings.ledger.exists():
        raise FormgateError(f"{settings.ledger}: the station has no ledger yet", None,
                            "Nothing to forward: its first start forwards what it records.")
    with Ledger(settings.ledger) as ledger:
        logged = resend_all(ledger)
    print(f"{logged:,} rows of {settings.station_name} to be forwarded again; the station's feed "
          "sends them (rows the plant holds are not stored twice)")
    return EXIT_OK


@_database_errors
def cmd_verify(args: argparse.Namespace) -> int:
    """A station's ledger against what the plant holds for it: rows, their hashes, input SHA-256s."""
    from pipeline.cli.exits import EXIT_REJECTED
    from pipeline.ledger.ledger import Ledger
    from pipeline.plant.verify import compare, report_lines
    from pipeline.station.settings import read_settings

    settings = read_settings(Path(args.folder))
    if not settings.ledger.exists():
        raise FormgateError(f"{settings.ledger}: the station has no ledger yet", None,
                            "Nothing to compare: a station records its first rows when it runs.")
    station_id = settings.plant.station_id if settings.plant else settings.station_name
    if not args.database:
        args.station = args.folder
    with _connect(args) as conn, Ledger(settings.ledger) as ledger:
        comparison = compare(ledger, conn, station_id)
    for line in report_lines(comparison):
        print(line)
    return EXIT_OK if comparison.same else EXIT_REJECTED


def cmd_demo(args: argparse.Namespace) -> int:
    """Two demo stations on one PostgreSQL database of the demo's own; the plant's view of them."""
    from pipeline.demo.plant_demo import run_plant_demo

    return run_plant_demo(Path(args.folder) if args.folder else None)


def _where(p: argparse.ArgumentParser) -> None:
    p.add_argument("--database", metavar="URL",
                   help="the plant database, postgresql://ROLE@HOST:PORT/DATABASE (the password "
                        "from ~/.pgpass or PGPASSWORD)")
    p.add_argument("--station", metavar="FOLDER",
                   help="use the [plant] settings and password file of this station instead")


def _letters_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--letters", metavar="FOLDER",
                   help="send the letters of the plant's decisions with the [smtp] and [mail] "
                        "settings of this folder's station.toml (default: --station's)")


def add_commands(sub: Any) -> None:
    """Add `plant` to the command line's sub-commands."""
    plant = sub.add_parser("plant", help="the plant database: cells and lots over every station",
                           epilog="example: formgate plant lot show DEMO-LOT-01 --station station/")
    plant_sub = plant.add_subparsers(dest="plant_command", required=True, metavar="WHAT")
    migrate = plant_sub.add_parser("migrate", help="set up or update the plant database's schema",
                                   description="Set up or update the plant database's schema, as "
                                               "the role that owns it.")
    _where(migrate)
    migrate.set_defaults(func=cmd_migrate)
    cell = plant_sub.add_parser("cell", help="a cell over every station")
    cell_sub = cell.add_subparsers(dest="plant_cell_command", required=True, metavar="ACTION")
    show = cell_sub.add_parser("show", help="a cell's records and decisions at every station, and "
                                            "the plant's decision",
                               description="A cell's records, readings and decisions at every "
                                           "station, and the plant's decision of a cell that ran at "
                                           "several.")
    show.add_argument("cell", metavar="CELL", help="the cell id")
    show.add_argument("--lot", help="only in this lot")
    _where(show)
    _letters_option(show)
    show.set_defaults(func=cmd_cell_show)
    lot = plant_sub.add_parser("lot", help="a lot over every station")
    lot_sub = lot.add_subparsers(dest="plant_lot_command", required=True, metavar="ACTION")
    lshow = lot_sub.add_parser("show", help="every station's cells of a lot, one yield, the screens",
                               description="Every station's cells of a lot with their standing "
                                           "decisions, one yield, and the lot's screens over them.")
    lshow.add_argument("lot", metavar="LOT", help="the lot")
    _where(lshow)
    _letters_option(lshow)
    lshow.set_defaults(func=cmd_lot_show)
    export = lot_sub.add_parser("export", help="one row per cell of a lot, as CSV or Parquet",
                                description="One row per cell of a lot over every station, as CSV "
                                            "or Parquet (by the file's suffix).")
    export.add_argument("lot", metavar="LOT", help="the lot")
    export.add_argument("--out", metavar="FILE", required=True,
                        help="the file to write: .csv or .parquet")
    _where(export)
    _letters_option(export)
    export.set_defaults(func=cmd_lot_export)
    yields = plant_sub.add_parser("yield", help="yield by station, cell type or day",
                                  description="Cells, passes and yield by station, cell type or "
                                              "day (UTC) of the cell's latest record.")
    yields.add_argument("--by", choices=("station", "cell-type", "day"), default="station",
                        help="how to group the cells (default: station)")
    yields.add_argument("--since", metavar="DATE",
                        help="only cells whose latest record is of this day (UTC) or later")
    _where(yields)
    _letters_option(yields)
    yields.set_defaults(func=cmd_yield)
    find = plant_sub.add_parser("find", help="a cell by its id, or an input by its SHA-256",
                                description="Every record of a cell, or every input with a "
                                            "SHA-256, at every station.")
    find.add_argument("text", metavar="CELL_OR_SHA256", help="a cell id or an input's SHA-256")
    _where(find)
    find.set_defaults(func=cmd_find)
    review = plant_sub.add_parser("review", help="a person's decision on a cell of several stations")
    review_sub = review.add_subparsers(dest="plant_review_command", required=True, metavar="ACTION")
    for name, func, text in (
        ("release", cmd_review_release, "release a held cell of several stations, or a failed "
         "one as a concession"),
        ("reject", cmd_review_reject, "reject a held or failed cell of several stations"),
        ("retest", cmd_review_retest, "hold a cell of several stations until a new record of one "
         "stage decides it again"),
    ):
        p = review_sub.add_parser(name, help=text, description=text[0].upper() + text[1:] + ".")
        p.add_argument("cell", metavar="CELL", help="the cell id")
        if name == "release":
            p.add_argument("--accept", action="append", metavar="CHECK",
                           help="a failed check the concession accepts (its id in the result "
                                "JSON); once per failed check")
        if name == "retest":
            p.add_argument("stage", metavar="STAGE", choices=STAGES,
                           help=f"the stage to test again: {', '.join(STAGES)}")
        p.add_argument("--reason", required=True, help="why: recorded with the review")
        p.add_argument("--by", metavar="NAME", help="who decides (default: the operating-system user)")
        p.add_argument("--lot", help="the cell's lot, when its id recurs in several lots")
        _where(p)
        _letters_option(p)
        p.set_defaults(func=func)
    resend = plant_sub.add_parser("resend", help="forward a station's whole ledger again",
                                  description="Log every row of a station's ledger to be "
                                              "forwarded again, after the plant database was "
                                              "restored from an older backup.")
    resend.add_argument("folder", metavar="FOLDER", help="the station folder")
    resend.set_defaults(func=cmd_resend)
    verify = plant_sub.add_parser(
        "verify", help="compare a station's ledger with what the plant holds for it",
        description="Compare a station's ledger with the plant database's rows for that station: "
                    "per forwarded table the rows by key and by hash, and the input SHA-256s.")
    verify.add_argument("folder", metavar="FOLDER", help="the station folder")
    verify.add_argument("--database", metavar="URL",
                        help="the plant database, postgresql://ROLE@HOST:PORT/DATABASE (default: "
                             "the station's [plant] settings and password file)")
    verify.set_defaults(func=cmd_verify, station=None)
    demo = plant_sub.add_parser(
        "demo", help="two demo stations on one PostgreSQL database of the demo's own",
        description="Start a PostgreSQL server in a temporary folder (its binaries from the "
                    "operating system), run two demo stations on it, one forming and one "
                    "grading cells of an invented lot, and show the plant's lot and a cell of "
                    "both stations, with the plant's letters.")
    demo.add_argument("folder", nargs="?", metavar="FOLDER",
                      help="folder for the two stations and the quality desk (default: a new "
                           "temporary folder)")
    demo.set_defaults(func=cmd_demo)
