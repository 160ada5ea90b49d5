"""What one input may cost is bounded before it grows: names and values in bytes, gzip while it unpacks,
parsing by the columns read.

Real bytes through the real readers, no stand-ins. Properties over all texts: any metadata
value, key, column name or reading-file text longer than the limit in bytes (whatever its
characters) is refused at its line with its key or column named; any within it comes
through unchanged. Gzip: unpacking never yields more than the cap and always the same text
as one pass would; the station's text limits name max_uncompressed_MB. Parsing in chunks
gives what one parse gives, errors included. Costs are compared as ratios of two things
measured side by side in the same run, never as seconds.
"""

from __future__ import annotations

import datetime
import gzip
import math
import subprocess
import sys
import time
import zlib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from pipeline.errors import InputError
from pipeline.model import SourceRef, Trace
from pipeline.read import cyclenumbers
from pipeline.read.bounds import MAX_METADATA_ENTRIES, MAX_TEXT_BYTES, byte_length
from pipeline.read.cyclefile import read_cycle_file
from pipeline.read.gunzip import CutShort, PastCap, inflated
from pipeline.read.limits import TextLimits, check_text
from pipeline.read.readings import read_readings
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.runner import check_file
from tests.hostile import with_cell_id
from tests.station_kit import RULES, cycle_file

BATTERY = "\N{BATTERY}"  # U+1F50B, four bytes in UTF-8
ROWS = "time_s,voltage_V,current_A\n0,3.1,0.5\n60,3.2,0.5\n"
KEYS = ("cell_id", "lot", "cell_type", "channel", "station", "program", "started_at", "operator")

# One line of text as a writer could put it after "key:" (the reader strips the value and
# ends a line at a line feed or carriage return; surrogates are not text).
line_text = st.text(
    alphabet=st.characters(exclude_categories=("Cs",), exclude_characters="\n\r"),
    min_size=1,
    max_size=80,
).filter(lambda v: v == v.strip() and v != "")


def longer_than_the_limit(text: str) -> str:
    """``text`` repeated until it takes more than MAX_TEXT_BYTES bytes (still stripped)."""
    return text * (MAX_TEXT_BYTES // byte_length(text) + 1)


def within_the_limit(text: str) -> str:
    """``text`` cut to at most MAX_TEXT_BYTES bytes, on a character boundary, stripped."""
    return text.encode()[:MAX_TEXT_BYTES].decode("utf-8", "ignore").strip()


def cycle_text(metadata: dict[str, str], header: str = "time_s,voltage_V,current_A") -> bytes:
    lines = [f"# {k}: {v}" for k, v in metadata.items()]
    return ("\n".join([*lines, header]) + "\n" + ROWS.split("\n", 1)[1]).encode()


def base_metadata() -> dict[str, str]:
    return {"cell_id": "C-1", "lot": "L-1", "cell_type": "T"}


# ------------------------------------------------------------------ cycle files: metadata


@settings(max_examples=150, deadline=None)
@given(key=st.sampled_from(KEYS), text=line_text, placed=st.integers(0, 3))
def test_any_metadata_value_longer_than_the_limit_in_bytes_is_refused_at_its_line(
    key: str, text: str, placed: int
) -> None:
    value = longer_than_the_limit(text)
    metadata = base_metadata()
    metadata.pop(key, None)
    items = list(metadata.items())
    items.insert(min(placed, len(items)), (key, value))
    with pytest.raises(InputError) as caught:
        read_cycle_file(cycle_text(dict(items)), "c.csv")
    line = [k for k, _ in items].index(key) + 1
    assert caught.value.where == SourceRef("c.csv", line)
    assert caught.value.problem.startswith(f"metadata {key} is {byte_length(value):,} bytes long")
    assert f"more than the {MAX_TEXT_BYTES} bytes formgate reads" in caught.value.problem


@settings(max_examples=150, deadline=None)
@given(key=st.sampled_from(KEYS), text=st.text(
    alphabet=st.characters(exclude_categories=("Cs",), exclude_characters="\n\r"), max_size=300
))
def test_any_metadata_value_within_the_limit_is_kept_unchanged(key: str, text: str) -> None:
    value = within_the_limit(text)
    assume(value)
    metadata = base_metadata()
    metadata[key] = value
    trace = read_cycle_file(cycle_text(metadata), "c.csv")
    assert trace.metadata[key] == value


@settings(max_examples=100, deadline=None)
@given(text=line_text)
def test_any_metadata_key_longer_than_the_limit_is_refused_at_its_line(text: str) -> None:
    key = longer_than_the_limit(text.replace(":", "-"))
    assume(key.strip() == key and not key.startswith("#"))
    data = cycle_text({**base_metadata(), key: "x"})
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, "c.csv")
    assert caught.value.where == SourceRef("c.csv", 4)
    assert caught.value.problem.startswith("the metadata key '")


