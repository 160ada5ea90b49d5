"""The settings' edges: reading station.toml, the SMTP password, the disks; creating a station.

Each reads or writes the filesystem or environment, and leaves the parsing to
check.py (load_settings) and the records to records.py.
"""

from __future__ import annotations

import os
import shutil
import stat as stat_mode
from collections.abc import Callable, Mapping
from pathlib import Path

from pipeline.errors import SettingsError, SettingsProblems
from pipeline.mail.smtp import SmtpSettings
from pipeline.model import SourceRef
from pipeline.shipped import RULES_DIR
from pipeline.station.settings.check import check_settings, load_settings
from pipeline.station.settings.records import Settings, labelled_folders
from pipeline.station.settings.schema import STATION_FILE, render_station_toml

# The rule files and import profiles that ship with formgate (copied by `formgate init`).
SHIPPED_RULES = RULES_DIR


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
    problems = check_settings(text, str(file), file.parent)
    if len(problems) > 1:  # all of them at once, as `formgate rules check` lists a rule file's
        raise SettingsProblems(problems)
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


def check_filesystems(
    settings: Settings,
    stat: Callable[[Path], os.stat_result] = os.stat,
    *,
    inboxes_may_be_missing: bool = False,
) -> None:
    """Refuse to start unless every folder of ``all_folders()`` exists and all share one filesystem.

    Claiming a file renames it from folder to folder; only a rename within one
    filesystem is atomic. With ``inboxes_may_be_missing`` an inbox that is not there or
    cannot be reached (an unmounted share) is left out: the running station shows it as
    a trouble of that inbox and judges the others (its filesystem is checked when it is
    there).
    """
    first: tuple[str, Path, int] | None = None
    inboxes = {i.folder for i in settings.inboxes}
    for label, folder in labelled_folders(settings):
        try:
            found = stat(folder)
        except OSError as exc:
            if inboxes_may_be_missing and folder in inboxes:
                continue
            if isinstance(exc, FileNotFoundError):
                raise SettingsError(
                    f"{label}: the folder {folder} does not exist",
                    SourceRef(settings.source),
                    hint="Create it (formgate init creates the whole layout), or correct the path.",
                ) from None
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
