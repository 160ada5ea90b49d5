"""Station settings (station.toml) -> Settings: folders, inboxes, profiles, mail server, routing.

``load_settings`` and ``check_settings`` are pure: text in, a Settings or every
problem (file, line, what to do) out; keys and values are checked against
settings_schema.py by rule_tables.py, the rules between keys here. The edges are
small and separate: ``read_settings`` reads the file, ``read_credential_file`` the
SMTP password file, ``check_filesystems`` stats the folders, ``init_station`` writes
a new station. Running the station is station.py's job.

>>> s = load_settings(render_station_toml(), "station.toml", Path("st"))
>>> s.inboxes[0].folder, s.work, s.smtp.host
(PosixPath('st/inbox'), PosixPath('st/work'), None)
"""

from __future__ import annotations

import email.utils
import fnmatch
import ipaddress
import os
import re
import shutil
import stat as stat_mode
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import cast

from pipeline.errors import SettingsError
from pipeline.mail.letters import check_addresses, message_id_for, sanitize_header
from pipeline.mail.smtp import Security, SmtpSettings
from pipeline.model import SourceRef
from pipeline.rulebook.tables import Collector, Values, check_family, check_table, close_match
from pipeline.rulebook.toml_lines import KeyPath, show_table, syntax_position
from pipeline.shipped import RULES_DIR
from pipeline.station.handoff import is_temporary
from pipeline.station.settings_schema import (
    DEFAULT_PORTS,
    LOCAL_SENDER,
    SETTINGS_BY_TABLE,
    SETTINGS_RENAMED,
    SETTINGS_TABLES,
    STATION_FILE,
    render_station_toml,
    toml_value,
)

__all__ = [
    "SHIPPED_RULES",
    "InboxSettings",
    "MailRouting",
    "ProfileRule",
    "Settings",
    "SmtpConfig",
    "check_credential_mode",
    "check_filesystems",
    "check_settings",
    "choose_profile",
    "init_station",
    "load_settings",
    "read_credential_file",
    "read_settings",
    "render_station_toml",
    "smtp_settings",
]

# The rule files and import profiles that ship with formgate (copied by `formgate init`).
SHIPPED_RULES = RULES_DIR
FOLDER_KEYS = ("work", "archive", "quarantine", "results", "certificates", "mail", "logs")
_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_PASSWORD_KEY = re.compile(r"passw(or)?d", re.IGNORECASE)
_MISSING_HINTS = {
    "station": 'Add a [station] table with a line name = "formation-line-1" (the station\'s '
    "name, shown in mails and logs).",
    "inbox": "Add one table per folder the cyclers write into, e.g. [inbox.cyclers] with "
    'folder = "inbox" and handover = "settle" below it.',
}


@dataclass(frozen=True, slots=True)
class InboxSettings:
    """One inbox: its folder, how a finished file is recognised (handoff.py), how it is watched."""

    name: str
    folder: Path
    handover: str  # "rename", "marker" or "settle"
    settle_s: float = 30.0
    cut_wait_factor: float = 10.0
    marker_suffix: str = ".done"
    orphan_marker_s: float = 3600.0
    polling: bool = False
    poll_interval_s: float = 5.0
    profile: Path | None = None  # import profile for files no ProfileRule matches


@dataclass(frozen=True, slots=True)
class ProfileRule:
    """Files whose name matches ``glob`` (case-sensitive fnmatch) are read with profile ``file``."""

    glob: str
    file: Path

    def matches(self, file_name: str) -> bool:
        return fnmatch.fnmatchcase(file_name, self.glob)


@dataclass(frozen=True, slots=True)
class MailRouting:
    """Who gets which letters; an empty tuple means no letters of that kind.

    ``digest_quiet_s``: a lot's digest goes out when no new cell of that lot has been
    judged for this long. ``domain``: of the Message-IDs; load_settings fills in the
    sender's domain when the file gives none.
    """

    failures_to: tuple[str, ...]
    holds_to: tuple[str, ...]
    digests_to: tuple[str, ...]
    alerts_to: tuple[str, ...]
    digest_quiet_s: float = 1800.0
    domain: str | None = None


@dataclass(frozen=True, slots=True)
class SmtpConfig:
    """The [smtp] table as written: no password, only where to find it (see smtp_settings)."""

    host: str | None  # None: mails are written as .eml files into Settings.mail
    port: int
    security: Security
    username: str | None
    password_env: str | None
    password_file: Path | None
    sender: str
    timeout_s: float
    ca_file: Path | None