@settings(max_examples=100, deadline=None)
@given(text=line_text, column=st.integers(0, 3))
def test_any_column_name_longer_than_the_limit_is_refused_at_its_column(text: str, column: int) -> None:
    name = longer_than_the_limit(text.replace(",", ";").replace('"', "'"))
    assume(name.strip() == name)
    # a header line that starts with the metadata prefix is a comment line (cycle file v1)
    assume(not (column == 0 and name.startswith("#")))
    fields = ["time_s", "voltage_V", "current_A"]
    fields.insert(column, name)
    data = cycle_text(base_metadata(), ",".join(fields)).replace(b"\n0,", b"\n1,0,")
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, "c.csv")
    assert caught.value.where == SourceRef("c.csv", 4, column + 1)
    assert caught.value.problem.startswith(f"the name of column {column + 1} (")


def test_a_cell_id_of_3000_battery_emoji_is_refused_with_a_located_message() -> None:
    data = with_cell_id(BATTERY * 3000)
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, "emoji.csv")
    assert str(caught.value) == (
        "emoji.csv, line 1: metadata cell_id is 12,000 bytes long (3,000 characters), more than "
        "the 256 bytes formgate reads.\n"
        "  An identifier needs far fewer (a label's barcode holds about 64 characters): check "
        "what the writer puts there, and shorten it to at most 256 bytes (a character outside "
        "ASCII takes 2 to 4)."
    )


def test_the_longest_cell_id_in_bytes_is_read() -> None:
    assert read_cycle_file(with_cell_id(BATTERY * 64), "c.csv").cell_id == BATTERY * 64
    with pytest.raises(InputError, match="257 bytes long"):
        read_cycle_file(with_cell_id(BATTERY * 64 + "A"), "c.csv")


def test_a_value_from_the_file_name_is_bounded_too() -> None:
    from pipeline.read.profile import load_profile

    profile = load_profile('[file]\nfile_name_pattern = "^(?P<channel>[^.]+)[.]csv$"\n', "p.toml")
    assert read_cycle_file(cycle_text(base_metadata()), "ch-7.csv", profile).metadata["channel"] == "ch-7"
    with pytest.raises(InputError) as caught:
        read_cycle_file(cycle_text(base_metadata()), "c" * 300 + ".csv", profile)
    assert caught.value.problem.startswith("metadata channel in the file name is 300 bytes long")


def test_more_metadata_entries_than_allowed_are_refused_at_the_first_too_many() -> None:
    others = MAX_METADATA_ENTRIES - 3
    fits = {**base_metadata(), **{f"k{n}": "v" for n in range(others)}}
    assert len(read_cycle_file(cycle_text(fits), "c.csv").metadata) == MAX_METADATA_ENTRIES
    # a repeated key is not a new entry, and comment lines are not entries at all
    again = cycle_text(fits).replace(b"# k0: v\n", b"# k0: v\n# k0: w\n# no colon here\n")
    assert read_cycle_file(again, "c.csv").metadata["k0"] == "v"
    with pytest.raises(InputError) as caught:
        read_cycle_file(cycle_text({**fits, "one_more": "v"}), "c.csv")
    assert caught.value.where == SourceRef("c.csv", MAX_METADATA_ENTRIES + 1)
    assert caught.value.problem == "metadata one_more is one entry more than the 64 formgate reads"


