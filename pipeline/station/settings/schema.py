"""The schema of station.toml, declared as data, and the texts made from it: default file, docs.

check.py checks a station file against these tables (through rulebook/tables.py) and
nothing else; ``render_station_toml`` writes the commented file that ``formgate init``
creates and ``render_docs`` prints docs/station-settings.md, both from the same tables, so
a key the station accepts cannot go undocumented. The rules between keys (folders that
must differ, SMTP log-in consistency, ...) live in folders.py and mail.py; their wording
is listed here in ``CROSS_RULES`` for the docs.

One piece, though longer than one job's module should be: it is one table of every key of
station.toml with its meaning, unit and bounds, read top to bottom in the order the new
station's file and docs/station-settings.md print it, and the two short renderers that walk
it; cut in two, a reader would look for a key in the wrong half, and the order of the file
and the docs would live in two files.

Regenerate the documentation with
``python -m pipeline.station.settings > docs/station-settings.md``.
"""

from __future__ import annotations

import json
import textwrap

from pipeline.mail.smtp import SECURITY
from pipeline.model import DEFAULT_ACCURACY
from pipeline.read.accuracy import ACCURACY_KEYS
from pipeline.rulebook.schema import (
    INTEGER,
    NUMBER,
    TEXT,
    TEXT_LIST,
    Key,
    Table,
    allowed_text,
    key_table,
)
from pipeline.station.handoff import MODES

STATION_FILE = "station.toml"
WATCH_MODES: tuple[str, ...] = ("events", "polling")
CERTIFICATE_MODES: tuple[str, ...] = ("all", "failed_and_held")
# Port per security mode when none is given: submission (RFC 6409), implicit TLS (RFC 8314),
# plain SMTP relay (RFC 5321).
DEFAULT_PORTS: dict[str, int] = {"starttls": 587, "tls": 465, "none": 25}
# Sender of the .eml files written while no mail server is set.
LOCAL_SENDER = "formgate@localhost"


def _positive(name: str, meaning: str, unit: str, default: float) -> Key:
    return Key(name, NUMBER, meaning, unit=unit, default=default, minimum=0.0, minimum_exclusive=True)


def _folder(name: str, meaning: str) -> Key:
    return Key(name, TEXT, meaning, default=name)


def _addresses(name: str, meaning: str) -> Key:
    return Key(name, TEXT_LIST, meaning, default=(), allowed_note="mail addresses")