@dataclass(frozen=True, slots=True, kw_only=True)
class Settings:
    """A station's settings; every path is absolute or relative to the caller's working folder."""

    source: str  # the settings file name as given
    root: Path  # the folder holding station.toml; relative paths in the file are relative to it
    station_name: str
    rules_dir: Path
    inboxes: tuple[InboxSettings, ...]
    work: Path
    archive: Path
    quarantine: Path
    results: Path
    certificates: Path
    mail: Path
    logs: Path
    ledger: Path
    heartbeat: Path
    profiles: tuple[ProfileRule, ...]
    smtp: SmtpConfig
    routing: MailRouting
    workers: int = 2
    max_input_MB: float = 200.0
    max_uncompressed_MB: float = 1024.0
    task_timeout_s: float = 300.0
    max_line_kB: float = 64.0
    max_rows: int = 2_000_000
    worker_memory_MB: float = 2048.0
    waiting_alert_s: float = 3600.0
    retry_max_s: float = 60.0
    reconcile_s: float = 10.0
    heartbeat_s: float = 10.0
    log_max_MB: float = 10.0
    log_keep: int = 5
    certify: str = "all"  # or "failed_and_held": which cells get a PDF certificate

    def all_folders(self) -> tuple[Path, ...]:
        """Every folder the station writes or claims from: the inboxes, then [folders] but rules."""
        return tuple(folder for _, folder in _labelled_folders(self))


def _labelled_folders(settings: Settings) -> list[tuple[str, Path]]:
    inboxes = [(f"[inbox.{i.name}] folder", i.folder) for i in settings.inboxes]
    return inboxes + [(f"[folders] {key}", getattr(settings, key)) for key in FOLDER_KEYS]


def choose_profile(settings: Settings, inbox: InboxSettings, file_name: str) -> Path | None:
    """The import profile for ``file_name``: the first matching glob, else the inbox's, else None.

    None means the file is read as cycle file version 1.
    """
    for rule in settings.profiles:
        if rule.matches(file_name):
            return rule.file
    return inbox.profile


# ---------------------------------------------------------------- checking the text


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


def _shown(text: object) -> str:
    return toml_value(str(text))


@dataclass(frozen=True, slots=True)
class _Place:
    """A folder the file names (or defaults), for the checks between folders."""

    label: str
    path: KeyPath
    key: str
    raw: str
    written: bool
    norm: str

    def __str__(self) -> str:
        if self.written:
            return f"{self.label} = {_shown(self.raw)}"
        return f"{self.label} (default {_shown(self.raw)})"