def test_a_long_value_in_an_ascii_file_is_refused_without_reading_on_for_a_header() -> None:
    # the ASCII fast path reads the head from growing blocks; a refusal in the first block
    # is final, whatever follows
    data = with_cell_id("A" * 300) + b"0,3.1,0.5,25\n" * 200_000
    with pytest.raises(InputError, match="metadata cell_id is 300 bytes long"):
        read_cycle_file(data, "c.csv")


# ------------------------------------------------------------------------ OCV reading files

READING_HEAD = "# kind: ocv readings\n# lot: L7\n"


@settings(max_examples=150, deadline=None)
@given(
    column=st.sampled_from(("cell_id", "lot", "cell_type", "position")),
    text=line_text.map(lambda v: v.replace(",", ";").replace('"', "'")).filter(
        lambda v: v == v.strip() and v != ""
    ),
    longer=st.booleans(),
)
def test_any_text_a_reading_keeps_is_refused_past_the_limit_and_kept_within_it(
    column: str, text: str, longer: bool
) -> None:
    value = longer_than_the_limit(text) if longer else within_the_limit(text)
    assume(value and "," not in value)
    row = {"cell_id": "C1", "time": "2026-03-02T08:00:00Z", "ocv_V": "3.65", "lot": "L7",
           "cell_type": "T", "position": "A1"}
    row[column] = value
    data = (READING_HEAD + ",".join(row) + "\n" + ",".join(row.values()) + "\n").encode()
    if not longer:
        reading = read_readings(data, "r.csv").readings[0]
        kept = {"cell_id": reading.cell_id, "lot": reading.lot, "cell_type": reading.cell_type,
                "position": dict(reading.extra).get("position")}
        assert kept[column] == value
        return
    with pytest.raises(InputError) as caught:
        read_readings(data, "r.csv")
    assert caught.value.where == SourceRef("r.csv", 4, list(row).index(column) + 1)
    assert caught.value.problem.startswith(f"{column} is {byte_length(value):,} bytes long")


def test_reading_file_metadata_and_column_names_are_bounded() -> None:
    long = BATTERY * 65
    rows = "cell_id,time,ocv_V\nC1,2026-03-02T08:00:00Z,3.65\n"
    with pytest.raises(InputError) as caught:
        read_readings(f"# kind: ocv readings\n# tester: {long}\n{rows}".encode(), "r.csv")
    assert caught.value.where == SourceRef("r.csv", 2)
    assert caught.value.problem.startswith("metadata tester is 260 bytes long")
    with pytest.raises(InputError) as caught:
        read_readings(f"{READING_HEAD}cell_id,time,ocv_V,{long}\nC1,2026-03-02T08:00:00Z,3.65,x\n"
                      .encode(), "r.csv")
    assert caught.value.where == SourceRef("r.csv", 3, 4)
    many = "".join(f"# k{n}: v\n" for n in range(MAX_METADATA_ENTRIES + 1))
    with pytest.raises(InputError, match="one entry more than the 64"):
        read_readings(f"{many}{rows}".encode(), "r.csv")


# ------------------------------------------------------------------------------- gzip


members = st.lists(st.binary(max_size=3000), min_size=1, max_size=4)


def packed(parts: list[bytes], padding: list[int]) -> bytes:
    return b"".join(gzip.compress(p, mtime=0) + b"\0" * z for p, z in zip(parts, padding, strict=False))


@settings(max_examples=200, deadline=None)
@given(parts=members, padding=st.lists(st.integers(0, 3), min_size=4, max_size=4),
       block=st.integers(1, 5000), slack=st.integers(-50, 50))
def test_unpacking_gives_the_whole_text_within_the_cap_and_stops_past_it(
    parts: list[bytes], padding: list[int], block: int, slack: int
) -> None:
    data, text = packed(parts, padding), b"".join(parts)
    cap = max(len(text) + slack, 0)
    got: list[bytes] = []
    try:
        for piece in inflated(data, cap, block):
            assert 0 < len(piece) <= block
            got.append(piece)
    except PastCap:
        assert len(text) > cap
        assert sum(map(len, got)) <= cap  # nothing past the cap was handed on
        assert text.startswith(b"".join(got))
    else:
        assert len(text) <= cap
        assert b"".join(got) == text


