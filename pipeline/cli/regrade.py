"""`formgate regrade`: judge again what was judged, under a rules folder, on Dask; report, apply.

Argument parsing and printing only; the work is pipeline.regrade's (docs/regrade.md).
"""

from __future__ import annotations

import argparse
import datetime
import getpass
import os
import sys
from pathlib import Path
from typing import Any

from pipeline.cli.exits import EXIT_OK
from pipeline.errors import FormgateError


def _time(text: str | None, flag: str) -> datetime.datetime | None:
    if not text:
        return None
    try:
        value = datetime.datetime.fromisoformat(text)
    except ValueError:
        raise FormgateError(f"{flag} {text!r} is not a date and time", None,
                            "Write it in ISO 8601, e.g. 2026-11-01 or 2026-11-01T06:00:00+01:00.") from None
    if value.tzinfo is None:
        value = value.replace(tzinfo=datetime.UTC)
    return value.astimezone(datetime.UTC)


def cmd_regrade(args: argparse.Namespace) -> int:
    """Regrade a station's archive (or a folder) under a rules folder."""
    from pipeline.cli.check import analysis_time
    from pipeline.regrade.rules_bundle import Rules
    from pipeline.regrade.run import Engine

    now = analysis_time(args.analysed_at, os.environ)
    engine = Engine(scheduler=args.scheduler, workers=args.workers, ship_bytes=args.ship_bytes,
                    batch_files=args.batch, progress=not args.no_progress and sys.stderr.isatty())
    if args.folder:
        return _regrade_folder(args, engine, now)
    if not args.station:
        raise FormgateError("give a station folder, or --folder FOLDER --out OUT", None,
                            "e.g. formgate regrade station/ --rules proposed-rules/")
    from pipeline.cli.lots import _open
    from pipeline.regrade.archive import Selection
    from pipeline.regrade.run import regrade_station

    settings, ledger = _open(args.station)
    rules = Rules.read(Path(args.rules) if args.rules else settings.rules_dir)
    selection = Selection(
        lots=tuple(args.lot or ()), cells=tuple(args.cell or ()),
        since=_time(args.since, "--since"), until=_time(args.until, "--until"),
        rule_sets=tuple(args.rule_set or ()), verdicts=tuple(args.verdict or ()),
    )
    with ledger:
        outcome = regrade_station(
            settings, ledger, rules, selection, engine=engine, now=now, apply=args.apply,
            run_by=args.by or (getpass.getuser() if not args.apply else ""),
            reason=args.reason or "", out=Path(args.out) if args.out else None, mail=args.mail,
        )
    stats = outcome.stats
    print(f"{outcome.inputs} input(s) judged again under {rules.folder} "
          f"(SHA-256 {rules.digest[:12]}...): {stats.files_judged} on the cluster, "
          f"{stats.from_cache} kept from an earlier run")
    for closed, chosen, whole in outcome.widened:
        print(f"lot {closed} is closed: its screens compare every cell, so all {whole} of its "
              f"inputs were judged again (the selection took {chosen})")
    if not outcome.changes:
        print("no cell changes")
    for change, n in outcome.counts:
        print(f"  {change}: {n}")
    for lot in outcome.lots:
        if lot.problem:
            print(f"  lot {lot.lot} not decided again: {lot.problem}")
        for r in lot.refused:
            print(f"  {r.file_name} (lot {r.lot}) refused by the new rules: {r.reason}")
    if outcome.regrade_id is not None:
        earlier = (f" ({outcome.resumed} of them by a run of it that was cut short)"
                   if outcome.resumed else "")
        print(f"applied as regrade {outcome.regrade_id}: {outcome.applied} cell(s) decided anew"
              f"{earlier}")
    elif args.apply:
        print("nothing to apply")
    else:
        print("dry run: nothing recorded (add --apply --by NAME --reason TEXT to record it)")
    print(f"report: {outcome.report_pdf}\n        {outcome.report_csv}")
    return EXIT_OK