SETTINGS_TABLES: tuple[Table, ...] = (
    Table(
        "station",
        "The station itself: its name, how much it does at once, and its limits.",
        (
            Key(
                "name",
                TEXT,
                "the station's name, shown in mails, logs and the heartbeat file",
                required=True,
                example='"formation-line-1"',
            ),
            Key(
                "workers",
                INTEGER,
                "cells judged at the same time, each in a process of its own",
                default=2,
                minimum=1,
                maximum=64,
            ),
            _positive(
                "max_input_MB",
                "a larger input file is quarantined unread (1 MB = 1,048,576 bytes)",
                "MB",
                200.0,
            ),
            # Reading holds a file's text twice for a moment (its blocks as unpacked, then
            # joined) and the columns it reads once: measured (benchmarks/hostile_inputs.py),
            # a worker's address space peaks at about 560 MB + 2 x the text + 180 MB per
            # 2,000,000 rows. 256 MB of text (four times a 2,000,000-row record) peaks near
            # 1,050 MB, half of the default worker_memory_MB; 1,024 would need about 2,800.
            _positive(
                "max_uncompressed_MB",
                "the most text one input may hold (unpacked, for a .csv.gz); a file with more is "
                "quarantined, a .csv.gz as soon as unpacking it passes this, so a gzip bomb costs "
                "no more. worker_memory_MB must be at least 800 + 2 x this",
                "MB",
                256.0,
            ),
            _positive(
                "task_timeout_s",
                "a cell still being judged after this long is stopped and its file quarantined",
                "s",
                300.0,
            ),
            # What one input may cost. A formation and grading record is sampled every 1 to
            # 60 s (common practice): three days of a 20 Ah cell at 1 s is about 260,000 rows
            # of under 100 bytes; the defaults leave several times that.
            _positive(
                "max_line_kB",
                "a file with a longer line is quarantined unjudged (1 kB = 1,024 bytes; a cycle "
                "file's lines are far shorter)",
                "kB",
                64.0,
            ),
            Key(
                "max_rows",
                INTEGER,
                "a file with more lines is quarantined unjudged (about eight three-day records "
                "sampled every second)",
                default=2_000_000,
                minimum=1,
            ),
            _positive(
                "worker_memory_MB",
                "memory (address space) one worker process may use; a file that needs more is "
                "quarantined. A worker needs about 600 MB to start, about 850 MB for 2,000,000 rows, "
                "and 2 MB more for each MB of text it reads: at least 800 + 2 x max_uncompressed_MB "
                "(a smaller value is refused)",
                "MB",
                2048.0,
            ),
            _positive(
                "waiting_alert_s",
                "an inbox entry not taken this long after its last change (a temporary name, a "
                "file without its marker, a file that does not end cleanly) is listed by "
                "formgate status with its age and raises one alert",
                "s",
                3600.0,
            ),
            _positive(
                "keep_originals_h",
                "a settle-mode writer's original is kept aside and watched this long after its "
                "copy was taken (and at least four times settle_s); a writer that comes back "
                "within it is seen, and its file is judged again as a new version with one "
                "alert. Past it the original is removed (the archive holds the same bytes)",
                "h",
                24.0,
            ),
            _positive(
                "retry_max_s",
                "while a fault of the surroundings (a full disk, a read-only or missing folder, "
                "an unwritable ledger) pauses the station, it tries again after 1 s, then twice "
                "as long each time, up to this long",
                "s",
                60.0,
            ),
            _positive(
                "reconcile_s",
                "how often the inboxes and the work folder are listed in full; filesystem "
                "events only wake the station sooner",
                "s",
                10.0,
            ),
            _positive("heartbeat_s", "how often the heartbeat file is rewritten", "s", 10.0),
            Key(
                "ledger",
                TEXT,
                "the SQLite file that records every decision; keep it on a local disk",
                default="ledger.sqlite",
            ),
            Key(
                "heartbeat",
                TEXT,
                "file the station rewrites while it runs, for a monitor to watch",
                default="heartbeat.json",
            ),
            _positive("log_max_MB", "a log file is rotated when it reaches this size", "MB", 10.0),
            Key("log_keep", INTEGER, "rotated log files kept", default=5, minimum=1),
            Key(
                "certify",
                TEXT,
                "which cells get a PDF certificate: all of them, or only failed and held cells "
                "(passed cells then have their JSON result and the lot digest)",
                default="all",
                allowed=CERTIFICATE_MODES,
            ),
        ),
        required=True,
    ),
    Table(
        "folders",
        "Where the station keeps things. Relative paths are relative to the folder that holds "
        "station.toml. Every folder must be a different one, and the inboxes and these folders "
        "(rules aside) must all be on one filesystem.",
        (
            _folder("rules", "rule files, and import profiles in rules/profiles"),
            _folder("work", "files claimed from an inbox while they are judged"),
            _folder("archive", "inputs that were judged (or were duplicates), kept for good"),
            _folder("quarantine", "inputs that could not be judged, each with a reason file"),
            _folder("results", "one JSON result per cell, in a folder per lot"),
            _folder("certificates", "one PDF certificate per cell, in a folder per lot"),
            _folder("mail", ".eml files while no mail server is set"),
            _folder("logs", "the station's log files"),
        ),
    ),
    Table(
        "inbox",
        "One table per folder the cyclers write into; ID names the inbox in logs. At least one is required.",
        (
            Key(
                "folder",
                TEXT,
                "the folder the cyclers write their files into",
                required=True,
                example='"inbox"',
            ),
            Key(
                "handover",
                TEXT,
                "how the station knows a file is finished: rename: the writer renames it "
                "into place, so a file is finished when it appears; marker: the writer adds "
                "NAME + marker_suffix when the file is complete; settle: size and modification "
                "time unchanged for settle_s and the content ends cleanly (a final newline, a "
                "whole gzip stream, a workbook or Parquet file whose end is written)",
                required=True,
                allowed=MODES,
                example='"settle"',
            ),
            _positive(
                "settle_s",
                "with handover = settle: how long a file must stay unchanged",
                "s",
                30.0,
            ),
            _positive(
                "cut_wait_factor",
                "with handover = settle: a quiet file whose record ends before its program "
                "does (it ends while current flows, or before the rule set's final_rest_s is "
                "over) waits this many times settle_s before it is taken; the judge then holds "
                "it as incomplete, never fails it for what it does not show",
                "",
                10.0,
            ),
            Key(
                "marker_suffix",
                TEXT,
                "with handover = marker: the marker file's name is the data file's name plus this",
                default=".done",
                allowed_note="starts with a dot; not .tmp or .part",
            ),
            _positive(
                "orphan_marker_s",
                "with handover = marker: a marker whose data file has not appeared after this "
                "long is reported",
                "s",
                3600.0,
            ),
            Key(
                "watch",
                TEXT,
                "events: the operating system reports changes (local disks); polling: the "
                "folder is listed every poll_interval_s (network shares, where no events arrive)",
                default="events",
                allowed=WATCH_MODES,
            ),
            _positive("poll_interval_s", "with watch = polling: how often the folder is listed", "s", 5.0),
            Key(
                "profile",
                TEXT,
                "import profile for this inbox's files that no [profile.ID] glob matches; "
                "not set: cycle file version 1",
                example='"rules/profiles/semicolon_decimal_comma.toml"',
            ),
        ),
        named=True,
        required=True,
    ),
    Table(
        "profile",
        "Import profiles chosen by file name, across all inboxes. The tables are tried in the "
        "order they appear in the file and the first glob that matches the file's name wins, "
        "so put the more specific globs first. A file no glob matches uses its inbox's profile, "
        "else cycle file version 1.",
        (
            Key(
                "glob",
                TEXT,
                "pattern matched against the file's name (not its folder), case-sensitive: "
                "* any run of characters, ? one character, [abc] one of a, b, c",
                required=True,
                example='"*_sc.csv"',
            ),
            Key(
                "file",
                TEXT,
                "the import profile (a TOML file) for matching files",
                required=True,
                example='"rules/profiles/semicolon_decimal_comma.toml"',
            ),
        ),
        named=True,
    ),
    Table(
        "accuracy",
        "The accuracy class of cycler channels, from which every metric's uncertainty (± U on "
        "certificates) and the guarded decision rules start. Tried in the order they appear "
        "in the file; the first whose inbox and channels match a record wins, over the class "
        "an import profile declares; none matching: the default class (common practice: "
        "voltage ±(0.02 % + 1 mV), current ±(0.02 % + 0.02 % of range), 1 K, 50 ppm).",
        (
            Key(
                "inbox",
                TEXT,
                "the inbox (its ID) whose records this class is for; not set: every inbox",
                allowed_note="the ID of an inbox of this file",
                example='"cyclers"',
            ),
            Key(
                "channels",
                TEXT,
                "pattern matched against the record's channel metadata, case-sensitive: "
                "* any run of characters, ? one character; not set: every channel",
                example='"R1-*"',
            ),
            *(
                Key(
                    k.name,
                    NUMBER,
                    k.meaning,
                    unit=k.unit,
                    minimum=0.0,
                    minimum_exclusive=k.name == "current_range_A",
                    default=None if k.name == "current_range_A"
                    else getattr(DEFAULT_ACCURACY, k.field),
                    example="50" if k.name == "current_range_A" else "",
                )
                for k in ACCURACY_KEYS
            ),
        ),
        named=True,
    ),
    Table(
        "smtp",
        "The mail server. With no host, every mail is written as an .eml file into the mail "
        "folder instead. A password never goes in this file: name an environment variable "
        "(password_env) or a file only the station's user can read (password_file).",
        (
            Key(
                "host",
                TEXT,
                "the mail server's name or address, without the port; not set: mails are "
                "written as .eml files into the mail folder",
                example='"mail.example.com"',
            ),
            Key(
                "port",
                INTEGER,
                "the mail server's port",
                allowed_note="defaults to 587 (starttls), 465 (tls) or 25 (none)",
                minimum=1,
                maximum=65535,
                example="587",
            ),
            Key(
                "security",
                TEXT,
                "starttls: plain connection upgraded to TLS (required, never skipped); tls: TLS "
                "from the first byte; none: clear text, only for a relay on the same machine and "
                "never with a log-in. Certificates and host names are always verified",
                default="starttls",
                allowed=SECURITY,
            ),
            Key(
                "username",
                TEXT,
                "log-in name; not set: no log-in",
                example='"formgate"',
            ),
            Key(
                "password_env",
                TEXT,
                "name of the environment variable that holds the password",
                example='"FORMGATE_SMTP_PASSWORD"',
            ),
            Key(
                "password_file",
                TEXT,
                "file whose first line is the password; it must be readable by the station's "
                "user only (chmod 600)",
                example='"smtp-password"',
            ),
            Key(
                "sender",
                TEXT,
                'the From address, e.g. "formgate@example.com" or '
                '"Formation line 1 <formgate@example.com>"; required when host is set',
                allowed_note=f"defaults to {LOCAL_SENDER} while host is not set",
                example='"formgate@example.com"',
            ),
            _positive("timeout_s", "longest wait for the server in one step", "s", 30.0),
            Key(
                "ca_file",
                TEXT,
                "a site CA certificate (PEM) trusted in addition to the system's",
                example='"site-ca.pem"',
            ),
        ),
    ),
    Table(
        "mail",
        "Who gets what. An empty list means no letters of that kind. Each address is a plain local@domain.",
        (
            _addresses(
                "failures_to",
                "a letter at once for every failed cell, with its certificate and cautions; "
                "required when [smtp] host is set",
            ),
            _addresses("holds_to", "a letter at once for every cell held for review"),
            _addresses(
                "digests_to",
                "one digest per lot: every cell of the lot with its verdict, passes included",
            ),
            _addresses(
                "alerts_to",
                "station problems: a folder that cannot be written, mail that cannot be sent, a stuck file",
            ),
            _positive(
                "digest_quiet_s",
                "a lot's digest goes out when no new cell of that lot has been judged for this long",
                "s",
                1800.0,
            ),
            _positive(
                "outage_alert_s",
                "while no mail can be delivered for a reason that may pass (no connection, no "
                "answer in time, a 4xx reply), formgate status shows it at once; after this "
                "long, one alert is queued (it goes out with the waiting mail once the server "
                "takes mail again, and a copy is written at once as an .eml file into the mail "
                "folder)",
                "s",
                900.0,
            ),
            Key(
                "certificates_url",
                TEXT,
                "where quality staff open the certificates (a web or file share address); a "
                "digest's link to a certificate is this address followed by the certificate's "
                "path under the certificates folder",
                allowed_note="an http://, https:// or file:// address; unset, a digest shows "
                "each certificate's full path on the station",
                example='"https://quality.example.com/formgate/certificates/"',
            ),
            Key(
                "message_id_domain",
                TEXT,
                "domain of the Message-IDs of the station's mails",
                allowed_note="defaults to the sender's domain",
                example='"example.com"',
            ),
        ),
    ),
    Table(
        "plant",
        "The plant database (PostgreSQL) the station forwards every row of its ledger to, "
        "from a thread of its own (docs/plant.md). Without database, nothing is forwarded. "
        "The station never waits for it: while it is down or slow, the station judges and "
        "records as ever, and formgate status shows how far the feed is behind.",
        (
            Key(
                "database",
                TEXT,
                "the plant database, as postgresql://ROLE@HOST:PORT/DATABASE (no password in "
                "it: see password_file)",
                example='"postgresql://formgate_line1@example.com:5432/formgate"',
            ),
            Key(
                "station_id",
                TEXT,
                "the name this station's rows carry in the plant database; unique in the plant, "
                "and never changed once the station has fed it",
                allowed_note="defaults to [station] name",
                example='"formation-line-1"',
            ),
            Key(
                "password_file",
                TEXT,
                "file whose first line is the database password; readable by the station's user "
                "only (chmod 600). Not set: the database needs none (a local socket, or a "
                "certificate)",
                example='"plant-password"',
            ),
            Key(
                "batch_rows",
                INTEGER,
                "ledger rows forwarded in one plant transaction",
                default=500,
                minimum=1,
                maximum=10_000,
            ),
            _positive("connect_timeout_s", "longest wait for a connection to the database", "s",
                      10.0),
            _positive(
                "statement_timeout_s",
                "the database cancels a statement of the feed that takes longer: a slow "
                "database pauses the feed like one that is down",
                "s",
                30.0,
            ),
            _positive(
                "retry_max_s",
                "while the database cannot be reached, the feed tries again after 1 s, then "
                "twice as long each time, up to this long",
                "s",
                300.0,
            ),
            _positive(
                "alert_after_s",
                "once the feed has not been able to forward for this long, one alert goes to "
                "[mail] alerts_to",
                "s",
                900.0,
            ),
        ),
    ),
)

