"""The `formgate lot ...` and `formgate cell show` commands: a station's lots and a cell's history.

Argument parsing and printing only; the ledger (pipeline.ledger) holds the
history and pipeline.station.lots closes and reports a lot. Each command reads the
station folder's station.toml, ledger and rules folder, and is safe beside a running
station (SQLite's write-ahead log lets a reader in while the station writes; a close
waits for the station's write to finish).
"""

from __future__ import annotations

import argparse
import datetime
import json
from pathlib import Path
from typing import Any

from pipeline.cli.exits import EXIT_OK
from pipeline.errors import FormgateError


def _open(folder: str) -> tuple[Any, Any]:
    from pipeline.ledger.ledger import Ledger
    from pipeline.station.settings import read_settings

    settings = read_settings(Path(folder))
    if not settings.ledger.exists():
        raise FormgateError(
            f"{settings.ledger}: the station has no ledger yet",
            None,
            "Start the station (formgate watch) and let it judge a file first.",
        )
    return settings, Ledger(settings.ledger)


def _known_lot(ledger: Any, lot: str, refused: dict[str, list[Any]] | None = None) -> None:
    """Refuse a lot the ledger does not know (nor a quarantined file names, in ``refused``)."""
    names = sorted(set(ledger.lots.names()) | set(refused or {}))
    if lot not in names:
        from pipeline.rulebook.tables import did_you_mean

        raise FormgateError(
            f"the ledger has no lot {lot!r}",
            None,
            did_you_mean(lot, names)
            + ("Lots: " + ", ".join(names[:20]) if names else "It holds no lot yet.")
            + " (formgate lot list shows them).",
        )


def _counts(counts: dict[str, int], refused: int = 0) -> str:
    text = ", ".join(f"{counts.get(k, 0)} {k}" for k in ("pass", "fail", "hold"))
    # a cell whose file could not be judged has no decision: it is counted as what it is
    return text + (f", {refused} not judged" if refused else "")


def _refused(settings: Any, ledger: Any, lot: str | None = None) -> dict[str, list[Any]]:
    """Lot -> the cells named by files that could not be judged (station/unjudged.py)."""
    from pipeline.station.unjudged import unjudged_cells

    out: dict[str, list[Any]] = {}
    for cell in unjudged_cells(settings, ledger, lot):
        out.setdefault(cell.lot, []).append(cell)
    return out


def cmd_lot_list(args: argparse.Namespace) -> int:
    """Every lot: cells, latest decisions counted, last activity, closed or open."""
    settings, ledger = _open(args.folder)
    with ledger:
        refused = _refused(settings, ledger)
        names = sorted(set(ledger.lots.names()) | set(refused))
        if not names:
            print("no lots yet")
            return EXIT_OK
        for name in names:
            lot = ledger.lots.get(name)
            mine = refused.get(name, [])
            times = [t for t in (lot.last_activity, *(c.quarantined_at for c in mine)) if t]
            last = max(times).isoformat(timespec="seconds") if times else "-"
            state = (
                f"closed {lot.closed_at.isoformat(timespec='seconds')} ({lot.closed_by})"
                if lot.closed_at else "open"
            )
            print(f"{name}: {lot.cells + len(mine)} cell(s): {_counts(lot.counts, len(mine))}; "
                  f"last activity {last}; {state}")
    return EXIT_OK


