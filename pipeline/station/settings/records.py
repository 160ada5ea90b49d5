"""The Settings records a station runs on, and choosing an import profile for a file.

Nothing here reads or checks anything. Turning station.toml's text into these records
is check.py's job; reading files, credentials and disks is files.py's.
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.mail.smtp import Security
from pipeline.model import AccuracyClass, ChannelClasses

FOLDER_KEYS = ("work", "archive", "quarantine", "results", "certificates", "mail", "logs")


@dataclass(frozen=True, slots=True)
class ChannelSettings:
    """The [channels] table: the suspect-channel screen, and what a suspect channel's fails do."""

    false_alarm: float = 0.01
    recent: int = 20
    min_records: int = 5
    min_run: int = 3
    window: int = 2000
    suspect_fails: str = "fail"  # or "retest"


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
class AccuracyRule:
    """``[accuracy.ID]``: the class of the channels of ``inbox`` (None: every inbox) whose
    channel metadata matches ``channels`` (None: every channel)."""

    ident: str
    inbox: str | None
    channels: str | None
    accuracy: AccuracyClass


@dataclass(frozen=True, slots=True)
class MailRouting:
    """Who gets which letters; an empty tuple means no letters of that kind.

    ``digest_quiet_s``: a lot's digest goes out when no new cell of that lot has been
    judged for this long. ``outage_alert_s``: one alert once no mail could be
    delivered for this long (station.mailtrouble). ``certificates_url``: see
    :func:`pipeline.station.digests.certificate_link`. ``domain``: of the
    Message-IDs; load_settings fills in the
    sender's domain when the file gives none.
    """

    failures_to: tuple[str, ...]
    holds_to: tuple[str, ...]
    digests_to: tuple[str, ...]
    alerts_to: tuple[str, ...]
    digest_quiet_s: float = 1800.0
    domain: str | None = None
    certificates_url: str | None = None  # a digest links certificates under this address
    outage_alert_s: float = 900.0


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


@dataclass(frozen=True, slots=True)
class PlantSettings:
    """The [plant] table as written: no password, only the file that holds it (settings/plant.py)."""

    database: str
    station_id: str
    password_file: Path | None
    batch_rows: int = 500
    connect_timeout_s: float = 10.0
    statement_timeout_s: float = 30.0
    retry_max_s: float = 300.0
    alert_after_s: float = 900.0


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
    max_uncompressed_MB: float = 256.0
    task_timeout_s: float = 300.0
    max_line_kB: float = 64.0
    max_rows: int = 2_000_000
    worker_memory_MB: float = 2048.0
    waiting_alert_s: float = 3600.0
    keep_originals_h: float = 24.0
    retry_max_s: float = 60.0
    reconcile_s: float = 10.0
    heartbeat_s: float = 10.0
    log_max_MB: float = 10.0
    log_keep: int = 5
    certify: str = "all"  # or "failed_and_held": which cells get a PDF certificate
    plant: PlantSettings | None = None  # the plant database the ledger is forwarded to
    accuracy: tuple[AccuracyRule, ...] = ()  # channels' accuracy classes, in the file's order
    channels: ChannelSettings = field(default_factory=ChannelSettings)  # [channels]

    def all_folders(self) -> tuple[Path, ...]:
        """Every folder the station writes or claims from: the inboxes, then [folders] but rules."""
        return tuple(folder for _, folder in labelled_folders(self))


def labelled_folders(settings: Settings) -> list[tuple[str, Path]]:
    """Every folder of ``all_folders()`` with the key that names it, for messages."""
    inboxes = [(f"[inbox.{i.name}] folder", i.folder) for i in settings.inboxes]
    return inboxes + [(f"[folders] {key}", getattr(settings, key)) for key in FOLDER_KEYS]


def channel_classes(settings: Settings, inbox: str) -> ChannelClasses | None:
    """The accuracy classes for the records of ``inbox``, first match first (None: none declared)."""
    rules = [r for r in settings.accuracy if r.inbox is None or r.inbox == inbox]
    if not rules:
        return None
    return ChannelClasses(
        tuple((r.channels or "*", r.accuracy) for r in rules),
        next((r.accuracy for r in rules if r.channels is None), None),
    )


def choose_profile(settings: Settings, inbox: InboxSettings, file_name: str) -> Path | None:
    """The import profile for ``file_name``: the first matching glob, else the inbox's, else None.

    None means the file is read as cycle file version 1.
    """
    for rule in settings.profiles:
        if rule.matches(file_name):
            return rule.file
    return inbox.profile

