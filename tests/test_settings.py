"""Station settings: every message whole, the default file, init, filesystems, passwords."""

from __future__ import annotations

import dataclasses
import os
import pickle
import re
import stat
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.errors import SettingsError
from pipeline.model import AccuracyClass
from pipeline.rulebook.schema import INTEGER, NUMBER, TEXT, TEXT_LIST, Table
from pipeline.station.settings import (
    InboxSettings,
    MailRouting,
    Settings,
    channel_classes,
    check_filesystems,
    check_settings,
    choose_profile,
    init_station,
    load_settings,
    read_settings,
    render_station_toml,
    smtp_settings,
)
from pipeline.station.settings.records import PlantSettings
from pipeline.station.settings.schema import SETTINGS_TABLES, render_docs
from tests.conftest import DATA_DIR, REPO, RULES_DIR

BAD = DATA_DIR / "settings" / "bad"
GOOD = DATA_DIR / "settings" / "good"
BAD_CASES = sorted(p.stem for p in BAD.glob("*.toml"))
GOOD_CASES = sorted(p.stem for p in GOOD.glob("*.toml"))
ROOT = Path("station")

MINIMAL = (GOOD / "minimal.toml").read_text(encoding="utf-8")


def _first_error(text: str) -> str:
    with pytest.raises(SettingsError) as caught:
        load_settings(text, "station.toml", ROOT)
    return str(caught.value)


def _load(text: str) -> Settings:
    return load_settings(text, "station.toml", ROOT)


# ---------------------------------------------------------------- bad files, one message each


def test_there_are_bad_cases_and_each_has_its_expected_message() -> None:
    assert len(BAD_CASES) >= 40
    assert sorted(p.stem for p in BAD.glob("*.expected")) == BAD_CASES


@pytest.mark.parametrize("case", BAD_CASES)
def test_bad_settings_file_gives_its_whole_message(case: str) -> None:
    text = (BAD / f"{case}.toml").read_text(encoding="utf-8")
    expected = (BAD / f"{case}.expected").read_text(encoding="utf-8")
    actual = _first_error(text) + "\n"
    if actual != expected:  # leave the actual message beside the expected one to compare
        (BAD / f"{case}.actual").write_text(actual, encoding="utf-8")
    assert actual == expected


@pytest.mark.parametrize("case", BAD_CASES)
def test_check_settings_reports_the_same_first_problem(case: str) -> None:
    text = (BAD / f"{case}.toml").read_text(encoding="utf-8")
    problems = check_settings(text, "station.toml", ROOT)
    assert problems
    assert str(problems[0]) + "\n" == (BAD / f"{case}.expected").read_text(encoding="utf-8")
    assert all(isinstance(p, SettingsError) and p.where is not None for p in problems)


@pytest.mark.parametrize("case", ["password_in_smtp", "password_at_top_level"])
def test_a_password_in_the_file_is_never_repeated_in_a_message(case: str) -> None:
    text = (BAD / f"{case}.toml").read_text(encoding="utf-8")
    assert "do-not-show-this" in text
    problems = check_settings(text, "station.toml", ROOT)
    assert all("do-not-show-this" not in str(p) for p in problems)


def test_a_password_env_that_holds_a_value_is_not_repeated() -> None:
    text = (BAD / "password_env_holds_a_value.toml").read_text(encoding="utf-8")
    assert all("do not show" not in str(p) for p in check_settings(text, "s.toml", ROOT))