def cmd_lot_show(args: argparse.Namespace) -> int:
    """One lot: every cell with its latest decision, fails and holds first, then the cells
    whose file could not be judged."""
    settings, ledger = _open(args.folder)
    with ledger:
        refused = _refused(settings, ledger, args.lot)
        _known_lot(ledger, args.lot, refused)
        lot = ledger.lots.get(args.lot)
        mine = refused.get(args.lot, [])
        print(f"lot {args.lot}: {lot.cells + len(mine)} cell(s): {_counts(lot.counts, len(mine))}; "
              + ("closed " + lot.closed_at.isoformat(timespec="seconds") if lot.closed_at
                 else "open"))
        if lot.report_path:
            from pipeline.station.published_files import located

            # where they are now: the paths recorded at close may be of another working folder
            print(f"  report {located(settings, lot.report_path)}\n"
                  f"  export {located(settings, lot.export_path or '-')}")
        cells = sorted(
            {r.cell_id for r in ledger.results.current_of_lot(args.lot)}
            | {s.reading.cell_id for s in ledger.readings.of(args.lot)}
        )
        order = {"fail": 0, "hold": 1, "pass": 3}  # a cell not judged comes before the passes
        decisions = ledger.decisions.latest_of_lot(args.lot)
        rows: list[tuple[int, str, str]] = []  # (rank, cell, its line)
        for cell in cells:
            d = decisions.get(cell)
            if d is None:
                rows.append((4, cell, f"  {cell}  undecided"))
                continue
            grade = f"  grade {d.grade}" if d.grade else ""
            rows.append((order.get(d.verdict, 4), cell, f"  {cell}  {d.verdict}{grade}"
                         + (f": {d.reason}" if d.reason else "")))
        rows += [
            (2, u.cell_id, f"  {u.cell_id}  not judged: {u.reason} (in quarantine: {u.path})")
            for u in mine
        ]
        for _, _, line in sorted(rows):
            print(line)
    return EXIT_OK


def _close_or_report(args: argparse.Namespace, *, close: bool) -> int:
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.station.lots import close_and_report

    settings, ledger = _open(args.folder)
    rulebook = load_rules_dir(settings.rules_dir)
    now = datetime.datetime.now(datetime.UTC).replace(microsecond=0)
    with ledger:
        _known_lot(ledger, args.lot, _refused(settings, ledger, args.lot))
        outcome = close_and_report(
            settings, ledger, rulebook, args.lot, by="command", now=now, close=close
        )
    if close and not outcome.newly_closed:
        print(f"lot {args.lot} was closed before; its decisions and report are brought up to date")
    tally = outcome.closed.statistics.tally
    shown = f"{100 * tally.yield_fraction:.1f} %" if tally.yield_fraction is not None else "n/a"
    print(f"lot {args.lot}: {tally.n} cell(s), yield {shown} "
          f"({', '.join(f'{n} {v}' for v, n in tally.by_verdict.items() if n)})")
    for cell in outcome.changed:
        c = next(x for x in outcome.closed.cells if x.cell_id == cell)
        print(f"  {cell}: {c.before_screens.verdict} -> {c.decision.verdict}: {c.decision.reason}")
    print(f"  report {outcome.report}\n  export {outcome.export}")
    return EXIT_OK


def cmd_lot_close(args: argparse.Namespace) -> int:
    """Close a lot: its screens apply, every cell's decision is recorded, report and export."""
    return _close_or_report(args, close=True)


def cmd_lot_report(args: argparse.Namespace) -> int:
    """Write the lot's report and export as it stands, without closing it."""
    return _close_or_report(args, close=False)