# The station's watch on its cycler channels (docs/station.md, "Suspect channels").
SUSPECT_FAILS: tuple[str, ...] = ("fail", "retest")
SETTINGS_TABLES += (
    Table(
        "channels",
        "The watch on the cycler channels: after each record the station screens its channels "
        "(the channel its file names) against each other, and raises one alert on a channel "
        "whose cells fail far more often than the others', fail one check in a row, or whose "
        "passed cells stand off the others' (docs/station.md, Suspect channels).",
        (
            Key(
                "false_alarm",
                NUMBER,
                "the chance that one screening of a line with no bad channel flags a channel",
                default=0.01,
                minimum=0.0,
                minimum_exclusive=True,
                maximum=0.2,
            ),
            Key("recent", INTEGER, "the rate test looks at a channel's last this many records",
                default=20, minimum=5, maximum=1000),
            Key("min_records", INTEGER, "a channel with fewer records is not screened", default=5,
                minimum=2),
            Key("min_run", INTEGER, "the shortest run of one failed check that counts", default=3,
                minimum=2),
            Key("window", INTEGER, "the station's latest records (every lot) the screen looks at",
                default=2000, minimum=10, maximum=100_000),
            Key(
                "suspect_fails",
                TEXT,
                "what the station does with a cell that a suspect channel fails: `fail` keeps it "
                "failed (its letter says the channel is suspect); `retest` also asks for a retest "
                "of its stage, so the cell is held until a new record of that stage (from another "
                "channel) decides it. Its record stays failed, with every caution",
                default="fail",
                allowed=SUSPECT_FAILS,
            ),
        ),
    ),
)

