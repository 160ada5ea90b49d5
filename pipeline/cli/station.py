"""`formgate init`, `watch`, `status` and `mail retry`: make a station, run it, look at it, send its mail.

Argument parsing and printing only; the station (pipeline.station) does the work, and
its settings are read and checked by pipeline.station.settings.
"""

from __future__ import annotations

import argparse
import datetime
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline.cli.exits import EXIT_INTERRUPTED, EXIT_OK, EXIT_USER
from pipeline.cli.starting import importing
from pipeline.shipped import RULES_DIR

if TYPE_CHECKING:
    from pipeline.station.settings import Settings


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

    from pipeline.errors import setup_logging
    from pipeline.station.startup import wait_for_settings
    from pipeline.station.station import Station

    stop = threading.Event()
    interrupted = []

    def on_signal(signum: int, frame: object) -> None:
        interrupted.append(signum)
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    # a broken station.toml (or a folder, a password file) makes the station wait, not exit:
    # a service manager would restart it every few seconds for as long as the mistake stands
    ready = wait_for_settings(Path(args.folder), stop, os.environ)
    if ready is not None:
        settings, smtp = ready
        setup_logging(settings.logs, settings.log_max_MB, settings.log_keep, verbose=not args.quiet)
        code = Station(settings, smtp).run(stop)
    else:
        code = EXIT_OK
    return EXIT_INTERRUPTED if signal.SIGINT in interrupted else code


def cmd_status(args: argparse.Namespace) -> int:
    """Print the station's queue, last cells, counts, outbox, errors and health."""
    with importing():
        from pipeline.errors import SettingsError
        from pipeline.station.status import status_text, waiting_lines

    try:
        settings = _station_settings(args.folder)
    except SettingsError:
        # a station started on these settings waits for them to be fixed: say so first
        waiting = waiting_lines(Path(args.folder))
        if waiting:
            print(f"station in {args.folder}: waiting to start", *waiting, sep="\n")
        raise
    now = datetime.datetime.now(datetime.UTC)
    print(status_text(settings, now), end="")
    return EXIT_OK


def cmd_mail_retry(args: argparse.Namespace) -> int:
    """Send every pending mail now (and parked ones with --parked)."""
    import sqlite3

    from pipeline.ledger.ledger import Ledger
    from pipeline.station.mailer import Sender, deliver_due
    from pipeline.station.settings import smtp_settings

    settings = _station_settings(args.folder)
    smtp = smtp_settings(settings, os.environ)
    now = datetime.datetime.now(datetime.UTC)
    sender = Sender()
    with Ledger(settings.ledger, now=now) as ledger:
        try:
            if args.parked:
                for mail in ledger.outbox.in_state("parked"):
                    ledger.outbox.requeue(mail.id, now=now)
            ledger.outbox.hurry_pending(now=now)
            counts = deliver_due(
                ledger, smtp, station=settings.station_name,
                alerts_to=settings.routing.alerts_to, domain=settings.routing.domain,
                outage_alert_s=settings.routing.outage_alert_s, sender=sender,
            )
        except sqlite3.OperationalError as exc:  # another process held the write lock too long
            return _ledger_busy(ledger, sender, exc)
        left = ledger.outbox.counts()
    # the counts are this command's own: mail another sender held is neither sent nor failed here
    print(f"sent {counts['sent']}, delayed {counts['retry']}, parked {counts['park']}; "
          f"outbox now {left.get('pending', 0)} pending, {left.get('parked', 0)} parked")
    if counts["elsewhere"]:
        print(f"  {counts['elsewhere']} mail(s) were being sent by another sender at the time "
              "(the station, or another formgate mail retry): left to it, not counted here")
    parked = left.get("parked", 0)
    if parked and not args.parked:
        # parked mail was refused for good by the server: only a deliberate retry sends it
        print(f"  {parked} parked mail(s) were not retried: fix what the server refused "
              f"(see formgate status), then run: formgate mail retry {args.folder} --parked")
    unsent = counts["retry"] or counts["park"] or (parked and not args.parked)
    return EXIT_USER if unsent else EXIT_OK


def _ledger_busy(ledger: Any, sender: Any, exc: Exception) -> int:
    """`mail retry` met a ledger it could not write (another process held it past the busy
    timeout): record what went out if it can, before its claims end; say what is left."""
    import sys

    if sender.unrecorded:
        print(f"{len(sender.unrecorded)} mail(s) went out but the ledger could not record them "
              f"({exc}); trying until their claims end", file=sys.stderr)
        left = sender.settle(ledger)
        if not left:
            print("the mail that went out is recorded now; run formgate mail retry again for "
                  "the rest", file=sys.stderr)
        for sent in left:  # its claim stays until its lease ends: nobody sends it before then
            print(f"  {sent.words()}", file=sys.stderr)
    else:
        print(f"the ledger {ledger.db.path} could not be written ({exc}); nothing more was "
              "sent. Try again when the other process has let go of it", file=sys.stderr)
    return EXIT_USER


def add_commands(sub: Any) -> None:
    """Add `init`, `watch`, `status` and `mail retry` to the command line's sub-commands."""
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