def test_every_problem_of_a_file_is_collected_in_line_order() -> None:
    text = (
        '[station]\nname = "x"\nworkers = 0\n\n'  # line 3
        '[inbox.a]\nfolder = "work"\nhandover = "settle"\nsettle_s = -1\n\n'  # lines 6, 8
        '[smtp]\nhost = "mail.example.com"\nsecurity = "none"\nusername = "u"\n'  # 11-13
        'password_env = "P"\nsender = "formgate@example.com"\n\n'
        '[mail]\nfailures_to = ["q@example.com"]\nalerts_to = ["no address"]\n'  # line 19
    )
    assert [str(e) for e in check_settings(text, "station.toml", ROOT)] == [
        "station.toml, line 3: [station] workers = 0 is out of range.\n  It must be at least 1.",
        'station.toml, line 6: [inbox.a] folder = "work" is the same folder as [folders] work '
        '(default "work").\n  Give each its own folder: the station tells files apart by the '
        "folder they are in, and moves them from an inbox into work, then archive or quarantine.",
        "station.toml, line 8: [inbox.a] settle_s = -1 s is out of range.\n"
        "  It must be greater than 0 s.",
        'station.toml, line 12: [smtp] security = "none" with a username would send the '
        'password in clear text.\n  Set security = "starttls" (port 587) or "tls" (port 465), '
        "or remove username for a relay that needs no log-in.",
        'station.toml, line 19: [mail] alerts_to holds "no address", which is not a mail '
        'address.\n  Write it as local@domain, e.g. "quality@example.com", without a name or '
        "angle brackets.",
    ]


def test_a_crlf_file_with_a_byte_order_mark_loads_with_right_lines() -> None:
    text = "\ufeff" + MINIMAL.replace("\n", "\r\n")
    assert _load(text).station_name == "pilot-line"
    broken = "\ufeff" + MINIMAL.replace('"rename"', '"renamed"').replace("\n", "\r\n")
    assert _first_error(broken).startswith("station.toml, line 7: [inbox.cyclers] handover = ")


# ---------------------------------------------------------------- good files


@pytest.mark.parametrize("case", GOOD_CASES)
def test_good_settings_file_loads(case: str) -> None:
    loaded = _load((GOOD / f"{case}.toml").read_text(encoding="utf-8"))
    assert loaded.inboxes and loaded.source == "station.toml" and loaded.root == ROOT