SETTINGS_BY_TABLE: dict[str, Table] = {t.name: t for t in SETTINGS_TABLES}

# Keys renamed since earlier revisions of this format: (table, old key) -> new key.
SETTINGS_RENAMED: dict[tuple[str, str], str] = {}

# The rules between keys that settings.py enforces, as the docs state them.
CROSS_RULES: tuple[str, ...] = (
    "No key anywhere may hold a password; use `password_env` or `password_file`.",
    "Every folder (each inbox, and each key of `[folders]`) must be a different folder.",
    "An inbox folder or the work folder may not be the station folder itself, nor hold the "
    "ledger or the heartbeat file: every file in them is taken for an input.",
    "Paths may not be empty or hold control characters.",
    "`marker_suffix` starts with a dot and is not `.tmp` or `.part` (those names are never claimed).",
    "A `glob` may not be empty or hold a `/` or `\\`: it is matched against the file name only.",
    '`security = "none"` cannot go with a `username`: the password would cross the network in clear text.',
    "A `username` needs exactly one of `password_env` and `password_file`, and those need a "
    "`username`. `password_env` is a variable name (letters, digits, `_`).",
    "With a `host`, `sender` and `failures_to` are required: failed cells must reach someone.",
    "`host` is a name or address only; the port goes in `port`.",
    "`[plant] database` is a `postgresql://` address that names a database and holds no password.",
    "`worker_memory_MB` is at least 800 + 2 x `max_uncompressed_MB` (either may be left at its "
    "default): a worker must hold the most text an input may have, so that "
    "`max_uncompressed_MB`, not the worker's memory, is what stops a large file.",
)