def _regrade_folder(args: argparse.Namespace, engine: Any, now: datetime.datetime) -> int:
    """A plain folder of cycle files, judged on the cluster; results written like `check`'s."""
    import csv
    import io
    import json

    from pipeline.regrade.archive import folder_inputs
    from pipeline.regrade.grid import judge_many
    from pipeline.regrade.items import RegradeItem
    from pipeline.regrade.rules_bundle import Rules
    from pipeline.writing import write_atomic

    if not args.out:
        raise FormgateError("--folder needs --out OUT", None,
                            "Give the folder the results and the verdict list go to.")
    out = Path(args.out)
    rules = Rules.read(Path(args.rules or "rules"))
    out.mkdir(parents=True, exist_ok=True)
    profile = Path(args.profile) if args.profile else None
    items = folder_inputs(Path(args.folder), profile=profile)
    text = profile.read_text(encoding="utf-8") if profile else None
    work = [RegradeItem(sha256=i.sha256, name=i.name, path=str(i.path), profile_text=text,
                        profile_name=profile.name if profile else None, key=i.name) for i in items]
    rows = []
    for judged in judge_many(work, rules, scheduler=engine.scheduler, workers=engine.workers,
                             ship_bytes=engine.ship_bytes, batch_files=engine.batch_files,
                             analysed_at=now, cache=out / "judged.sqlite", progress=engine.progress):
        if judged.result_json is not None:
            doc = json.loads(judged.result_json)
            cell, lot = str(doc["cell"]["cell_id"]), str(doc["cell"]["lot"])
            from pipeline.names import safe_name

            write_atomic(judged.result_json.encode("utf-8"),
                         out / "results" / safe_name(lot) / f"{safe_name(str(judged.item_key))}.json")
            rows.append((str(judged.item_key), lot, cell, str(doc["verdict"]), str(doc.get("decision", ""))))
        else:
            rows.append((str(judged.item_key), "", "", "error", str(judged.error).splitlines()[0]))
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\r\n")
    writer.writerow(["file", "lot", "cell_id", "verdict", "reason"])
    writer.writerows(sorted(rows))
    write_atomic(buffer.getvalue().encode("utf-8"), out / "regrade-verdicts.csv")
    verdicts: dict[str, int] = {}
    for row in rows:
        verdicts[row[3]] = verdicts.get(row[3], 0) + 1
    print(f"{len(rows)} file(s) judged under {rules.folder}: "
          + ", ".join(f"{n} {v}" for v, n in sorted(verdicts.items())))
    print(f"verdicts: {out / 'regrade-verdicts.csv'}")
    return EXIT_OK


def add_commands(sub: Any) -> None:
    """Add `regrade` to the command line's sub-commands."""
    p = sub.add_parser(
        "regrade",
        help="judge again what a station judged, under a rules folder (dry run unless --apply)",
        description="Judge a station's archived inputs again under a rules folder, on Dask "
        "(a cluster on this machine, or a scheduler's), and report every cell whose verdict, "
        "grade or deciding checks change, as CSV and PDF. Nothing is recorded without --apply.",
        epilog="example: formgate regrade station/ --rules proposed-rules/ --lot DEMO-LOT-01",
    )
    p.add_argument("station", nargs="?", metavar="STATION", help="the station folder")
    p.add_argument("--rules", help="rules folder (default: the station's own)")
    p.add_argument("--lot", action="append", metavar="LOT", help="only this lot (repeatable)")
    p.add_argument("--cell", action="append", metavar="CELL",
                   help="only this cell (repeatable); a closed lot is taken whole")
    p.add_argument("--since", metavar="TIME", help="only records first analysed at or after TIME")
    p.add_argument("--until", metavar="TIME", help="only records first analysed before TIME")
    p.add_argument("--rule-set", action="append", metavar="NAME[@REVISION]",
                   help="only records judged by this rule set (repeatable)")
    p.add_argument("--verdict", action="append", choices=("pass", "fail", "hold"),
                   help="only records with this verdict (repeatable)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="a Dask scheduler, e.g. tcp://10.0.0.5:8786 (default: a cluster on "
                   "this machine, one worker per core)")
    p.add_argument("--workers", type=int, metavar="N", help="workers on this machine (default: "
                   "one per core), or workers to wait for at the scheduler")
    p.add_argument("--ship-bytes", action="store_true",
                   help="send each file's bytes with its task (workers that cannot see the archive)")
    p.add_argument("--batch", type=int, metavar="N", help="files per task (default: chosen)")
    p.add_argument("--apply", action="store_true",
                   help="record the changes: new results, decisions and certificates")
    p.add_argument("--by", metavar="NAME", help="who applies the regrade (with --apply)")
    p.add_argument("--reason", metavar="TEXT", help="why (with --apply)")
    p.add_argument("--mail", action="store_true",
                   help="with --apply: one summary mail to the digest recipients")
    p.add_argument("--out", metavar="DIR", help="folder for the change report (default: "
                   "STATION/regrades/)")
    p.add_argument("--folder", metavar="FOLDER", help="regrade a plain folder of cycle files "
                   "instead of a station (with --out)")
    p.add_argument("--profile", help="import profile for --folder's files")
    p.add_argument("--analysed-at", help="analysis time to record, ISO 8601 with zone")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_regrade)