def test_all_keys_file_uses_every_schema_key_and_each_reaches_the_settings() -> None:
    text = (GOOD / "all_keys.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    for table in SETTINGS_TABLES:
        bodies = list(data[table.name].values()) if table.named else [data[table.name]]
        used = {key for body in bodies for key in body}
        # password_env and password_file exclude each other: password_from_environment.toml
        # has the first.
        other = {"password_env"} if table.name == "smtp" else set()
        assert used | other == {k.name for k in table.keys}, table.name
    s = _load(text)
    assert (s.station_name, s.workers, s.max_input_MB, s.max_uncompressed_MB) == (
        "formation-line-2",
        8,
        50.5,
        300.0,
    )
    assert s.certify == "failed_and_held"
    c = s.channels
    assert (c.false_alarm, c.recent, c.min_records, c.min_run, c.window, c.suspect_fails) == (
        0.005, 30, 8, 4, 5000, "retest")
    assert s.keep_originals_h == 6.0
    assert (s.max_line_kB, s.max_rows, s.worker_memory_MB, s.waiting_alert_s, s.retry_max_s) == (
        16.0,
        500_000,
        1536.0,
        900.0,
        30.0,
    )
    assert (s.task_timeout_s, s.reconcile_s, s.heartbeat_s, s.log_max_MB, s.log_keep) == (
        120.0,
        20.0,
        15.0,
        2.5,
        9,
    )
    assert (s.ledger, s.heartbeat) == (ROOT / "state/ledger.sqlite", ROOT / "state/heartbeat.json")
    assert (s.rules_dir, s.work, s.archive, s.quarantine) == (
        ROOT / "acceptance",
        ROOT / "claimed",
        ROOT / "done",
        ROOT / "refused",
    )
    assert (s.results, s.certificates, s.mail, s.logs) == (
        ROOT / "json",
        ROOT / "pdf",
        ROOT / "outbox",
        ROOT / "log",
    )
    assert s.inboxes[0] == InboxSettings(
        name="hall-a",
        folder=Path("/srv/share/hall-a"),
        handover="marker",
        settle_s=45.0,
        cut_wait_factor=4.0,
        marker_suffix=".ready",
        orphan_marker_s=600.0,
        polling=True,
        poll_interval_s=2.0,
        profile=ROOT / "acceptance/profiles/tab_separated_ms.toml",
    )
    assert s.inboxes[1] == InboxSettings("hall-b", ROOT / "hall-b", "settle")
    old_racks, hall_a = s.accuracy
    assert (old_racks.inbox, old_racks.channels, hall_a.inbox, hall_a.channels) == (
        "hall-a", "R1-*", "hall-a", None
    )
    assert old_racks.accuracy == AccuracyClass(
        0.05, 2.0, 0.05, 0.05, 50.0, 1.5, 100.0, "station.toml [accuracy.hall-a-old-racks]"
    )
    classes = channel_classes(s, "hall-a")
    assert classes is not None
    assert classes.choose("R1-07") == old_racks.accuracy
    assert classes.choose("R2-01") == classes.choose(None) == hall_a.accuracy
    assert hall_a.accuracy.current_range_a == 20.0 and hall_a.accuracy.voltage_mv == 1.0
    assert channel_classes(s, "hall-b") is None  # the default class, or a profile's
    assert [(p.glob, p.file.name) for p in s.profiles] == [
        ("A7-*_sc.csv", "semicolon_decimal_comma.toml"),
        ("*_sc.csv", "tab_separated_ms.toml"),
    ]
    smtp = s.smtp
    assert (smtp.host, smtp.port, smtp.security, smtp.username, smtp.password_env) == (
        "mail.example.com",
        465,
        "tls",
        "formgate",
        None,
    )
    assert (smtp.password_file, smtp.ca_file, smtp.timeout_s) == (
        ROOT / "secrets/smtp-password",
        ROOT / "secrets/site-ca.pem",
        12.0,
    )
    assert smtp.sender == "Formation line 2 <formgate@example.com>"
    assert s.routing == MailRouting(
        failures_to=("quality@example.com", "line-lead@example.com"),
        holds_to=("quality@example.com",),
        digests_to=("production@example.com",),
        alerts_to=("maintenance@example.com",),
        digest_quiet_s=900.0,
        outage_alert_s=600.0,
        domain="line-2.example.com",
        certificates_url="https://quality.example.com/formgate/certificates/",
    )
    assert s.plant == PlantSettings(
        database="postgresql://formgate_line2@plant-db.example.com:5433/formgate",
        station_id="hall-b-line-2",
        password_file=ROOT / "secrets/plant-password",
        batch_rows=250,
        connect_timeout_s=5.0,
        statement_timeout_s=20.0,
        retry_max_s=120.0,
        alert_after_s=300.0,
    )
    assert s.all_folders() == (
        Path("/srv/share/hall-a"),
        ROOT / "hall-b",
        ROOT / "claimed",
        ROOT / "done",
        ROOT / "refused",
        ROOT / "json",
        ROOT / "pdf",
        ROOT / "outbox",
        ROOT / "log",
    )


def _schema_default(table: str, key: str) -> object:
    spec = next(t for t in SETTINGS_TABLES if t.name == table).key(key)
    assert spec is not None
    return spec.default


def test_defaults_of_the_schema_and_of_the_records_agree() -> None:
    s = _load(MINIMAL)
    inbox = s.inboxes[0]
    for field in dataclasses.fields(InboxSettings):
        if field.name in ("settle_s", "marker_suffix", "orphan_marker_s", "poll_interval_s"):
            assert (
                field.default == _schema_default("inbox", field.name) == getattr(inbox, field.name)
            )
    assert inbox.polling is False and inbox.profile is None
    for field in dataclasses.fields(Settings):
        if field.default is not dataclasses.MISSING and field.name not in ("plant", "accuracy"):
            assert field.default == _schema_default("station", field.name) == getattr(s, field.name)
    assert s.plant is None  # no [plant] database: nothing is forwarded
    for field in dataclasses.fields(PlantSettings):
        if field.default is not dataclasses.MISSING:
            assert field.default == _schema_default("plant", field.name)
    assert MailRouting((), (), (), ()).digest_quiet_s == _schema_default("mail", "digest_quiet_s")
    assert MailRouting((), (), (), ()).outage_alert_s == _schema_default("mail", "outage_alert_s")
    assert s.routing.outage_alert_s == 900.0
    assert s.routing.digest_quiet_s == 1800.0
    assert (s.ledger, s.heartbeat, s.rules_dir) == (
        ROOT / "ledger.sqlite",
        ROOT / "heartbeat.json",
        ROOT / "rules",
    )


def test_no_mail_server_means_eml_files_from_a_local_sender() -> None:
    s = _load(MINIMAL)
    assert (s.smtp.host, s.smtp.sender, s.smtp.port, s.smtp.security) == (
        None,
        "formgate@localhost",
        587,
        "starttls",
    )
    assert s.routing.domain == "localhost"  # the sender's domain
    assert s.routing == MailRouting((), (), (), (), 1800.0, "localhost")


@pytest.mark.parametrize(("security", "port"), [("starttls", 587), ("tls", 465), ("none", 25)])
def test_the_port_follows_the_security_when_not_given(security: str, port: int) -> None:
    text = (GOOD / "local_relay.toml").read_text(encoding="utf-8")
    s = _load(text.replace('security = "none"', f'security = "{security}"'))
    assert s.smtp.port == port


def test_message_id_domain_defaults_to_the_senders_domain() -> None:
    s = _load((GOOD / "password_from_environment.toml").read_text(encoding="utf-8"))
    assert s.routing.domain == "example.com"


def test_paths_are_joined_to_the_root_and_normalised() -> None:
    text = MINIMAL.replace('folder = "inbox"', 'folder = "./in/../drop"')
    s = load_settings(text, "/srv/st/station.toml", Path("/srv/st"))
    assert s.inboxes[0].folder == Path("/srv/st/drop")
    assert s.work == Path("/srv/st/work")


def test_settings_are_frozen_and_cross_a_process_pipe() -> None:
    s = _load((GOOD / "all_keys.toml").read_text(encoding="utf-8"))
    assert pickle.loads(pickle.dumps(s)) == s
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.workers = 3  # type: ignore[misc]


# ---------------------------------------------------------------- choosing an import profile


def test_the_first_matching_glob_wins_then_the_inbox_profile_then_none() -> None:
    s = _load((GOOD / "all_keys.toml").read_text(encoding="utf-8"))
    hall_a, hall_b = s.inboxes
    assert choose_profile(s, hall_b, "A7-0012_sc.csv") == s.profiles[0].file
    assert choose_profile(s, hall_b, "B2-0012_sc.csv") == s.profiles[1].file
    assert choose_profile(s, hall_a, "B2-0012.csv") == hall_a.profile
    assert choose_profile(s, hall_b, "B2-0012.csv") is None
    assert choose_profile(s, hall_b, "A7-0012_SC.CSV") is None  # globs are case-sensitive


# ---------------------------------------------------------------- the default file and the docs


def test_the_default_file_loads_and_round_trips_the_station_name() -> None:
    text = render_station_toml(station_name="cell-hall-3")
    s = _load(text)
    assert s.station_name == "cell-hall-3"
    assert [(i.name, i.folder, i.handover) for i in s.inboxes] == [
        ("cyclers", ROOT / "inbox", "settle")
    ]
    assert s.smtp.host is None and s.profiles == ()
    assert render_station_toml() == render_station_toml(station_name="formation-line-1")


def test_the_default_file_shows_every_key_with_its_meaning() -> None:
    lines = render_station_toml().splitlines()
    for table in SETTINGS_TABLES:
        for key in table.keys:
            at = next(
                i
                for i, line in enumerate(lines)
                if re.fullmatch(rf"(# )?{re.escape(key.name)} = .+", line)
            )
            comment = " ".join(line.removeprefix("# ") for line in lines[at - 8 : at])
            assert f"{key.name}" in comment and key.meaning.split()[0] in comment, key.name


def test_uncommenting_the_defaults_of_the_default_file_changes_nothing() -> None:
    text = render_station_toml()
    out, table = [], ""
    for line in text.splitlines():
        if line.removeprefix("# ").startswith("["):
            table = line.removeprefix("# ").strip("[]").split(".")[0]
        match = re.fullmatch(r"# (\w+) = (.+)", line)
        example_table = table in ("profile", "accuracy")  # shown commented out, header and all
        if match and not example_table and _schema_default(table, match[1]) is not None:
            line = f"{match[1]} = {match[2]}"
        out.append(line)
    uncommented = "\n".join(out) + "\n"
    assert uncommented.count("\n# ") < text.count("\n# ")
    assert _load(uncommented) == _load(text)


def test_the_default_file_names_only_example_addresses_and_no_mail_server() -> None:
    text = render_station_toml()
    values = [m[1] for m in re.finditer(r"^(?:# )?\w+ = (.*)$", text, re.M)]
    domains = {d for value in values for d in re.findall(r"@([A-Za-z0-9.-]+)", value)}
    assert domains == {"example.com"}
    assert not any(line.startswith("host") for line in text.splitlines())


def test_docs_are_generated_from_the_schema() -> None:
    docs = (REPO / "docs" / "station-settings.md").read_text(encoding="utf-8")
    assert docs == render_docs(), (
        "run: python -m pipeline.station.settings > docs/station-settings.md"
    )
    assert docs.splitlines()[0].startswith("_Generated by") and "do not edit" in docs
    assert render_station_toml() in docs


def test_the_documented_command_prints_the_docs() -> None:
    printed = subprocess.run(
        [sys.executable, "-m", "pipeline.station.settings"],
        cwd=REPO,
        capture_output=True,
        text=True,
        check=True,
        encoding="utf-8",
    ).stdout
    assert printed == render_docs()


def test_every_accepted_key_is_documented() -> None:
    docs = render_docs()
    for table in SETTINGS_TABLES:
        section = docs.split(f"## {table.header}", 1)[1].split("\n## ", 1)[0]
        for key in table.keys:
            row = next(
                line for line in section.splitlines() if line.startswith(f"| `{key.name}` |")
            )
            assert key.kind in row and key.meaning.replace("|", "\\|") in row


@pytest.mark.parametrize("table", SETTINGS_TABLES, ids=lambda t: t.name)
def test_the_loader_accepts_no_key_the_schema_lacks(table: Table) -> None:
    if table.name == "station":
        text = MINIMAL.replace("[station]\n", "[station]\nnot_a_key = 1\n")
    elif table.name == "inbox":
        text = MINIMAL.replace("[inbox.cyclers]\n", "[inbox.cyclers]\nnot_a_key = 1\n")
    else:
        text = MINIMAL + f"\n[{table.name}{'.x' if table.named else ''}]\nnot_a_key = 1\n"
    assert "unknown key 'not_a_key'" in _first_error(text)


# ---------------------------------------------------------------- reading, init, filesystems


def test_init_creates_the_layout_and_a_second_init_refuses(tmp_path: Path) -> None:
    folder = tmp_path / "station"
    created = init_station(folder, rules_from=RULES_DIR)
    s = read_settings(folder)
    assert s.root == folder and s.source == str(folder / "station.toml")
    for path in (folder, s.rules_dir, *s.all_folders()):
        assert path.is_dir() and path in created
    shipped = sorted(p.name for p in RULES_DIR.glob("*.toml"))
    assert shipped and sorted(p.name for p in s.rules_dir.glob("*.toml")) == shipped
    profiles = sorted(p.name for p in (RULES_DIR / "profiles").glob("*.toml"))
    assert sorted(p.name for p in (s.rules_dir / "profiles").glob("*.toml")) == profiles
    assert created[-1] == folder / "station.toml"
    assert (folder / "station.toml").read_text(encoding="utf-8") == render_station_toml()
    check_filesystems(s)  # one tmp folder: one filesystem
    before = (folder / "station.toml").read_bytes()
    with pytest.raises(SettingsError) as caught:
        init_station(folder, rules_from=RULES_DIR)
    assert str(caught.value) == (
        f"{folder / 'station.toml'}: a station file is already there.\n"
        "  formgate init never overwrites a station file: edit it, or give another folder."
    )
    assert (folder / "station.toml").read_bytes() == before


def test_init_without_rules_and_into_a_folder_with_rule_files_keeps_them(tmp_path: Path) -> None:
    (tmp_path / "rules").mkdir()
    (tmp_path / "rules" / "lfp_graphite.toml").write_text("# ours\n", encoding="utf-8")
    created = init_station(tmp_path, rules_from=RULES_DIR)
    assert (tmp_path / "rules" / "lfp_graphite.toml").read_text(encoding="utf-8") == "# ours\n"
    assert tmp_path not in created and tmp_path / "rules" not in created
    assert tmp_path / "rules" / "lfp_graphite.toml" not in created
    bare = tmp_path / "bare"
    init_station(bare)
    assert list((bare / "rules").iterdir()) == []


def test_read_settings_takes_a_folder_or_a_file_and_names_a_missing_one(tmp_path: Path) -> None:
    (tmp_path / "line.toml").write_text(MINIMAL, encoding="utf-8")
    assert read_settings(tmp_path / "line.toml").work == tmp_path / "work"
    with pytest.raises(SettingsError) as caught:
        read_settings(tmp_path)
    assert str(caught.value) == (
        f"{tmp_path / 'station.toml'}: no such station file.\n"
        f"  Create a station with formgate init {tmp_path}, or give the folder that holds "
        "station.toml."
    )


def test_a_file_that_is_not_utf8_names_its_line(tmp_path: Path) -> None:
    (tmp_path / "station.toml").write_bytes(b'[station]\nname = "caf\xe9"\n')
    with pytest.raises(SettingsError) as caught:
        read_settings(tmp_path)
    assert str(caught.value) == (
        f"{tmp_path / 'station.toml'}, line 2, column 12: not UTF-8 text.\n"
        "  Save the file with UTF-8 encoding."
    )


def _fake_stat(devices: dict[str, int]):
    """A stat function that reports a folder on the device given for its last path part."""

    def fake(path: Path) -> os.stat_result:
        if path.name not in devices:
            raise FileNotFoundError(2, "No such file or directory", str(path))
        mode = stat.S_IFDIR | 0o755 if devices[path.name] >= 0 else stat.S_IFREG | 0o644
        return os.stat_result((mode, 1, abs(devices[path.name]), 1, 0, 0, 0, 0, 0, 0))

    return fake


def test_folders_on_two_filesystems_are_refused() -> None:
    s = _load(MINIMAL)
    devices = dict.fromkeys(("inbox", *(p.name for p in s.all_folders())), 7)
    check_filesystems(s, stat=_fake_stat(devices))
    devices["archive"] = 9
    with pytest.raises(SettingsError) as caught:
        check_filesystems(s, stat=_fake_stat(devices))
    assert str(caught.value) == (
        "station.toml: [folders] archive (station/archive) is on another filesystem than "
        "[inbox.cyclers] folder (station/inbox).\n"
        "  The station claims files by renaming them between its folders, and a rename across "
        "filesystems is a copy, not atomic: a file could be seen half moved, or twice. Put all "
        "the folders on one filesystem (with an inbox on a network share, the other folders "
        "on that share too)."
    )


def test_a_missing_folder_or_a_file_in_its_place_is_refused() -> None:
    s = _load(MINIMAL)
    devices = dict.fromkeys((p.name for p in s.all_folders()), 7)
    del devices["quarantine"]
    with pytest.raises(SettingsError) as caught:
        check_filesystems(s, stat=_fake_stat(devices))
    assert str(caught.value) == (
        "station.toml: [folders] quarantine: the folder station/quarantine does not exist.\n"
        "  Create it (formgate init creates the whole layout), or correct the path."
    )
    devices["quarantine"] = -7
    with pytest.raises(SettingsError) as caught:
        check_filesystems(s, stat=_fake_stat(devices))
    assert str(caught.value) == (
        "station.toml: [folders] quarantine: station/quarantine is not a folder.\n"
        "  Give the path of a folder, or move the file away and create the folder."
    )


# ---------------------------------------------------------------- SMTP password


def _with_password_file(tmp_path: Path, mode: int, content: str = "s3cret\nignored\n") -> Settings:
    secret = tmp_path / "smtp-password"
    secret.write_text(content, encoding="utf-8")
    secret.chmod(mode)
    text = (GOOD / "password_from_environment.toml").read_text(encoding="utf-8")
    text = text.replace(
        'password_env = "FORMGATE_SMTP_PASSWORD"', 'password_file = "smtp-password"'
    )
    return load_settings(text, str(tmp_path / "station.toml"), tmp_path)


def test_the_password_comes_from_the_environment_mapping() -> None:
    s = _load((GOOD / "password_from_environment.toml").read_text(encoding="utf-8"))
    smtp = smtp_settings(s, {"FORMGATE_SMTP_PASSWORD": "s3cret"})
    assert (smtp.host, smtp.port, smtp.security, smtp.username, smtp.password) == (
        "mail.example.com",
        587,
        "starttls",
        "formgate",
        "s3cret",
    )
    assert smtp.eml_folder == s.mail and "s3cret" not in repr(smtp)
    with pytest.raises(SettingsError) as caught:
        smtp_settings(s, {})
    assert str(caught.value) == (
        "station.toml: [smtp] password_env names the environment variable "
        "FORMGATE_SMTP_PASSWORD, which is not set.\n"
        "  Set FORMGATE_SMTP_PASSWORD to the mail password in the environment the station runs "
        "in (e.g. its service definition), or use password_file instead."
    )


def test_the_password_comes_from_the_first_line_of_a_private_file(tmp_path: Path) -> None:
    s = _with_password_file(tmp_path, 0o600, "  s3cret  \nsecond line\n")
    assert smtp_settings(s, {}).password == "s3cret"
    assert smtp_settings(s, {}, lambda p: "other\n").password == "other"


def test_a_password_file_others_can_read_is_refused(tmp_path: Path) -> None:
    s = _with_password_file(tmp_path, 0o644)
    with pytest.raises(SettingsError) as caught:
        smtp_settings(s, {})
    secret = tmp_path / "smtp-password"
    assert str(caught.value) == (
        f"{secret}: the password file can be read or changed by other users (mode 0644).\n"
        f"  Run chmod 600 {secret}, so that only the station's user can read it."
    )


def test_a_missing_or_empty_password_file_is_named(tmp_path: Path) -> None:
    s = _with_password_file(tmp_path, 0o600, "\n")
    secret = tmp_path / "smtp-password"
    with pytest.raises(SettingsError) as caught:
        smtp_settings(s, {})
    assert str(caught.value) == (
        f"{secret}, line 1: the password file's first line is empty.\n"
        "  Write the password on the first line."
    )
    secret.unlink()
    with pytest.raises(SettingsError) as caught:
        smtp_settings(s, {})
    assert str(caught.value) == (
        f"{secret}: the password file cannot be read (No such file or directory).\n"
        f"  Write the password on the file's first line and run chmod 600 {secret}, or correct "
        f"[smtp] password_file in {tmp_path / 'station.toml'}."
    )


def test_no_username_needs_no_password_and_no_host_writes_eml_files() -> None:
    s = _load(MINIMAL)
    smtp = smtp_settings(s, {}, lambda p: pytest.fail("nothing to read"))
    assert (smtp.host, smtp.password, smtp.eml_folder, smtp.sender) == (
        None,
        None,
        s.mail,
        "formgate@localhost",
    )


# ---------------------------------------------------------------- loading never crashes


@settings(max_examples=300, deadline=None)
@given(st.text())
def test_any_text_loads_or_gives_a_settings_error(text: str) -> None:
    try:
        load_settings(text, "station.toml", ROOT)
    except SettingsError as error:
        assert error.where is not None and error.where.path == "station.toml"


_VALUES = st.one_of(
    st.integers(-(2**70), 2**70).map(str),
    st.floats().map(repr),
    st.text(max_size=12).map(lambda s: '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'),
    st.sampled_from(
        [
            '""',
            '"."',
            '"inbox"',
            '"work"',
            "true",
            '["a@example.com"]',
            "[]",
            '["x"]',
            '"settle"',
            '"marker"',
            '"none"',
            '"a@b"',
            "{}",
            "1979-05-27",
        ]
    ),
)


@st.composite
def _station_texts(draw: st.DrawFn) -> str:
    """Station files built from real tables and keys with values of any type."""
    lines = ['[station]\nname = "s"\n\n[inbox.a]\nfolder = "in"\nhandover = "settle"\n']
    for table in draw(st.lists(st.sampled_from(SETTINGS_TABLES), max_size=5)):
        ident = draw(st.sampled_from(["a", "b", "c"])) if table.named else ""
        header = f"[{table.name}.{ident}]" if table.named else f"[{table.name}]"
        if header in "".join(lines):
            continue
        lines.append(header)
        for key in draw(st.lists(st.sampled_from(table.keys), max_size=6, unique=True)):
            lines.append(f"{key.name} = {draw(_VALUES)}")
        lines.append("")
    return "\n".join(lines)


@settings(max_examples=400, deadline=None)
@given(_station_texts())
def test_any_mix_of_keys_and_values_loads_or_names_a_line(text: str) -> None:
    try:
        s = load_settings(text, "station.toml", ROOT)
    except SettingsError as error:
        assert error.where is not None and error.where.path == "station.toml"
        return
    assert len({os.path.normpath(p) for p in s.all_folders()}) == len(s.all_folders())
    assert s.smtp.host is None or s.routing.failures_to


def test_the_kinds_the_schema_uses_are_the_checked_ones() -> None:
    kinds = {key.kind for table in SETTINGS_TABLES for key in table.keys}
    assert kinds <= {TEXT, NUMBER, INTEGER, TEXT_LIST}


def test_a_station_file_with_three_mistakes_reports_all_three_at_once(tmp_path: Path) -> None:
    from pipeline.errors import SettingsProblems

    (tmp_path / "station.toml").write_text(
        '[station]\nname = "line-1"\nworkerz = 2\nworkers = 0\nheartbeat_s = "fast"\n'
        '[inbox.main]\nfolder = "inbox"\nhandover = "rename"\n',
        encoding="utf-8",
    )
    with pytest.raises(SettingsProblems) as caught:
        read_settings(tmp_path)
    where = tmp_path / "station.toml"
    assert str(caught.value).splitlines() == [
        f"{where}, line 3: unknown key 'workerz' in [station].",
        "  Did you mean 'workers'?",
        f"{where}, line 4: [station] workers = 0 is out of range.",
        "  It must be at least 1.",
        f"{where}, line 5: [station] heartbeat_s must be a number, found text \"fast\".",
        "  Write a plain number, e.g. heartbeat_s = 1.5 (no quotes, no unit, a dot for decimals).",
        f"3 problems found in {where}",
    ]
    assert caught.value.exit_code == 2