_ACTIVE_VALUES: dict[tuple[str, str], str] = {
    ("inbox", "folder"): '"inbox"',
    ("inbox", "handover"): '"settle"',
    ("mail", "failures_to"): '["quality@example.com"]',
    ("mail", "holds_to"): '["quality@example.com"]',
    ("mail", "digests_to"): '["production@example.com"]',
    ("mail", "alerts_to"): '["maintenance@example.com"]',
}
DEFAULT_INBOX = "cyclers"
EXAMPLE_PROFILE = "semicolon-files"


def toml_value(value: object) -> str:
    """A Python default as TOML writes it.

    >>> toml_value(("a@example.com",)), toml_value(2.0), toml_value(".done")
    ('["a@example.com"]', '2.0', '".done"')
    """
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, tuple):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return repr(value)


def _comment(text: str, indent: str = "") -> list[str]:
    return textwrap.wrap(
        text,
        88,
        initial_indent=f"{indent}# ",
        subsequent_indent=f"{indent}# ",
        break_long_words=False,
        break_on_hyphens=False,
    )


def _key_comment(table: Table, key: Key) -> str:
    unit = f" [{key.unit}]" if key.unit else ""
    allowed = allowed_text(key).replace("`", "")
    allowed = f" ({allowed})" if allowed and not key.allowed else ""
    options = f" One of: {', '.join(key.allowed)}." if key.allowed else ""
    if key.default is None and key.allowed_note.startswith("defaults"):
        options += f" Not set: {key.allowed_note.removeprefix('defaults to ')}."
    return f"{key.name}{unit}: {key.meaning}{allowed}.{options}"