@settings(max_examples=200, deadline=None)
@given(parts=members, cut=st.integers(1, 200))
def test_gzip_cut_short_anywhere_is_never_read_as_a_shorter_text(parts: list[bytes], cut: int) -> None:
    data = packed(parts, [0] * len(parts))
    short = data[: max(len(data) - cut, 0)]
    try:
        got = b"".join(inflated(short, 10**9))
    except (CutShort, zlib.error):
        return
    # only a cut between whole members can read: then it is exactly those members' text
    assert any(got == b"".join(parts[:k]) for k in range(len(parts) + 1))


def test_the_station_refuses_text_past_max_uncompressed_mb_naming_it() -> None:
    limits = TextLimits(64 * 1024, 2_000_000, 2**20)  # 1 MB of text
    text = cycle_file("G-1") + b"0,3.3,0.0,25.0\n" * 80_000  # about 1.2 MB
    for name, data in (("c.csv.gz", gzip.compress(text)), ("c.csv", text)):
        with pytest.raises(InputError) as caught:
            check_text(data, name, limits)
        assert str(caught.value).splitlines()[0] == (
            f"{name}: the file holds more than 1 MB of text (unpacked), the station's limit "
            "max_uncompressed_MB = 1."
        )
        assert "raise max_uncompressed_MB in station.toml" in str(caught.value)
    check_text(gzip.compress(text[: 2**20]), "c.csv.gz", limits)  # at the limit: fine


# ------------------------------------------------------------------- parsing in chunks

FIELDS = ["", "1", "2.5", "-3", "7e1", "True", "x", "1e400", "99999999999999999999999", "0"]


def outcome(data: bytes) -> tuple[object, ...]:
    try:
        trace = read_cycle_file(data, "c.csv")
    except InputError as exc:
        return ("error", str(exc))
    return ("trace", *(_values(trace, name) for name in ("time_s", "voltage_v", "current_a",
                                                           "temperature_c", "step")))


def _values(trace: Trace, name: str) -> object:
    values = getattr(trace, name)
    return None if values is None else [("nan" if math.isnan(v) else v) for v in values.tolist()]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    extra=st.sampled_from(((), ("note",), ("temperature_C", "note"), ("note", "step"))),
    rows=st.lists(
        st.tuples(st.lists(st.sampled_from(FIELDS), min_size=3, max_size=3),
                  st.lists(st.sampled_from(FIELDS), min_size=0, max_size=3)),
        min_size=1, max_size=30,
    ),
    every=st.integers(1, 4),
)
def test_parsing_in_chunks_gives_what_one_parse_gives(
    extra: tuple[str, ...], rows: list[tuple[list[str], list[str]]], every: int
) -> None:
    header = ",".join(("time_s", "voltage_V", "current_A", *extra))
    lines = [",".join([*first, *rest]) for first, rest in rows]
    data = ("# cell_id: C\n# lot: L\n# cell_type: T\n" + header + "\n" + "\n".join(lines) + "\n").encode()
    whole = outcome(data)
    with pytest.MonkeyPatch.context() as patch:
        # a few rows per chunk, where a real file has a hundred thousand or more
        patch.setattr(cyclenumbers, "CHUNK_FIELDS", every * (3 + len(extra)))
        chunked = outcome(data)
    assert chunked == whole


def test_a_column_not_read_is_not_kept_however_wide_the_file() -> None:
    header = "time_s,voltage_V,current_A," + ",".join(f"x{k}" for k in range(200))
    row = "1,3.3,0.5," + ",".join(["0"] * 200)
    data = ("# cell_id: C\n# lot: L\n# cell_type: T\n" + header + "\n" + (row + "\n") * 20).encode()
    stream_start = data.index(b"1,3.3")
    from pipeline.read.cyclehead import Head

    head = Head(header_line=4, fields=header.split(","), data_start=stream_start)
    from pipeline.read.profile import DEFAULT_PROFILE

    frame = cyclenumbers.parse_rows(data, stream_start, len(data), head, "c.csv", DEFAULT_PROFILE,
                                    keep=[0, 1, 2])
    assert list(frame.columns) == [0, 1, 2, 202]  # the last shows a short row
    assert len(read_cycle_file(data, "c.csv")) == 20


# ------------------------------------------------------------------------------ costs


