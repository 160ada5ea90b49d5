"""The `formgate channel ...` commands: a station's cycler channels, their health and alerts.

Argument parsing and printing only: the ledger holds the records and the alerts
(pipeline.ledger.channel_alerts), pipeline.judge.channels works out the summaries and the
suspect-channel screen. Safe beside a running station (a reader of SQLite's write-ahead log).
"""

from __future__ import annotations

import argparse
import datetime
from typing import Any

from pipeline.cli.exits import EXIT_OK
from pipeline.cli.lots import _open
from pipeline.errors import FormgateError


def _records(settings: Any, ledger: Any) -> list[Any]:
    from pipeline.station.channelwatch import station_records, watch_of

    return station_records(ledger, watch_of(settings).window)


def _key(ledger: Any, records: list[Any], channel: str) -> tuple[str, str]:
    """The (station, channel) named ``channel`` (``station/channel`` when several stations share it)."""
    known = sorted({r.key for r in records} | {(a.station, a.channel) for a in ledger.channels.every()})
    station, _, name = channel.rpartition("/") if "/" in channel else ("", "", channel)
    found = [k for k in known if k[1] == name and (not station or k[0] == station)]
    if len(found) == 1:
        return found[0]
    if found:
        raise FormgateError(f"channel {channel!r} is named at several stations", None,
                            "Name it as STATION/CHANNEL: " + ", ".join(f"{s}/{c}" for s, c in found))
    from pipeline.rulebook.tables import did_you_mean

    raise FormgateError(f"the ledger has no record of channel {channel!r}", None,
                        did_you_mean(name, [c for _, c in known]) + "formgate channel list shows them.")


def cmd_channel_list(args: argparse.Namespace) -> int:
    """Every channel of the station's latest records: counts, suspect or not."""
    from pipeline.judge.channels import KEY_METRICS, channel_summaries

    settings, ledger = _open(args.folder)
    with ledger:
        records = _records(settings, ledger)
        alerts = {(a.station, a.channel): a for a in ledger.channels.every() if a.cleared_at is None}
        summaries = channel_summaries(records, KEY_METRICS)
        if not summaries and not alerts:
            print("no record names its channel yet")
            return EXIT_OK
        for s in summaries:
            state = "suspect since " + alerts[s.key].raised_at.isoformat(timespec="minutes") \
                if s.key in alerts else "ok"
            print(f"{s.key[1]:<12} {s.key[0] or '-':<16} {s.records:>5} records  {s.passed} pass, "
                  f"{s.failed} fail, {s.held} hold  {state}")
    return EXIT_OK


def cmd_channel_show(args: argparse.Namespace) -> int:
    """One channel: its counts, fails and holds by check, bias, last records and its alerts."""
    from pipeline.judge.channels import KEY_METRICS, channel_summaries

    settings, ledger = _open(args.folder)
    with ledger:
        records = _records(settings, ledger)
        key = _key(ledger, records, args.channel)
        mine = [r for r in records if r.key == key]
        summary = next((s for s in channel_summaries(records, KEY_METRICS) if s.key == key),
                       None)
        print(f"channel {key[1]}" + (f" at {key[0]}" if key[0] else ""))
        if summary is not None:
            print(f"  records ({summary.records}): {summary.passed} pass, {summary.failed} fail, "
                  f"{summary.held} hold, {summary.errors} error; first {summary.first}, last {summary.last}")
            for check, count in summary.out_by_check.items():
                print(f"  out of window: {check} {count}")
            for b in summary.biases:
                print(f"  {b.metric}: median of its {b.n} passed cells {b.median - b.line_median:+.2f} lot "
                      f"SDs from the other channels' ({b.z:+.1f} standard errors)")
        for r in mine[-20:]:
            out = f"  {', '.join(r.checks_out)}" if r.checks_out else ""
            print(f"  {r.order}  {r.cell_id:<12} {r.lot:<14} {r.verdict}{out}")
        for a in ledger.channels.every(*key):
            print(f"  alert {a.raised_at.isoformat(timespec='minutes')} (cell {a.cell_id}, lot {a.lot}): "
                  f"{a.evidence}")
            if a.cleared_at is not None:
                print(f"    cleared {a.cleared_at.isoformat(timespec='minutes')} by {a.cleared_by}: "
                      f"{a.cleared_why}")
    return EXIT_OK


def cmd_channel_clear(args: argparse.Namespace) -> int:
    """A person checked the channel: its open alert is cleared, with who and why."""
    settings, ledger = _open(args.folder)
    with ledger:
        key = _key(ledger, _records(settings, ledger), args.channel)
        if not ledger.channels.clear(*key, by=args.by, why=args.reason,
                                     now=datetime.datetime.now(datetime.UTC)):
            raise FormgateError(f"channel {args.channel!r} has no open alert", None,
                                "formgate channel list shows the suspect channels.")
        print(f"channel {key[1]}: alert cleared by {args.by}")
    return EXIT_OK


def add_commands(sub: Any) -> None:
    """Add `channel` to the command line's sub-commands."""
    channel = sub.add_parser("channel", help="a station's cycler channels: list, show, clear",
                             epilog="example: formgate channel show station/ 5-03")
    channel_sub = channel.add_subparsers(dest="channel_command", required=True, metavar="ACTION")
    listing = channel_sub.add_parser("list", help="every channel with its counts, and which are suspect",
                                     description="Every channel of the station's latest records with "
                                                 "its counts, and which are suspect.")
    listing.add_argument("folder", metavar="FOLDER", help="the station folder")
    listing.set_defaults(func=cmd_channel_list)
    show = channel_sub.add_parser("show", help="a channel's counts, checks out, bias, last records, alerts",
                                  description="A channel's counts, checks out of window, bias of its "
                                              "passed cells, last records and alerts.")
    show.add_argument("folder", metavar="FOLDER", help="the station folder")
    show.add_argument("channel", metavar="CHANNEL",
                      help="the channel (STATION/CHANNEL if several stations name it)")
    show.set_defaults(func=cmd_channel_show)
    clear = channel_sub.add_parser("clear", help="clear a suspect channel's alert once it has been checked",
                                   description="Clear a suspect channel's alert once it has been checked.",
                                   epilog='example: formgate channel clear station/ 5-03 --by "technician C" '
                                          '--reason "contact block replaced"')
    clear.add_argument("folder", metavar="FOLDER", help="the station folder")
    clear.add_argument("channel", metavar="CHANNEL", help="the channel")
    clear.add_argument("--by", required=True, help="who checked the channel")
    clear.add_argument("--reason", required=True, help="what was checked or repaired")
    clear.set_defaults(func=cmd_channel_clear)