class _Checker:
    """The rules between keys, over the values that passed the schema."""

    def __init__(self, out: Collector, data: Mapping[str, object], root: Path) -> None:
        self.out = out
        self.data = data
        self.root = root

    def written(self, path: KeyPath, key: str) -> bool:
        node: object = self.data
        for part in path:
            node = node.get(part) if isinstance(node, Mapping) else None
        return isinstance(node, Mapping) and key in node

    def path(self, path: KeyPath, key: str, values: Values) -> Path | None:
        """The value of a path key joined to the root and normalised, or None (absent or bad)."""
        raw = values.get(key)
        if not isinstance(raw, str):
            return None
        where = f"{show_table(path)} {key}"
        if not raw.strip():
            spec = SETTINGS_BY_TABLE[path[0]].key(key)
            default = spec.default if spec is not None else None
            self.out.add(
                f"{where} is empty",
                path,
                key,
                f"Give a path, e.g. {key} = {_shown(default)}, or remove the line to use that "
                "default."
                if isinstance(default, str)
                else "Give a path, or remove the line.",
            )
            return None
        if any(ord(c) < 32 or ord(c) == 127 for c in raw):
            self.out.add(
                f"{where} = {_shown(raw)} holds a control character",
                path,
                key,
                "Remove it: a path may hold no tabs, line breaks or other control characters.",
            )
            return None
        return Path(os.path.normpath(self.root / raw))

    def distinct(self, places: list[_Place]) -> None:
        """Every folder must be a different one."""
        seen: dict[str, _Place] = {}
        for place in places:
            first = seen.setdefault(place.norm, place)
            if first is place:
                continue
            subject, other = (
                (place, first) if place.written or not first.written else (first, place)
            )
            both_inboxes = subject.path[0] == other.path[0] == "inbox"
            self.out.add(
                f"{subject} is the same folder as {other}",
                subject.path,
                subject.key,
                "Give each inbox its own folder, so that every file is claimed by one inbox only."
                if both_inboxes
                else "Give each its own folder: the station tells files apart by the folder they "
                "are in, and moves them from an inbox into work, then archive or quarantine.",
            )

    def holds_state(
        self, place: _Place, station: Values, ledger: Path | None, heartbeat: Path | None
    ) -> None:
        """An inbox or the work folder may not hold station.toml, the ledger or the heartbeat."""
        root = os.path.normpath(self.root)
        hint = ""
        if place.norm == root:
            what = f"the station folder itself, which holds {STATION_FILE} and the ledger"
            own = "inbox" if place.key == "folder" else place.key
            hint = f"give it a folder of its own, e.g. {place.key} = {_shown(own)}"
        elif ledger is not None and place.norm == str(ledger.parent):
            what = f"the folder of the ledger ([station] ledger = {_shown(station['ledger'])})"
            hint = 'keep the ledger elsewhere, e.g. ledger = "ledger.sqlite"'
        elif heartbeat is not None and place.norm == str(heartbeat.parent):
            what = (
                "the folder of the heartbeat file "
                f"([station] heartbeat = {_shown(station['heartbeat'])})"
            )
            hint = 'keep the heartbeat file elsewhere, e.g. heartbeat = "heartbeat.json"'
        if hint:
            self.out.add(
                f"{place} is {what}",
                place.path,
                place.key,
                (
                    "Everything in an inbox is claimed"
                    if place.path[0] == "inbox"
                    else "Every file in the work folder is taken for a claimed input"
                )
                + f": {hint}.",
            )

    def marker(self, path: KeyPath, suffix: str) -> None:
        if (
            suffix.startswith(".")
            and len(suffix) > 1
            and not is_temporary("x" + suffix)
            and not (set(suffix) & {"/", "\\"})
        ):
            return
        self.out.add(
            f"{show_table(path)} marker_suffix = {_shown(suffix)} cannot be used",
            path,
            "marker_suffix",
            "Give a suffix that starts with a dot and is not .tmp or .part (names ending so are "
            'never claimed), e.g. marker_suffix = ".done".',
        )

    def glob(self, path: KeyPath, glob: str) -> None:
        if "/" in glob or "\\" in glob:
            self.out.add(
                f"{show_table(path)} glob = {_shown(glob)} holds a folder separator",
                path,
                "glob",
                "The glob is matched against the file's name only: remove the folder part, "
                'e.g. glob = "*_sc.csv".',
            )


def _host_problem(host: str) -> str | None:
    if not host.strip():
        return "Give the mail server's name, or remove the line to write mails as .eml files."
    if any(c.isspace() or ord(c) < 32 for c in host) or "/" in host:
        return 'Give only the server\'s name or address, e.g. host = "mail.example.com".'
    if ":" in host:
        try:
            ipaddress.IPv6Address(host)
        except ValueError:
            return 'Give the port in its own key: host = "mail.example.com" and port = 587.'
    return None


def _check_sender(sender: str) -> bool:
    address = email.utils.parseaddr(sender)[1]
    if sanitize_header(sender, 300) != sender.strip() or not address:
        return False
    try:
        check_addresses([address])
    except ValueError:
        return False
    return True