def best_of(repeats: int, *work: Callable[[], object]) -> list[float]:
    """The fastest of ``repeats`` runs of each callable, taking turns (one slow moment hits all)."""
    best = [math.inf] * len(work)
    for _ in range(repeats):
        for k, job in enumerate(work):
            started = time.perf_counter()
            job()
            best[k] = min(best[k], time.perf_counter() - started)
    return best


def refused(data: bytes) -> Callable[[], None]:
    def run() -> None:
        with pytest.raises(InputError):
            read_cycle_file(data, "c.csv")

    return run


def test_refusing_a_3000_emoji_cell_id_costs_less_than_reading_a_good_file() -> None:
    good, emoji = cycle_file("X-1"), with_cell_id(BATTERY * 3000)
    ascii_id = with_cell_id("A" * 6000)
    read, emoji_s, ascii_s = best_of(
        7, lambda: read_cycle_file(good, "c.csv"), refused(emoji), refused(ascii_id)
    )
    assert emoji_s < read and ascii_s < read, (
        f"reading a good file {read * 1e3:.2f} ms, refusing a 3,000-emoji cell id "
        f"{emoji_s * 1e3:.2f} ms, a 6,000-letter one {ascii_s * 1e3:.2f} ms"
    )


def test_formgate_check_refuses_a_3000_emoji_cell_id_with_its_place_about_as_fast_as_it_judges_a_good_file(
    tmp_path: Path,
) -> None:
    """The whole command, Python's start included, in real processes on real files."""
    (tmp_path / "rules").mkdir()
    (tmp_path / "rules" / "test.toml").write_text(RULES, encoding="utf-8")
    (tmp_path / "good.csv").write_bytes(cycle_file("X-1"))
    (tmp_path / "emoji.csv").write_bytes(with_cell_id(BATTERY * 3000))

    def command(name: str) -> Callable[[], None]:
        def run() -> None:
            done = subprocess.run(
                [sys.executable, "-m", "pipeline", "check", name, "--rules", "rules", "--no-pdf"],
                cwd=tmp_path, capture_output=True, text=True, timeout=120, check=False,
            )
            results[name] = done

        return run

    results: dict[str, subprocess.CompletedProcess[str]] = {}
    good_s, emoji_s = best_of(2, command("good.csv"), command("emoji.csv"))
    refused_run = results["emoji.csv"]
    assert refused_run.returncode == 2
    assert refused_run.stdout.startswith(
        "emoji.csv  error  emoji.csv, line 1: metadata cell_id is 12,000 bytes long (3,000 "
        "characters), more than the 256 bytes formgate reads.\n    An identifier needs far fewer"
    ), refused_run.stdout
    # both commands are mostly Python's start and imports now that judging a small file takes
    # milliseconds: the refusal may not cost more than a quarter over the good file's (it took
    # 135 s when a long cell id was laid out before it was refused)
    assert emoji_s < 1.25 * good_s, (
        f"refused in {emoji_s:.2f} s, a good file judged in {good_s:.2f} s"
    )


@pytest.mark.slow
def test_a_certificate_for_the_longest_cell_id_costs_about_what_a_short_ones_costs(
    tmp_path: Path,
) -> None:
    """Laying out a cell id costs more than linearly in its length (each character may start a
    line in the page header); within the limit that must stay small."""
    rulebook = RuleBook((load_rule_set(RULES, "t.toml"),))
    at = datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC)
    paths = []
    for name, data in (("short.csv", cycle_file("X-1")), ("long.csv", with_cell_id(BATTERY * 64)),
                       ("cjk.csv", with_cell_id("".join(chr(0x4E00 + k) for k in range(85))))):
        paths.append(tmp_path / name)
        paths[-1].write_bytes(data)

    def certify(path: Path) -> Callable[[], None]:
        def run() -> None:
            done = check_file(path, rulebook, tmp_path / "out", analysed_at=at)
            assert done.published is not None and done.published.certificate is not None

        return run

    short, long, cjk = best_of(5, *(certify(p) for p in paths))
    figures = f"short id {short * 1e3:.0f} ms, 64 emoji {long * 1e3:.0f} ms, 85 CJK {cjk * 1e3:.0f} ms"
    assert long < 2 * short and cjk < 2 * short, figures
    assert np.isfinite(short)
