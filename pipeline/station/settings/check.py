"""station.toml's text -> a Settings, or every problem located by line (pure: reads nothing).

Keys and values are checked against schema.py by rulebook/tables.py; the
rules between keys are folders.py's (paths) and mail.py's ([smtp],
[mail]); this module refuses passwords, names unknown tables, and puts it together.
Reading the file is files.py's job.

>>> from pipeline.station.settings.schema import render_station_toml
>>> s = load_settings(render_station_toml(), "station.toml", Path("st"))
>>> s.inboxes[0].folder, s.work, s.smtp.host
(PosixPath('st/inbox'), PosixPath('st/work'), None)
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import cast

from pipeline.errors import SettingsError
from pipeline.read.accuracy import AccuracyValueError, accuracy_from
from pipeline.rulebook.tables import (
    Collector,
    Values,
    check_family,
    check_table,
    close_match,
    did_you_mean,
)
from pipeline.rulebook.toml_lines import KeyPath, show_table, syntax_position
from pipeline.station.settings.folders import Checker, Place
from pipeline.station.settings.mail import check_routing, check_smtp, mail_routing, smtp_config
from pipeline.station.settings.plant import check_plant, plant_settings
from pipeline.station.settings.records import (
    FOLDER_KEYS,
    AccuracyRule,
    ChannelSettings,
    InboxSettings,
    ProfileRule,
    Settings,
)
from pipeline.station.settings.schema import (
    SETTINGS_BY_TABLE,
    SETTINGS_RENAMED,
    SETTINGS_TABLES,
)

_PASSWORD_KEY = re.compile(r"passw(or)?d", re.IGNORECASE)
_MISSING_HINTS = {
    "station": 'Add a [station] table with a line name = "formation-line-1" (the station\'s '
    "name, shown in mails and logs).",
    "inbox": "Add one table per folder the cyclers write into, e.g. [inbox.cyclers] with "
    'folder = "inbox" and handover = "settle" below it.',
}


def _unknown_top(out: Collector, key: str) -> None:
    homes = [t.header for t in SETTINGS_TABLES if t.key(key)]
    if homes:
        out.add(
            f"key '{key}' is outside any table",
            (key,),
            hint=f"It belongs in {' or '.join(homes)}: put that table's header line above it.",
        )
        return
    guess = close_match(key, list(SETTINGS_BY_TABLE))
    out.add(
        f"unknown table {show_table((key,))}",
        (key,),
        hint=f"Did you mean {SETTINGS_BY_TABLE[guess].header}?"
        if guess
        else f"Allowed tables: {', '.join(t.header for t in SETTINGS_TABLES)}.",
    )


def _refuse_passwords(out: Collector, data: dict[str, object], path: KeyPath) -> bool:
    """Report and drop every key that looks like a password, wherever it is (value never shown).

    True if there was one.
    """
    found = False
    for key in list(data):
        value = data[key]
        if _PASSWORD_KEY.search(key) and key not in ("password_env", "password_file"):
            where = f"{show_table(path)} {key}" if path else f"key '{key}'"
            out.add(
                f"{where}: a password may not be written in the settings file",
                path or (key,),
                key if path else None,
                hint="Remove the line. Set password_env to the name of an environment variable "
                "that holds the password, or password_file to a file only the station's user "
                "can read (chmod 600).",
            )
            del data[key]
            found = True
        elif isinstance(value, dict):
            found |= _refuse_passwords(out, value, (*path, key))
        elif isinstance(value, list):
            for item in value:
                if isinstance(item, dict):
                    found |= _refuse_passwords(out, item, (*path, key))
    return found


# A worker's address space peaks at about 560 MB + 2 x the text it reads + 180 MB per
# 2,000,000 rows (benchmarks/hostile_inputs.py; docs/station.md): 800 MB + 2 x
# max_uncompressed_MB lets max_uncompressed_MB, not the worker's memory, stop a large file.
WORKER_BASE_MB = 800.0


def _check_worker_memory(out: Collector, station: Values, written: Checker) -> None:
    """worker_memory_MB holds the text max_uncompressed_MB lets in (located where it is written)."""
    memory, text = station.get("worker_memory_MB"), station.get("max_uncompressed_MB")
    if isinstance(memory, bool) or not isinstance(memory, int | float):
        return
    if isinstance(text, bool) or not isinstance(text, int | float):
        return
    need = WORKER_BASE_MB + 2 * text
    if memory >= need:
        return
    path = ("station",)
    own = written.written(path, "worker_memory_MB")
    key = "worker_memory_MB" if own else "max_uncompressed_MB"
    shown = out.raw(path, "worker_memory_MB", memory) if own else f"{memory:g} (the default)"
    lower = (memory - WORKER_BASE_MB) / 2
    out.add(
        f"[station] worker_memory_MB = {shown} is too little for max_uncompressed_MB = "
        f"{out.raw(path, 'max_uncompressed_MB', text)}: a worker "
        f"reading that much text needs {WORKER_BASE_MB:g} + 2 x {text:g} = {need:g} MB",
        path,
        key,
        hint=f"Raise worker_memory_MB to {need:g} or more"
        + (f", or lower max_uncompressed_MB to {lower:g} or less" if lower > 0 else "")
        + ". Otherwise a large file is stopped by the worker's memory instead of by "
        "max_uncompressed_MB.",
    )


def _line_order(error: SettingsError) -> tuple[bool, int]:
    line = error.where.line if error.where else None
    return line is None, line or 0


def _parse(text: str, name: str, root: Path) -> tuple[Settings | None, list[SettingsError]]:
    """Every problem of one settings text, and the Settings if there were none."""
    out = Collector(text, name, error=SettingsError)
    try:
        data = tomllib.loads(text.removeprefix("\ufeff"))
    except tomllib.TOMLDecodeError as exc:
        what, where = syntax_position(exc, name, out.locate.lines)
        return None, [
            SettingsError(
                f"invalid TOML ({what})",
                where,
                hint="Fix the syntax at that spot; text values need double quotes, numbers a dot "
                "for decimals, and each table header may appear once.",
            )
        ]
    password_written = _refuse_passwords(out, data, ())
    for key in data:
        if key not in SETTINGS_BY_TABLE:
            _unknown_top(out, key)
    plain: dict[str, Values] = {}
    families: dict[str, dict[str, Values]] = {}
    broken: set[tuple[str, str]] = set()
    for table in SETTINGS_TABLES:
        raw = data.get(table.name)
        if table.required and (raw is None or raw == {}):
            out.add(f"no {table.header} table", (table.name,), hint=_MISSING_HINTS[table.name])
        if table.named:
            members, bad = check_family(
                out,
                table,
                {} if raw is None else raw,
                tables=SETTINGS_TABLES,
                renamed=SETTINGS_RENAMED,
            )
            families[table.name] = members
            broken |= {(table.name, ident) for ident in bad}
        elif raw is not None or not table.required:
            plain[table.name] = check_table(
                out,
                (table.name,),
                table,
                {} if raw is None else raw,
                tables=SETTINGS_TABLES,
                renamed=SETTINGS_RENAMED,
            )
    check = Checker(out, data, root)
    station, folders = plain.get("station", {}), plain["folders"]
    paths = {key: check.path(("folders",), key, folders) for key in ("rules", *FOLDER_KEYS)}
    ledger = check.path(("station",), "ledger", station)
    heartbeat = check.path(("station",), "heartbeat", station)
    places: list[Place] = []
    for key in ("rules", *FOLDER_KEYS):
        if (found := paths[key]) is not None:
            written = check.written(("folders",), key)
            place = Place(
                f"[folders] {key}", ("folders",), key, str(folders[key]), written, str(found)
            )
            if key == "work":  # the station takes every file in work for a claimed input
                check.holds_state(place, station, ledger, heartbeat)
            places.append(place)
    inboxes: list[InboxSettings] = []
    for ident, v in families["inbox"].items():
        path = ("inbox", ident)
        folder = check.path(path, "folder", v)
        profile = check.path(path, "profile", v)
        if "marker_suffix" in v:
            check.marker(path, str(v["marker_suffix"]))
        if folder is None:
            continue
        place = Place(
            f"[inbox.{ident}] folder", path, "folder", str(v["folder"]), True, str(folder)
        )
        check.holds_state(place, station, ledger, heartbeat)
        places.append(place)
        if ("inbox", ident) not in broken:
            inboxes.append(
                InboxSettings(
                    name=ident,
                    folder=folder,
                    handover=str(v["handover"]),
                    settle_s=cast(float, v["settle_s"]),
                    cut_wait_factor=cast(float, v["cut_wait_factor"]),
                    marker_suffix=str(v.get("marker_suffix", ".done")),
                    orphan_marker_s=cast(float, v["orphan_marker_s"]),
                    polling=v["watch"] == "polling",
                    poll_interval_s=cast(float, v["poll_interval_s"]),
                    profile=profile,
                )
            )
    check.distinct(places)
    profiles: list[ProfileRule] = []
    for ident, v in families["profile"].items():
        file = check.path(("profile", ident), "file", v)
        if isinstance(v.get("glob"), str):
            check.glob(("profile", ident), str(v["glob"]))
            if file is not None and ("profile", ident) not in broken:
                profiles.append(ProfileRule(str(v["glob"]), file))
    accuracy: list[AccuracyRule] = []
    inbox_names = set(families["inbox"])
    for ident, v in families["accuracy"].items():
        path = ("accuracy", ident)
        if "inbox" in v and str(v["inbox"]) not in inbox_names:
            out.add(
                f"[accuracy.{ident}] inbox names '{v['inbox']}', which is no [inbox.ID] of this file",
                path, "inbox",
                hint=did_you_mean(str(v["inbox"]), sorted(inbox_names))
                + f"Inboxes: {', '.join(sorted(inbox_names)) or 'none'}.",
            )
            continue
        try:
            declared = accuracy_from(v, f"{name} [accuracy.{ident}]")
        except AccuracyValueError as exc:
            out.add(f"[accuracy.{ident}] {exc}", path, exc.key)
            continue
        if path not in broken:
            accuracy.append(AccuracyRule(
                ident,
                str(v["inbox"]) if "inbox" in v else None,
                str(v["channels"]) if "channels" in v else None,
                declared,
            ))
    smtp, routing = plain["smtp"], plain["mail"]
    smtp_paths = {k: check.path(("smtp",), k, smtp) for k in ("password_file", "ca_file")}
    check_smtp(out, smtp, routing, password_written)
    check_routing(out, routing)
    check_plant(out, plain["plant"])
    _check_worker_memory(out, station, check)
    plant_password = check.path(("plant",), "password_file", plain["plant"])
    if out.errors:
        # Problems with a line first, in line order; whole-file problems (often consequences) last.
        errors = [cast(SettingsError, e) for e in out.errors]
        return None, sorted(errors, key=_line_order)
    assert ledger is not None and heartbeat is not None
    config = smtp_config(smtp, smtp_paths)
    routing_record = mail_routing(routing, config.sender)
    folder_of = {key: p for key, p in paths.items() if p is not None}
    return (
        Settings(
            source=name,
            root=root,
            station_name=str(station["name"]),
            rules_dir=folder_of["rules"],
            inboxes=tuple(inboxes),
            work=folder_of["work"],
            archive=folder_of["archive"],
            quarantine=folder_of["quarantine"],
            results=folder_of["results"],
            certificates=folder_of["certificates"],
            mail=folder_of["mail"],
            logs=folder_of["logs"],
            ledger=ledger,
            heartbeat=heartbeat,
            profiles=tuple(profiles),
            smtp=config,
            routing=routing_record,
            workers=cast(int, station["workers"]),
            max_input_MB=cast(float, station["max_input_MB"]),
            max_uncompressed_MB=cast(float, station["max_uncompressed_MB"]),
            task_timeout_s=cast(float, station["task_timeout_s"]),
            max_line_kB=cast(float, station["max_line_kB"]),
            max_rows=cast(int, station["max_rows"]),
            worker_memory_MB=cast(float, station["worker_memory_MB"]),
            waiting_alert_s=cast(float, station["waiting_alert_s"]),
            keep_originals_h=cast(float, station["keep_originals_h"]),
            retry_max_s=cast(float, station["retry_max_s"]),
            reconcile_s=cast(float, station["reconcile_s"]),
            heartbeat_s=cast(float, station["heartbeat_s"]),
            log_max_MB=cast(float, station["log_max_MB"]),
            log_keep=cast(int, station["log_keep"]),
            certify=cast(str, station["certify"]),
            plant=plant_settings(plain["plant"], plant_password, str(station["name"])),
            accuracy=tuple(accuracy),
            channels=ChannelSettings(**{k: v for k, v in plain["channels"].items()}),  # type: ignore[arg-type]
        ),
        [],
    )


def check_settings(text: str, name: str, root: Path) -> list[SettingsError]:
    """Every problem of a settings text, by line (for `formgate check-settings`-like commands)."""
    return _parse(text, name, root)[1]


def load_settings(text: str, name: str, root: Path) -> Settings:
    """Parse a station file's text; ``name`` is the file name errors show, ``root`` its folder.

    Pure: nothing is read or created. Raises SettingsError for the first problem (by line).
    """
    settings, errors = _parse(text, name, root)
    if errors:
        raise errors[0]
    assert settings is not None
    return settings

