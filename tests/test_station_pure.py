"""The station's pure helpers: names as lossless text, the text limits, waiting entries, troubles."""

from __future__ import annotations

import datetime
import errno
import gzip
import os
import sqlite3
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from pipeline.errors import InputError
from pipeline.names import fit, from_text, is_text, to_text
from pipeline.read.limits import TextLimits, check_text
from pipeline.station.settings import InboxSettings
from pipeline.station.troubles import Troubles, describe, is_environmental, kind_of
from pipeline.station.waiting import overdue_entries
from pipeline.station.watcher import Listing, Other

T0 = datetime.datetime(2026, 3, 1, 8, 0, tzinfo=datetime.UTC)


@given(st.binary(min_size=1, max_size=60).filter(lambda b: b"/" not in b and b"\0" not in b))
def test_every_file_name_becomes_printable_text_and_back(raw: bytes) -> None:
    name = os.fsdecode(raw)
    text = to_text(name)
    assert text.isprintable() and "/" not in text
    text.encode("utf-8")  # storable: no lone surrogates
    assert from_text(text) == name
    assert is_text(name) == (text == name.replace("\\", "\\\\"))


def test_names_are_shown_escaped_and_plain_names_are_unchanged() -> None:
    assert to_text("C-0001_lot7.csv") == "C-0001_lot7.csv"
    assert to_text("Zelle-ä.csv") == "Zelle-ä.csv"
    assert to_text(os.fsdecode(b"cell_\xe9.csv")) == "cell_\\xe9.csv"
    assert to_text("two\nlines.csv") == "two\\x0alines.csv"
    assert to_text("a\\b.csv") == "a\\\\b.csv"
    assert to_text("evil\u202ecsv.exe") == "evil\\u202ecsv.exe"


@given(st.text(min_size=1, max_size=400))
def test_a_fitted_name_fits_keeps_its_extension_and_differs_for_different_names(stem: str) -> None:
    name = stem + ".csv.gz"
    fitted = fit(name, reserve_bytes=32)
    assert len(fitted.encode("utf-8", "surrogateescape")) <= 255 - 32
    assert fitted.endswith(".csv.gz")
    if len(name.encode("utf-8", "surrogateescape")) <= 255 - 32:
        assert fitted == name
    else:
        assert fitted != fit(stem + "x.csv.gz", reserve_bytes=32)


def _reference(data: bytes, limits: TextLimits) -> str | None:
    """The limits checked the slow, obvious way."""
    text = gzip.decompress(data) if data[:2] == b"\x1f\x8b" else data
    lines = text.replace(b"\r", b"\n").split(b"\n")
    for n, line in enumerate(lines):
        if len(line) > limits.max_line_bytes:
            start = sum(len(x) + 1 for x in lines[:n])
            return f"line {text[:start].count(10) + 1}"
    if (text.count(b"\n") or text.count(b"\r")) > limits.max_rows:
        return "rows"
    return None


@given(
    st.lists(st.sampled_from([b"a", b"bb", b"\n", b"\r\n", b"\r", b"x" * 9]), max_size=40),
    st.integers(1, 12),
    st.integers(0, 12),
    st.booleans(),
)
def test_text_limits_agree_with_a_plain_count(
    parts: list[bytes], max_line: int, max_rows: int, packed: bool
) -> None:
    data = b"".join(parts)
    limits = TextLimits(max_line, max_rows)
    blob = gzip.compress(data, mtime=0) if packed else data
    try:
        check_text(blob, "f.csv.gz" if packed else "f.csv", limits)
        found = None
    except InputError as exc:
        found = "rows" if "lines" in exc.problem else f"line {exc.where.line if exc.where else 0}"
    assert found == _reference(blob, limits)


def test_a_long_line_in_a_big_file_is_found_on_its_line() -> None:
    data = b"a,b\n" * 100_000 + b"y" * 70_000 + b"\n" + b"a,b\n" * 10
    with pytest.raises(InputError) as caught:
        check_text(data, "big.csv", TextLimits(65_536, 2_000_000))
    assert str(caught.value).startswith(
        "big.csv, line 100001: the line is longer than the station's limit max_line_kB = 64 "
        "(65,536 bytes)."
    )