def cmd_cell_show(args: argparse.Namespace) -> int:
    """A cell's history: every record, reading file, decision and review, oldest first."""
    _, ledger = _open(args.folder)
    with ledger:
        lots = (args.lot and [args.lot]) or [
            name for name in ledger.lots.names()
            if ledger.results.of_cell(name, args.cell) or ledger.readings.of(name, args.cell)
        ]
        if not lots:
            raise FormgateError(f"the ledger has no cell {args.cell!r}", None,
                                "Check the cell id (formgate lot show LOT lists a lot's cells).")
        for lot in lots:
            print(f"cell {args.cell}, lot {lot}")
            results = ledger.results.of_cell(lot, args.cell)
            print(f"  records ({len(results)})")
            for n, r in enumerate(results, 1):
                doc = json.loads(r.result_json)
                stages = " and ".join(doc.get("stages") or ("formation", "grading"))
                decided = f": {doc.get('decision')}" if r.verdict != "pass" else ""
                gone = "  (superseded)" if r.superseded_by else ""
                gone += f"  (judged again by regrade {r.regrade_id})" if r.regrade_id else ""
                print(f"    {n} of {len(results)}  {r.analysed_at.isoformat(timespec='seconds')}  "
                      f"{doc['input']['name']}  {stages}  {r.verdict}{decided}{gone}")
            readings = ledger.readings.of(lot, args.cell)
            if readings:
                print(f"  aging readings ({len(readings)})")
                for s in readings:
                    print(f"    {s.reading.at.isoformat(timespec='seconds')}  "
                          f"{s.reading.ocv_v:.4f} V  {s.file_name} line {s.reading.line}")
            decisions = ledger.decisions.of_cell(lot, args.cell)
            print(f"  decisions ({len(decisions)})")
            for d in decisions:
                grade = f" grade {d.grade}" if d.grade else ""
                print(f"    {d.decided_at.isoformat(timespec='seconds')}  {d.verdict}{grade}  "
                      f"({_cause(ledger, d)})" + (f": {d.reason}" if d.reason else ""))
            reviews = ledger.reviews.of_cell(lot, args.cell)  # who decided what, and why
            if reviews:
                print(f"  reviews ({len(reviews)})")
            for v in reviews:
                what = f"retest of {v.stage}" if v.action == "retest" else v.action
                accepts = f"; accepts {', '.join(v.accepts)}" if v.accepts else ""
                print(f"    {v.reviewed_at.isoformat(timespec='seconds')}  {what} by {v.reviewer}"
                      f"{accepts}: {v.reason}")
    return EXIT_OK


def _cause(ledger: Any, decision: Any) -> str:
    """A decision's cause in words: a regrade names itself, the rule set and revision that
    judged this cell again (not every rule set of the run), and its reason."""
    if decision.cause != "regrade":
        return str(decision.cause)
    ids = [b.partition(":")[2] for b in decision.basis if b.startswith("regrade:")]
    row = ledger.regrades.get(int(ids[-1])) if ids and ids[-1].isdigit() else None
    if row is None:
        return "regrade"
    # the rule sets of the cell's own judgements in the regrade; the run's if it has none
    judged = ledger.regrades.rule_sets_of_cell(row.id, decision.lot, decision.cell_id) or [
        (name, revision) for name, revision, _ in row.rule_sets]
    rules = ", ".join(f"{name} {revision}" for name, revision in judged)
    return f"regrade {row.id} under {rules}: {row.reason}"


def add_commands(sub: Any) -> None:
    """Add `lot` and `cell` to the command line's sub-commands."""
    lot = sub.add_parser("lot", help="a station's lots: list, show, close, report",
                         epilog="example: formgate lot show station/ DEMO-LOT-01")
    lot_sub = lot.add_subparsers(dest="lot_command", required=True, metavar="ACTION")
    listing = lot_sub.add_parser("list", help="every lot with its counts and whether it is closed")
    listing.add_argument("folder", metavar="FOLDER", help="the station folder")
    listing.set_defaults(func=cmd_lot_list)
    for name, func, text in (
        ("show", cmd_lot_show, "every cell of a lot with its latest decision"),
        ("close", cmd_lot_close, "close a lot: apply its screens, record its cells' decisions "
         "and grades, write its report and export"),
        ("report", cmd_lot_report, "write a lot's report and export as it stands, without "
         "closing it"),
    ):
        p = lot_sub.add_parser(name, help=text, description=text[0].upper() + text[1:] + ".")
        p.add_argument("folder", metavar="FOLDER", help="the station folder")
        p.add_argument("lot", metavar="LOT", help="the lot")
        p.set_defaults(func=func)
    cell = sub.add_parser("cell", help="a cell's history",
                          epilog="example: formgate cell show station/ L01-011")
    cell_sub = cell.add_subparsers(dest="cell_command", required=True, metavar="ACTION")
    show = cell_sub.add_parser("show", help="every record, reading, decision and review of a cell",
                               description="Every record, aging reading, decision and review of "
                                           "a cell.")
    show.add_argument("folder", metavar="FOLDER", help="the station folder")
    show.add_argument("cell", metavar="CELL", help="the cell id")
    show.add_argument("--lot", help="only in this lot (a cell id may recur in several lots)")
    show.set_defaults(func=cmd_cell_show)