def _check_smtp(out: Collector, smtp: Values, routing: Values, password_written: bool) -> None:
    path: KeyPath = ("smtp",)
    host, username = smtp.get("host"), smtp.get("username")
    env, file = smtp.get("password_env"), smtp.get("password_file")
    if isinstance(host, str) and (hint := _host_problem(host)) is not None:
        out.add(f"[smtp] host = {_shown(host)} is not a server name", path, "host", hint)
    if username is not None and smtp.get("security") == "none":
        out.add(
            '[smtp] security = "none" with a username would send the password in clear text',
            path,
            "security",
            'Set security = "starttls" (port 587) or "tls" (port 465), or remove username '
            "for a relay that needs no log-in.",
        )
    if username is not None and env is None and file is None and not password_written:
        out.add(
            "[smtp] username is set but neither password_env nor password_file",
            path,
            "username",
            'Add password_env = "FORMGATE_SMTP_PASSWORD" (an environment variable that holds '
            'the password) or password_file = "smtp-password" (a file only the station\'s user '
            "can read).",
        )
    elif env is not None and file is not None:
        out.add(
            "[smtp] gives both password_env and password_file",
            path,
            "password_file",
            "Keep one of them, so that it is clear where the password comes from.",
        )
    for key, value in (("password_env", env), ("password_file", file)):
        if value is not None and username is None:
            out.add(
                f"[smtp] {key} is set but username is not",
                path,
                key,
                f'Add username = "formgate" (the log-in name), or remove {key} for a server '
                "that needs no log-in.",
            )
    if isinstance(env, str) and not _ENV_NAME.fullmatch(env):
        out.add(  # the value is not shown: it may be the password itself
            "[smtp] password_env is not an environment variable name",
            path,
            "password_env",
            "Give the variable's name (letters, digits and _), not its value, e.g. "
            'password_env = "FORMGATE_SMTP_PASSWORD".',
        )
    sender = smtp.get("sender")
    if isinstance(sender, str) and not _check_sender(sender):
        out.add(
            f"[smtp] sender = {_shown(sender)} is not a mail address",
            path,
            "sender",
            'Write it as local@domain, optionally with a name: sender = "formgate@example.com" '
            'or "Formation line 1 <formgate@example.com>".',
        )
    if host is not None:
        if "sender" not in smtp:
            out.add(
                "[smtp] host is set but sender is not",
                path,
                "host",
                'Add sender = "formgate@example.com" with an address the mail server accepts as '
                "the From of the station's mails.",
            )
        if routing.get("failures_to") == ():
            out.add(
                "[smtp] host is set but [mail] failures_to is empty",
                path,
                "host",
                'Add failures_to = ["quality@example.com"] under [mail]: a failed cell may be '
                "dangerous, and its letter must reach someone at once.",
            )