INBOX = InboxSettings("main", Path("inbox"), "settle", settle_s=30.0)
NOW_NS = int(T0.timestamp() * 1e9)


def _ago(seconds: float) -> int:
    return NOW_NS - int(seconds * 1e9)


def test_entries_that_wait_too_long_are_named_with_their_age_and_reason() -> None:
    listing = Listing(
        files={
            "fresh.csv": (10, _ago(10)),
            "cut.csv": (10, _ago(4000)),
            ".old.csv.part": (10, _ago(7200)),
            ".young.csv.part": (10, _ago(5)),
            "taken.csv": (10, _ago(9000)),
        },
        others={".cache": Other("folder", _ago(8000))},
    )
    found = overdue_entries(listing, INBOX, now_ns=NOW_NS, waiting_alert_s=3600.0, ready={"taken.csv"})
    assert [(e.name, round(e.age_s)) for e in found] == [
        (".cache", 8000),
        (".old.csv.part", 7200),
        ("cut.csv", 4000),
    ]
    assert found[0].why.startswith("a folder, not a file, with a temporary name")
    assert found[2].why.startswith("it does not look complete")
    marker = InboxSettings("m", Path("m"), "marker")
    waits = overdue_entries(
        Listing(files={"d.csv": (1, _ago(4000)), "lone.csv.done": (0, _ago(4000))}),
        marker, now_ns=NOW_NS, waiting_alert_s=3600.0,
    )
    assert [(e.name, e.why) for e in waits] == [("d.csv", "no marker d.csv.done beside it yet")]


def test_faults_of_the_surroundings_are_told_from_bugs_and_described_with_their_path() -> None:
    full = OSError(errno.ENOSPC, "No space left on device", "/st/results/L/c.json")
    assert is_environmental(full) and kind_of(full) == "disk full"
    assert describe(full) == "/st/results/L/c.json: No space left on device (the disk is full)"
    assert is_environmental(sqlite3.OperationalError("database or disk is full"))
    assert not is_environmental(sqlite3.IntegrityError("CHECK constraint failed"))
    assert not is_environmental(ValueError("a bug"))
    assert kind_of(OSError(errno.EROFS, "Read-only file system")) == "not writable"


def test_a_ledger_another_process_keeps_locked_is_described_as_locked(tmp_path: Path) -> None:
    """A real lock: a second connection holds the write lock while the first tries to write."""
    path = tmp_path / "ledger.sqlite"
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("CREATE TABLE t (x)")
    holder.execute("BEGIN IMMEDIATE")
    writer = sqlite3.connect(path, isolation_level=None, timeout=0.05)
    try:
        with pytest.raises(sqlite3.OperationalError) as locked:
            writer.execute("INSERT INTO t VALUES (1)")
    finally:
        holder.execute("ROLLBACK")
        holder.close()
        writer.close()
    assert is_environmental(locked.value)
    assert describe(locked.value, ledger=path) == (
        f"the ledger {path} is locked by another process (database is locked)"
    )


def test_a_trouble_pauses_backs_off_to_its_limit_and_is_alerted_once_per_episode() -> None:
    troubles = Troubles(retry_max_s=8.0)
    first = troubles.report("surroundings", "disk full", now=T0, now_s=100.0, kind="disk full")
    assert first is not None and not first.repeated and troubles.paused
    assert troubles.report("surroundings", "again", now=T0, now_s=100.5) is None
    assert not troubles.due(100.5) and troubles.due(101.0)
    assert [troubles.failed_again(s) for s in (101.0, 103.0, 107.0, 115.0)] == [2.0, 4.0, 8.0, 8.0]
    assert troubles.shown() == ["paused: disk full since 2026-03-01T08:00:00+00:00"]
    troubles.clear("surroundings", now=T0 + datetime.timedelta(seconds=60))
    assert not troubles.paused
    flicker = troubles.report(
        "surroundings", "disk full", now=T0 + datetime.timedelta(seconds=90), now_s=190.0,
        kind="disk full",
    )
    assert flicker is not None and flicker.repeated  # not alerted again moments later
    troubles.clear("surroundings", now=T0 + datetime.timedelta(seconds=95))
    other = troubles.report(
        "surroundings", "read-only", now=T0 + datetime.timedelta(seconds=99), now_s=199.0,
        kind="not writable",
    )
    assert other is not None and not other.repeated