def _key_lines(table: Table, key: Key, station_name: str) -> list[str]:
    lines = _comment(_key_comment(table, key))
    if (table.name, key.name) == ("station", "name"):
        return [*lines, f"name = {toml_value(station_name)}"]
    if (table.name, key.name) in _ACTIVE_VALUES:
        return [*lines, f"{key.name} = {_ACTIVE_VALUES[(table.name, key.name)]}"]
    shown = toml_value(key.default) if key.default is not None else key.example
    return [*lines, f"# {key.name} = {shown}"]


def render_station_toml(*, station_name: str = "formation-line-1") -> str:
    """The commented station.toml that ``formgate init`` writes.

    Every key is there: the ones a site must decide on are set, the others are shown
    commented out with their default (or an example) and their meaning. No mail
    server is set, so mails are written as .eml files into the mail folder.
    """
    out = [
        f"# Station settings for formgate ({STATION_FILE}). Reference: docs/station-settings.md.",
        "# Lines starting with # are comments; a commented-out key shows its default value,",
        "# or an example value where it has no default.",
        "# Relative paths are relative to the folder that holds this file.",
        "",
    ]
    for table in SETTINGS_TABLES:
        out += _comment(table.meaning)
        if table.name in ("profile", "accuracy"):  # examples: none is set by default
            ident = EXAMPLE_PROFILE if table.name == "profile" else "old-racks"
            out += [f"# [{table.name}.{ident}]"]
            for key in table.keys:
                out += [
                    *_comment(_key_comment(table, key)),
                    f"# {key.name} = {key.example or toml_value(key.default)}",
                ]
            out.append("")
            continue
        if table.name == "mail":
            out += _comment(
                "Replace the example.com addresses before setting [smtp] host: example.com is "
                "reserved for examples and mail to it never arrives."
            )
        out.append(f"[{table.name}.{DEFAULT_INBOX}]" if table.named else f"[{table.name}]")
        for key in table.keys:
            out += _key_lines(table, key, station_name)
        out.append("")
    return "\n".join(out)


def render_docs() -> str:
    """The whole of docs/station-settings.md, generated from SETTINGS_TABLES and CROSS_RULES."""
    out = [
        "_Generated by `python -m pipeline.station.settings > docs/station-settings.md` from "
        "pipeline/station/settings/schema.py; do not edit by hand._",
        "",
        "# Station settings",
        "",
        f"`formgate watch STATION` runs a station from the folder STATION: its settings are in "
        f"`STATION/{STATION_FILE}`. `formgate init STATION` creates that folder with a commented "
        f"{STATION_FILE} (shown at the end of this page), every folder of the layout, and a copy "
        "of the shipped rule files and import profiles; it never overwrites an existing "
        f"{STATION_FILE}.",
        "",
        "The file is checked like a rule file: unknown tables and keys are errors with a close "
        "match suggested, and every problem names the file, the line and what to do.",
        "",
        "How a file travels: a cycler writes it into an inbox; once it is finished (see "
        "`handover`), the station claims it by renaming it into `work`, judges it, records the "
        "decision in the ledger, and moves it to `archive` (or, if it could not be judged, to "
        "`quarantine` with a reason file). A rename is atomic only within one filesystem "
        "(across filesystems it is a copy that others can see half done), so the station "
        "refuses to start when its folders are not all on one filesystem. With an inbox on a "
        "network share, put the other folders on that share too; keep the ledger on a local "
        "disk.",
        "",
    ]
    for table in SETTINGS_TABLES:
        title = table.header + (" (required)" if table.required else "")
        out += [f"## {title}", "", table.meaning, "", *key_table(table), ""]
    out += ["## Rules between keys", ""]
    out += [f"- {rule}" for rule in CROSS_RULES]
    out += ["", "## Renamed keys", ""]
    if SETTINGS_RENAMED:
        out += ["| table | old key | new key |", "|---|---|---|"]
        for (table_name, old), new in sorted(SETTINGS_RENAMED.items()):
            out.append(f"| `{SETTINGS_BY_TABLE[table_name].header}` | `{old}` | `{new}` |")
    else:
        out.append("None so far.")
    out += [
        "",
        f"## The {STATION_FILE} that `formgate init` writes",
        "",
        "```toml",
        render_station_toml().rstrip("\n"),
        "```",
        "",
    ]
    return "\n".join(out)