def _check_routing(out: Collector, routing: Values) -> None:
    path: KeyPath = ("mail",)
    for key in ("failures_to", "holds_to", "digests_to", "alerts_to"):
        addresses = routing.get(key, ())
        assert isinstance(addresses, tuple)
        for address in addresses:
            try:
                check_addresses([address])
            except ValueError:
                several = any(c in address for c in ",; ")
                out.add(
                    f"[mail] {key} holds {_shown(address)}, which is not a mail address",
                    path,
                    key,
                    f'Give each address as its own text: {key} = ["quality@example.com", '
                    '"line-lead@example.com"].'
                    if several and "@" in address
                    else 'Write it as local@domain, e.g. "quality@example.com", without a name '
                    "or angle brackets.",
                )
    domain = routing.get("message_id_domain")
    if isinstance(domain, str):
        try:
            message_id_for("check", "check", domain=domain)
        except ValueError:
            out.add(
                f"[mail] message_id_domain = {_shown(domain)} is not a domain name",
                path,
                "message_id_domain",
                'Give a domain such as "example.com" (letters, digits, dots and hyphens), or '
                "remove the line to use the sender's domain.",
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
    check = _Checker(out, data, root)
    station, folders = plain.get("station", {}), plain["folders"]
    paths = {key: check.path(("folders",), key, folders) for key in ("rules", *FOLDER_KEYS)}
    ledger = check.path(("station",), "ledger", station)
    heartbeat = check.path(("station",), "heartbeat", station)
    places: list[_Place] = []
    for key in ("rules", *FOLDER_KEYS):
        if (found := paths[key]) is not None:
            written = check.written(("folders",), key)
            place = _Place(
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
        place = _Place(
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
    smtp, routing = plain["smtp"], plain["mail"]
    smtp_paths = {k: check.path(("smtp",), k, smtp) for k in ("password_file", "ca_file")}
    _check_smtp(out, smtp, routing, password_written)
    _check_routing(out, routing)
    if out.errors:
        # Problems with a line first, in line order; whole-file problems (often consequences) last.
        errors = [cast(SettingsError, e) for e in out.errors]
        return None, sorted(errors, key=_line_order)
    assert ledger is not None and heartbeat is not None
    security = cast(Security, smtp["security"])
    sender = str(smtp.get("sender", LOCAL_SENDER)).strip()
    config = SmtpConfig(
        host=cast("str | None", smtp.get("host")),
        port=int(cast(int, smtp.get("port", DEFAULT_PORTS[security]))),
        security=security,
        username=cast("str | None", smtp.get("username")),
        password_env=cast("str | None", smtp.get("password_env")),
        password_file=smtp_paths["password_file"],
        sender=sender,
        timeout_s=cast(float, smtp["timeout_s"]),
        ca_file=smtp_paths["ca_file"],
    )

    def addresses(key: str) -> tuple[str, ...]:
        return tuple(a.strip() for a in cast(tuple[str, ...], routing[key]))

    domain = routing.get("message_id_domain")
    mail_routing = MailRouting(
        failures_to=addresses("failures_to"),
        holds_to=addresses("holds_to"),
        digests_to=addresses("digests_to"),
        alerts_to=addresses("alerts_to"),
        digest_quiet_s=cast(float, routing["digest_quiet_s"]),
        domain=str(domain)
        if domain is not None
        else email.utils.parseaddr(sender)[1].rsplit("@", 1)[1],
    )
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
            routing=mail_routing,
            workers=cast(int, station["workers"]),
            max_input_MB=cast(float, station["max_input_MB"]),
            max_uncompressed_MB=cast(float, station["max_uncompressed_MB"]),
            task_timeout_s=cast(float, station["task_timeout_s"]),
            max_line_kB=cast(float, station["max_line_kB"]),
            max_rows=cast(int, station["max_rows"]),
            worker_memory_MB=cast(float, station["worker_memory_MB"]),
            waiting_alert_s=cast(float, station["waiting_alert_s"]),
            retry_max_s=cast(float, station["retry_max_s"]),
            reconcile_s=cast(float, station["reconcile_s"]),
            heartbeat_s=cast(float, station["heartbeat_s"]),
            log_max_MB=cast(float, station["log_max_MB"]),
            log_keep=cast(int, station["log_keep"]),
            certify=cast(str, station["certify"]),
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


# ---------------------------------------------------------------- edges: files, environment, disks


def read_settings(folder_or_file: Path) -> Settings:
    """Load ``<folder>/station.toml`` (or the file given); its paths are relative to its folder."""
    given = Path(folder_or_file)
    file = given / STATION_FILE if given.is_dir() else given
    try:
        data = file.read_bytes()
    except FileNotFoundError:
        raise SettingsError(
            "no such station file",
            SourceRef(str(file)),
            hint=f"Create a station with formgate init {given}, or give the folder that holds "
            f"{STATION_FILE}.",
        ) from None
    except OSError as exc:
        raise SettingsError(
            f"cannot be read ({exc.strerror or exc})",
            SourceRef(str(file)),
            hint="Check that the station's user may read it.",
        ) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        column = exc.start - data.rfind(b"\n", 0, exc.start)  # in bytes, 1-based
        raise SettingsError(
            "not UTF-8 text",
            SourceRef(str(file), line, column),
            hint="Save the file with UTF-8 encoding.",
        ) from None
    return load_settings(text, str(file), file.parent)


def check_credential_mode(path: Path, mode: int) -> None:
    """Refuse a password file that others than its owner may read or change (``mode``: st_mode)."""
    if mode & 0o077:
        raise SettingsError(
            f"the password file can be read or changed by other users (mode "
            f"{stat_mode.S_IMODE(mode):04o})",
            SourceRef(str(path)),
            hint=f"Run chmod 600 {path}, so that only the station's user can read it.",
        )


def read_credential_file(path: Path) -> str:
    """The text of a password file, after checking that only its owner may read it (edge)."""
    check_credential_mode(path, os.stat(path).st_mode)
    return path.read_text(encoding="utf-8")


def _password(
    settings: Settings, environ: Mapping[str, str], read_text: Callable[[Path], str]
) -> str:
    config, where = settings.smtp, SourceRef(settings.source)
    if config.password_env is not None:
        name = config.password_env
        value = environ.get(name)
        if not value:
            state = "is not set" if value is None else "is empty"
            raise SettingsError(
                f"[smtp] password_env names the environment variable {name}, which {state}",
                where,
                hint=f"Set {name} to the mail password in the environment the station runs in "
                "(e.g. its service definition), or use password_file instead.",
            )
        return value
    if config.password_file is None:
        raise SettingsError(
            "[smtp] username is set but neither password_env nor password_file",
            where,
            hint="Add password_env or password_file under [smtp].",
        )
    path = config.password_file
    try:
        text = read_text(path)
    except OSError as exc:
        raise SettingsError(
            f"the password file cannot be read ({exc.strerror or exc})",
            SourceRef(str(path)),
            hint=f"Write the password on the file's first line and run chmod 600 {path}, or "
            f"correct [smtp] password_file in {settings.source}.",
        ) from None
    except UnicodeDecodeError:
        raise SettingsError(
            "the password file is not UTF-8 text",
            SourceRef(str(path)),
            hint="Save it with UTF-8 encoding.",
        ) from None
    lines = text.splitlines()
    password = lines[0].strip() if lines else ""
    if not password:
        raise SettingsError(
            "the password file's first line is empty",
            SourceRef(str(path), 1),
            hint="Write the password on the first line.",
        )
    return password


def smtp_settings(
    settings: Settings,
    environ: Mapping[str, str],
    read_text: Callable[[Path], str] = read_credential_file,
) -> SmtpSettings:
    """The mail server settings for smtp.send, with the password looked up.

    The password comes from ``environ[password_env]`` or from the first line of
    ``password_file``, read with ``read_text``: by default :func:`read_credential_file`,
    which refuses a file that others may read; pass another only in tests. No
    username: no password is looked up.
    """
    config = settings.smtp
    password = _password(settings, environ, read_text) if config.username is not None else None
    return SmtpSettings(
        host=config.host,
        sender=config.sender,
        port=config.port,
        security=config.security,
        username=config.username,
        password=password,
        timeout_s=config.timeout_s,
        ca_file=str(config.ca_file) if config.ca_file is not None else None,
        eml_folder=settings.mail,
    )


def check_filesystems(settings: Settings, stat: Callable[[Path], os.stat_result] = os.stat) -> None:
    """Refuse to start unless every folder of ``all_folders()`` exists and all share one filesystem.

    Claiming a file renames it from folder to folder; only a rename within one
    filesystem is atomic.
    """
    first: tuple[str, Path, int] | None = None
    for label, folder in _labelled_folders(settings):
        try:
            found = stat(folder)
        except FileNotFoundError:
            raise SettingsError(
                f"{label}: the folder {folder} does not exist",
                SourceRef(settings.source),
                hint="Create it (formgate init creates the whole layout), or correct the path.",
            ) from None
        except OSError as exc:
            raise SettingsError(
                f"{label}: the folder {folder} cannot be reached ({exc.strerror or exc})",
                SourceRef(settings.source),
                hint="Check that it is mounted and that the station's user may use it.",
            ) from None
        if not stat_mode.S_ISDIR(found.st_mode):
            raise SettingsError(
                f"{label}: {folder} is not a folder",
                SourceRef(settings.source),
                hint="Give the path of a folder, or move the file away and create the folder.",
            )
        if first is None:
            first = (label, folder, found.st_dev)
        elif found.st_dev != first[2]:
            raise SettingsError(
                f"{label} ({folder}) is on another filesystem than {first[0]} ({first[1]})",
                SourceRef(settings.source),
                hint="The station claims files by renaming them between its folders, and a "
                "rename across filesystems is a copy, not atomic: a file could be seen half "
                "moved, or twice. Put all the folders on one filesystem (with an inbox on a "
                "network share, the other folders on that share too).",
            )


def init_station(folder: Path, *, rules_from: Path | None = None) -> list[Path]:
    """Create a station in ``folder``: the folder layout, rules, and a commented station.toml.

    Copies ``rules_from/*.toml`` and ``rules_from/profiles/*.toml`` into the rules
    folder (pass :data:`SHIPPED_RULES` for the shipped ones), keeping files already
    there. Refuses (SettingsError) when ``folder/station.toml`` exists. Returns what
    it created, station.toml last (it is written last, so a failed init can be rerun).
    """
    station_file = folder / STATION_FILE

    def refuse() -> SettingsError:
        return SettingsError(
            "a station file is already there",
            SourceRef(str(station_file)),
            hint="formgate init never overwrites a station file: edit it, or give another folder.",
        )

    if station_file.exists():
        raise refuse()
    text = render_station_toml()
    settings = load_settings(text, str(station_file), folder)
    created: list[Path] = []
    for path in (folder, settings.rules_dir, *settings.all_folders()):
        if not path.exists():
            path.mkdir(parents=True)
            created.append(path)
    if rules_from is not None:
        for source, target in (
            (rules_from, settings.rules_dir),
            (rules_from / "profiles", settings.rules_dir / "profiles"),
        ):
            for rule_file in sorted(source.glob("*.toml")):
                if not target.exists():
                    target.mkdir(parents=True)
                    created.append(target)
                destination = target / rule_file.name
                if rule_file.is_file() and not destination.exists():
                    shutil.copyfile(rule_file, destination)
                    created.append(destination)
    try:
        with station_file.open("x", encoding="utf-8") as handle:
            handle.write(text)
    except FileExistsError:
        raise refuse() from None
    created.append(station_file)
    return created
