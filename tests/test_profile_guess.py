"""formgate profile guess and show: a guessed profile reads each example file as its shipped profile does.

Round trips: guess -> load_profile -> read_cycle_file, compared with the file read through
the profile that ships for it (rules/profiles/) or as cycle file version 1: the same time,
voltage, current, temperature, step and cycle arrays (exactly), the same metadata and the
same data-quality notes. Over the shipped example files (tests/data/traces/good/ and
docs/layouts/), the demo lots, variants written by the demo's layout writers, and a
hypothesis property over the delimiters, decimal marks, units, signs, encodings and
metadata prefixes one small record can be written in. Then what guessing says where it
cannot know (the cell type, the zone of a clock), its located errors, and the two commands.
"""

from __future__ import annotations

import datetime as dt
import gzip
import io
import re
import shutil
import zipfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.cli.main import main
from pipeline.demo.lots import DEMO_CELLS, DemoCell, demo_file_bytes
from pipeline.errors import InputError
from pipeline.model import Trace
from pipeline.read.cyclefile import read_cycle_file
from pipeline.read.guess import guess_profile
from pipeline.read.profile import load_profile
from tests.conftest import REPO, RULES_DIR

GOOD = REPO / "tests" / "data" / "traces" / "good"
PROFILES = REPO / "rules" / "profiles"
LAYOUTS = REPO / "docs" / "layouts"
ARRAYS = ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle")


def read_with(data: bytes, name: str, profile_text: str | None, profile_name: str = "p.toml") -> Trace:
    profile = None if profile_text is None else load_profile(profile_text, profile_name)
    return read_cycle_file(data, name, profile)


def guessed(data: bytes, name: str) -> tuple[str, Trace]:
    text = guess_profile(data, name)
    return text, read_with(data, name, text, "guessed.toml")


def comments(text: str) -> str:
    """The profile's comments as one line (they are wrapped to the page's width)."""
    return " ".join(line.lstrip("#").strip() for line in text.splitlines() if line.startswith("#"))


def assert_same(got: Trace, want: Trace, *, metadata: bool = True) -> None:
    for field in ARRAYS:
        a, b = getattr(got, field), getattr(want, field)
        assert (a is None) == (b is None), field
        if a is not None:
            assert np.array_equal(a, b, equal_nan=True), field
    if metadata:
        assert dict(got.metadata) == dict(want.metadata)
    assert got.notes == want.notes


# ---------------------------------------------------------------- the shipped example files

# file in tests/data/traces/good -> the shipped profile that reads it (None: cycle file v1)
SHIPPED_GOOD = {
    "v1_basic.csv": None,
    "v1_basic.csv.gz": None,
    "v1_bom_crlf.csv": None,
    "v1_reordered_extra_columns.csv": None,
    "tab_log_cell-0012.tsv": "tab_separated_ms.toml",
}


@pytest.mark.parametrize("file_name", sorted(SHIPPED_GOOD))
def test_a_guessed_profile_reads_each_good_example_as_its_shipped_profile(file_name: str) -> None:
    data = (GOOD / file_name).read_bytes()
    profile = SHIPPED_GOOD[file_name]
    want = read_with(data, file_name, None if profile is None else (PROFILES / profile).read_text("utf-8"))
    text, got = guessed(data, file_name)
    assert_same(got, want)
    assert "# unsure:" not in text  # units in every header, signs and metadata in the file


def test_the_semicolon_export_is_guessed_whole_and_asks_only_for_its_cell_type() -> None:
    # Semicolons, decimal commas, Latin-1, h / mV / mA, discharge positive, two banner lines,
    # and the lot and cell id only in the file's name; the file never says its cell type.
    name = "LOT-A7_CELL-0012.csv"
    data = (GOOD / name).read_bytes()
    text = guess_profile(data, name)
    for line in (
        'delimiter = "semicolon"',
        'decimal = "comma"',
        'encoding = "latin-1"',
        "skip_lines = 2",
        "file_name_pattern = '^(?P<lot>[^_]+)_(?P<cell_id>[^_.]+)[.]'",
        'time = "h"',
        'voltage = "mV"',
        'current = "mA"',
        'current_sign = "discharge positive"',
        'temperature = "Cell temp (°C)"',
        '# cell_type = "..."',
    ):
        assert line in text, line
    with pytest.raises(InputError, match="no cell_type in the metadata"):
        read_with(data, name, text)
    # the one line the profile asks a person to fill in
    filled = text.replace('# cell_type = "..."', 'cell_type = "DEMO-LFP-20A"')
    got = read_with(data, name, filled)
    want = read_with(data, name, (PROFILES / "semicolon_decimal_comma.toml").read_text("utf-8"))
    assert_same(got, want, metadata=False)
    # the shipped profile also fixes the station's name, which no file can show
    assert dict(got.metadata) == {k: v for k, v in want.metadata.items() if k != "station"}


@pytest.mark.parametrize("cell", DEMO_CELLS, ids=[c.cell_id for c in DEMO_CELLS])
def test_a_guessed_profile_reads_each_demo_cycle_file_as_version_1(cell: DemoCell) -> None:
    name = cell.file_name
    data = demo_file_bytes(cell)
    _, got = guessed(data, name)
    assert_same(got, read_with(data, name, None))


def _layout_examples() -> list[tuple[str, str | None]]:
    from pipeline.demo.layouts import LAYOUTS as WRITTEN
    from pipeline.demo.layouts import TWIN_EXAMPLE

    pairs: list[tuple[str, str | None]] = [(TWIN_EXAMPLE, None)]
    pairs += [(layout.example, layout.profile) for layout in WRITTEN.values()]
    return pairs


def test_every_file_in_docs_layouts_is_an_example_here() -> None:
    examples = {name for name, _ in _layout_examples()}
    assert examples == {p.name for p in LAYOUTS.iterdir() if p.suffix != ".md"}


@pytest.mark.parametrize(("file_name", "profile"), _layout_examples())
def test_a_guessed_profile_reads_each_layout_example_as_its_shipped_profile(
    file_name: str, profile: str | None
) -> None:
    data = (LAYOUTS / file_name).read_bytes()
    shipped = None if profile is None else (PROFILES / profile).read_text("utf-8")
    want = read_with(data, file_name, shipped, str(profile))
    _, got = guessed(data, file_name)
    assert_same(got, want)


# ---------------------------------------------------------------- layouts the demo can write


def _each_layout(record: Trace, stem: str) -> list[tuple[str, bytes, str]]:
    """(file name, bytes, shipped profile's text) of every layout the demo writes of ``record``."""
    from pipeline.demo.layouts import LAYOUTS as WRITTEN

    return [
        (stem + Path(layout.example).suffix, layout.write(record), (PROFILES / layout.profile).read_text("utf-8"))
        for layout in WRITTEN.values()
    ]


@pytest.mark.parametrize("index", [0, 11, 12, 14], ids=lambda i: DEMO_CELLS[i].defect or "normal")
def test_a_guessed_profile_reads_every_layout_of_a_demo_cell_as_its_shipped_profile(index: int) -> None:
    from pipeline.demo.layouts import read_twin

    cell = DEMO_CELLS[index]
    record = read_twin(demo_file_bytes(cell), cell.file_name)
    for name, data, shipped in _each_layout(record, cell.cell_id):
        _, got = guessed(data, name)
        assert_same(got, read_with(data, name, shipped))


@pytest.mark.slow
@pytest.mark.parametrize("name", ["nmc_normal_2", "lfp_missing_plateau"])
def test_a_guessed_profile_reads_every_layout_of_a_reference_cell_as_its_shipped_profile(name: str) -> None:
    # nmc_normal_2's date-time export has one rest row whose current (the channel's reading
    # at the switch from a discharge) is written negative beside a current of magnitudes
    from pipeline.demo import cycletext
    from pipeline.demo.layouts import read_twin
    from tests.test_physics_lot import read_through

    record = read_through(name, 5e-4, 1e-4, seed=1)  # as tests/test_layouts.py reads it
    twin = read_twin(cycletext.to_cycle_file(record, record.metadata).encode("utf-8"), f"{name}.csv")
    for file_name, data, shipped in _each_layout(twin, name):
        _, got = guessed(data, file_name)
        assert_same(got, read_with(data, file_name, shipped))



def _twin() -> Trace:
    from pipeline.demo.layouts import example_twin

    return read_cycle_file(example_twin(), "twin.csv")


def test_a_workbook_of_local_date_time_cells_is_read_in_the_zone_its_info_sheet_names() -> None:
    from pipeline.demo.layouts import workbook

    twin = _twin()
    data = workbook(twin, rows_per_sheet=1200, time="date-time")
    text, got = guessed(data, "dated.xlsx")
    assert 'stamps = "date-time"' in text and 'zone_metadata = "clock_zone"' in text
    assert 'data_sheets = "Record*"' in text and 'metadata_sheet = "Info"' in text
    # the cells hold the local wall-clock time (stored as fractions of a day): within 1 ms
    np.testing.assert_allclose(got.time_s, twin.time_s - twin.time_s[0], atol=1e-3, rtol=0)
    assert np.array_equal(got.current_a, twin.current_a)
    assert np.array_equal(got.voltage_v, twin.voltage_v)


def test_a_parquet_file_of_utc_timestamps_needs_no_zone() -> None:
    from pipeline.demo.layouts import parquet

    twin = _twin()
    text, got = guessed(parquet(twin, time="date-time"), "dated.parquet")
    assert 'format = "parquet"' in text and 'stamps = "date-time"' in text
    assert "zone" not in text.split("[time]")[1].split("\n[")[0]
    np.testing.assert_allclose(got.time_s, twin.time_s - twin.time_s[0], atol=1e-2, rtol=0)
    assert np.array_equal(got.current_a, twin.current_a)


def _without_zone_line(data: bytes) -> bytes:
    return b"".join(line for line in data.splitlines(keepends=True) if not line.startswith(b"# clock_zone"))


@pytest.mark.parametrize(
    ("zone", "start"),
    [
        # the night the clocks go forward (an hour is skipped) and back (an hour repeats):
        # 29 March and 25 October 2026 in the EU (Directive 2000/84/EC, Articles 2 and 3),
        # 1 November 2026 in the US (Energy Policy Act of 2005, section 110)
        ("Europe/Berlin", dt.datetime(2026, 3, 28, 20, 0, tzinfo=dt.timezone(dt.timedelta(hours=1)))),
        ("Europe/Berlin", dt.datetime(2026, 10, 24, 20, 0, tzinfo=dt.timezone(dt.timedelta(hours=2)))),
        ("America/New_York", dt.datetime(2026, 10, 31, 20, 0, tzinfo=dt.timezone(dt.timedelta(hours=-4)))),
    ],
)
def test_a_local_clock_across_a_daylight_saving_change_is_given_a_zone_that_follows_it(
    zone: str, start: dt.datetime
) -> None:
    from pipeline.demo.layouts import date_time_text

    twin = _twin()
    data = _without_zone_line(date_time_text(twin, start=start, zone=zone))
    text, got = guessed(data, "local.csv")
    assert "zone_metadata" not in text
    assert f'zone = "{zone}"' in text
    assert "unsure: the stamps carry no UTC offset and" in text
    # the stamps are hundredths of a second: the elapsed time is the twin's within 10 ms
    np.testing.assert_allclose(got.time_s, twin.time_s - twin.time_s[0], atol=0.011, rtol=0)


@pytest.mark.parametrize(
    "pattern",
    ["%d.%m.%Y %H:%M:%S.%f", "%m/%d/%Y %H:%M:%S.%f", "%Y-%m-%d %H:%M:%S.%f", "%d/%m/%Y %H:%M:%S.%f"],
)
def test_date_time_patterns_are_found_and_read_every_stamp(pattern: str) -> None:
    from pipeline.demo.layouts import date_time_text

    twin = _twin()
    start = dt.datetime(2026, 6, 1, 20, 0, tzinfo=dt.UTC)  # summer: no change of the clock
    data = date_time_text(twin, start=start, zone="UTC", date_format=pattern)
    text, got = guessed(data, "dated.csv")
    found = re.search(r'date_format = "([^"]+)"', text)
    assert found is not None
    # a year-first stamp with dashes is ISO 8601, which the reader reads without a pattern
    assert found[1] == ("ISO 8601" if pattern.startswith("%Y-") else pattern)
    np.testing.assert_allclose(got.time_s, twin.time_s - twin.time_s[0], atol=0.011, rtol=0)


def test_a_clock_without_offsets_and_no_change_gets_utc_and_a_comment_to_set_its_zone() -> None:
    from pipeline.demo.layouts import date_time_text

    twin = _twin()
    start = dt.datetime(2026, 6, 1, 20, 0, tzinfo=dt.UTC)
    data = _without_zone_line(date_time_text(twin, start=start, zone="UTC"))
    text, _ = guessed(data, "dated.csv")
    assert re.search(r'^zone = "UTC"$', text, re.M)
    assert "# unsure: the stamps carry no UTC offset; set the zone of the cycler's clock" in text


PATTERNS = (
    "%d.%m.%Y %H:%M:%S.%f",
    "%d.%m.%Y %H:%M:%S",
    "%m/%d/%Y %H:%M:%S.%f",
    "%m/%d/%Y %I:%M:%S %p",
    "%d/%m/%Y %H:%M:%S",
    "%Y-%m-%d %H:%M:%S.%f",
    "%Y/%m/%d %H:%M:%S",
    "%d-%m-%Y %H:%M:%S.%f",
)
# the zones a guess tries (pipeline/read/guess_time.py DST_ZONES), fixed offsets and UTC
ZONES = ("Europe/Berlin", "Europe/London", "America/New_York", "Australia/Sydney", "+05:45", "-03:00", "UTC")


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    pattern=st.sampled_from(PATTERNS),
    zone=st.sampled_from(ZONES),
    # any start in 2026, often the evening before a daylight-saving change somewhere. The
    # dates of the changes: the EU's last Sundays of March and October at 01:00 UTC (Directive
    # 2000/84/EC, Articles 2 and 3); the US's second Sunday of March and first Sunday of
    # November (Energy Policy Act of 2005, section 110); New South Wales's first Sundays of
    # April and October (Standard Time Act 1987 (NSW), section 4); as the IANA tz database
    # (the zoneinfo the reader uses) has them for 2026.
    start=st.one_of(
        st.datetimes(dt.datetime(2026, 1, 1), dt.datetime(2026, 12, 30), timezones=st.just(dt.UTC)),
        st.sampled_from(
            [
                dt.datetime(2026, 3, 28, 18, 0, tzinfo=dt.UTC),  # Europe, forward
                dt.datetime(2026, 10, 24, 18, 0, tzinfo=dt.UTC),  # Europe, back
                dt.datetime(2026, 3, 7, 22, 0, tzinfo=dt.UTC),  # America, forward
                dt.datetime(2026, 10, 31, 22, 0, tzinfo=dt.UTC),  # America, back
                dt.datetime(2026, 4, 4, 6, 0, tzinfo=dt.UTC),  # Sydney, back
                dt.datetime(2026, 10, 3, 6, 0, tzinfo=dt.UTC),  # Sydney, forward
            ]
        ),
    ),
    delimiter=st.sampled_from([(";", ","), (";", "."), ("\t", ","), (",", ".")]),
    words=st.sampled_from([("C", "D", "R"), ("CHG", "DCHG", "REST"), ("charge", "discharge", "pause")]),
    keep_zone_line=st.booleans(),
)
def test_any_local_clock_and_pattern_of_a_date_time_export_is_read_alike(
    pattern: str,
    zone: str,
    start: dt.datetime,
    delimiter: tuple[str, str],
    words: tuple[str, str, str],
    keep_zone_line: bool,
) -> None:
    from pipeline.demo.layouts import date_time_text

    mode_words = dict(zip(("charge", "discharge", "rest"), words, strict=True))
    data = date_time_text(
        _twin(), start=start, zone=zone, date_format=pattern,
        delimiter=delimiter[0], decimal=delimiter[1], mode_words=mode_words,
    )
    if not keep_zone_line:
        data = _without_zone_line(data)
    # the profile a person who knows the clock would write
    shipped = (PROFILES / "datetime_mode_column.toml").read_text("utf-8")
    known = (
        shipped.replace('date_format = "%d.%m.%Y %H:%M:%S.%f"', f'date_format = "{pattern}"')
        .replace('zone = "Europe/Berlin"', f'zone = "{zone}"')
        .replace('delimiter = "semicolon"', f'delimiter = "{ {";": "semicolon", ",": "comma"}.get(delimiter[0], "tab")}"')
        .replace('decimal = "comma"', f'decimal = "{"comma" if delimiter[1] == "," else "point"}"')
        .replace('charge = ["charge"]', f'charge = ["{words[0]}"]')
        .replace('discharge = ["discharge"]', f'discharge = ["{words[1]}"]')
        .replace('rest = ["pause"]', f'rest = ["{words[2]}"]')
    )
    want = read_with(data, "dated.csv", known)
    _, got = guessed(data, "dated.csv")
    assert_same(got, want)


# ---------------------------------------------------------------- one small record, written many ways


def _record() -> dict[str, list[float]]:
    """A short formation: rest, charge, rest, discharge, rest; one row a minute."""
    current = [0.004, -0.003] + [10.0] * 12 + [0.002, 0.0] + [-10.0] * 12 + [0.001, -0.004]
    voltage: list[float] = []
    v = 3.2
    for i in current:
        v += (0.011 if i > 1 else -0.011) if abs(i) > 1 else 0.0
        voltage.append(round(v, 4))
    step = [1, 1] + [2] * 12 + [3, 3] + [4] * 12 + [5, 5]
    return {
        "time": [60.0 * k for k in range(len(current))],
        "voltage": voltage,
        "current": current,
        "temperature": [round(25.0 + 0.1 * (k % 7), 1) for k in range(len(current))],
        "step": [float(s) for s in step],
    }


TIME_FACTORS = {"s": 1.0, "ms": 1e-3, "min": 60.0, "h": 3600.0}
MARKS: dict[str, Callable[[str, str], str]] = {
    "round": lambda word, unit: f"{word} ({unit})",
    "square": lambda word, unit: f"{word} [{unit}]",
    "underscore": lambda word, unit: f"{word}_{unit}",
    "slash": lambda word, unit: f"{word}/{unit}",
}
MODE_WORDS: list[tuple[str, str, str]] = [("C", "D", "R"), ("CC_Chg", "CC_DChg", "Rest"), ("charge", "discharge", "pause")]
WORDS = [("Time", "Elapsed", "Test time", "t"), ("Voltage", "U", "Cell voltage", "Ecell"), ("Current", "I", "Cell current")]


@dataclass(frozen=True)
class Written:
    """One way of writing the small record: delimiter, decimal mark, units, sign, headers, head."""

    delimiter: str
    decimal: str
    time: str
    voltage: str
    current: str
    sign: str
    modes: tuple[str, str, str]  # the words for charge, discharge, rest
    marks: str
    bare: bool  # no unit in the voltage's and current's headers
    words: tuple[str, str, str]  # the words of the time, voltage and current headers
    temperature: str
    encoding: str
    prefix: str
    banner: int
    order: tuple[int, ...]


@st.composite
def layouts(draw: st.DrawFn) -> Written:
    delimiter = draw(st.sampled_from([",", ";", "\t"]))
    time_word, volt_word, amp_word = (draw(st.sampled_from(words)) for words in WORDS)
    return Written(
        delimiter=delimiter,
        decimal="." if delimiter == "," else draw(st.sampled_from([".", ","])),
        time=draw(st.sampled_from(sorted(TIME_FACTORS))),
        voltage=draw(st.sampled_from(["V", "mV"])),
        current=draw(st.sampled_from(["A", "mA"])),
        sign=draw(st.sampled_from(["charge positive", "discharge positive", "from mode"])),
        modes=draw(st.sampled_from(MODE_WORDS)),
        marks=draw(st.sampled_from(sorted(MARKS))),
        bare=draw(st.booleans()),
        words=(time_word, volt_word, amp_word),
        temperature=draw(st.sampled_from(["Temp (°C)", "T_degC", "Temperature [C]", "Cell temp /°C"])),
        encoding=draw(st.sampled_from(["utf-8", "utf-8-sig", "latin-1"])),
        prefix=draw(st.sampled_from(["#", "//", "%"])),
        banner=draw(st.integers(0, 2)),
        order=tuple(draw(st.permutations(range(6)))),
    )


def _write(layout: Written) -> tuple[bytes, str]:
    """The record written in ``layout``, and the profile a person would write for it."""
    record = _record()
    mark = MARKS[layout.marks]
    decimal, delimiter = layout.decimal, layout.delimiter
    time_unit, volt_unit, amp_unit = layout.time, layout.voltage, layout.current
    sign = layout.sign
    charge, discharge, rest = layout.modes

    def number(value: float) -> str:
        return repr(round(value, 6)).replace(".", decimal)

    def amps(value: float) -> float:
        scaled = value * (1000.0 if amp_unit == "mA" else 1.0)
        if sign == "discharge positive":
            return -scaled + 0.0
        if sign == "from mode" and abs(value) > 1:
            return abs(scaled)
        return scaled

    def mode(value: float) -> str:
        return str(charge if value > 1 else discharge if value < -1 else rest)

    time_word, volt_word, amp_word = layout.words
    bare = layout.bare
    temperature = layout.temperature
    headers = {
        "time": mark(time_word, time_unit),
        "voltage": volt_word if bare else mark(volt_word, volt_unit),
        "current": amp_word if bare else mark(amp_word, amp_unit),
    }
    columns = [
        (headers["time"], [number(t / TIME_FACTORS[time_unit]) for t in record["time"]]),
        (headers["voltage"], [number(v * (1000 if volt_unit == "mV" else 1)) for v in record["voltage"]]),
        (headers["current"], [number(amps(i)) for i in record["current"]]),
        (temperature, [number(t) for t in record["temperature"]]),
        ("Step", [str(int(s)) for s in record["step"]]),
        ("Mode", [mode(i) for i in record["current"]]),
    ]
    if sign != "from mode":
        columns.pop()
    order = [k for k in layout.order if k < len(columns)]
    columns = [columns[k] for k in order]
    prefix = layout.prefix
    lines = [f"Export of channel {k + 3} for a small test" for k in range(layout.banner)]
    lines += [f"{prefix} lot: L-1", f"{prefix} cell_id: C-1", f"{prefix} cell_type: DEMO-LFP-20A"]
    lines.append(delimiter.join(h for h, _ in columns))
    for row in range(len(record["time"])):
        lines.append(delimiter.join(values[row] for _, values in columns))
    text = "\n".join(lines) + "\n"
    encoding = layout.encoding
    data = text.encode("latin-1" if encoding == "latin-1" else "utf-8")
    if encoding == "utf-8-sig":
        data = b"\xef\xbb\xbf" + data
    words = {",": "comma", ";": "semicolon", "\t": "tab"}
    profile = [
        "[file]",
        f'delimiter = "{words[delimiter]}"',
        f'decimal = "{"comma" if decimal == "," else "point"}"',
        f'encoding = "{encoding}"',
        f"skip_lines = {layout.banner}",
        f'metadata_prefix = "{prefix}"',
        "[columns]",
        *(f'{quantity} = "{header}"' for quantity, header in headers.items()),
        f'temperature = "{temperature}"',
        'step = "Step"',
    ]
    if sign == "from mode":
        profile.append('mode = "Mode"')
    profile += [
        "[units]",
        f'time = "{time_unit}"',
        f'voltage = "{volt_unit}"',
        f'current = "{amp_unit}"',
        f'current_sign = "{sign}"',
    ]
    if sign == "from mode":
        profile += ["[mode]", f'charge = ["{charge}"]', f'discharge = ["{discharge}"]', f'rest = ["{rest}"]']
    return data, "\n".join(profile) + "\n"


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(layouts())
def test_any_way_of_writing_one_record_is_guessed_back_right(layout: Written) -> None:
    data, profile = _write(layout)
    want = read_with(data, "small.csv", profile)
    _, got = guessed(data, "small.csv")
    assert_same(got, want)


# ---------------------------------------------------------------- what it says where it cannot know


def test_a_mode_column_of_cc_and_cv_words_lists_each_under_what_it_means() -> None:
    # a constant-voltage tail holds the voltage while its current decays
    rows = ["Time (s);Mode;U (V);I (A)"]
    t = 0
    plan = [("Rest", 0.0, 0.0, 3), ("CC_Chg", 10.0, 0.02, 8), ("CV_Chg", 5.0, 0.0, 6)]
    plan += [("Rest", 0.0, 0.0, 3), ("CC_DChg", 10.0, -0.02, 8), ("Rest", 0.0, 0.0, 3)]
    v = 3.2
    for word, amps, slope, count in plan:
        for k in range(count):
            v += slope
            current = amps * 0.8**k if word == "CV_Chg" else amps
            rows.append(f"{t};{word};{v:.4f};{current:.4f}".replace(".", ","))
            t += 10
    data = ("# cell_id: C1\n# lot: L1\n# cell_type: T\n" + "\n".join(rows) + "\n").encode()
    text, trace = guessed(data, "modes.csv")
    assert 'current_sign = "from mode"' in text
    assert re.search(r'^charge = \["CC_Chg", "CV_Chg"\]', text, re.M)
    assert re.search(r'^discharge = \["CC_DChg"\]', text, re.M)
    assert re.search(r'^rest = \["Rest"\]', text, re.M)
    assert float(trace.current_a[np.flatnonzero(trace.current_a < 0)[0]]) == -10.0


def test_a_magnitude_whose_rest_rows_read_just_below_zero_is_not_called_never_negative() -> None:
    # the channel's zero offset on rest rows, written as measured beside the magnitude
    rows = ["Time (s),Mode,U (V),I (A)"]
    plan = [("R", -0.003, 3), ("C", 10.0, 8), ("R", -0.002, 3), ("D", 10.0, 8), ("R", -0.003, 3)]
    t, v = 0, 3.2
    for word, amps, count in plan:
        for _ in range(count):
            v += {"C": 0.02, "D": -0.02, "R": 0.0}[word]
            rows.append(f"{t},{word},{v:.4f},{amps:.4f}")
            t += 10
    data = ("# cell_id: C1\n# lot: L1\n# cell_type: T\n" + "\n".join(rows) + "\n").encode()
    text, trace = guessed(data, "offsets.csv")
    assert "values -0.003 to 10" in text
    (sign,) = [line for line in text.splitlines() if line.startswith("current_sign")]
    assert sign.startswith('current_sign = "from mode"')
    assert "never negative" not in text
    assert "the current is negative only near zero, never below -1: a magnitude, its direction in Mode" in text
    assert trace.current_a.min() == -10.0 and (trace.current_a == -0.003).sum() == 6


def test_a_metadata_key_under_another_name_is_named_not_taken() -> None:
    data = b"# Cell ID: C7\n# lot: L1\n# Cell type: DEMO-LFP-20A\ntime_s,voltage_V,current_A\n0,3.2,0\n60,3.3,5\n"
    text = guess_profile(data, "c7.csv")
    assert '# cell_type = "DEMO-LFP-20A"' in text
    assert "its metadata 'Cell type' says 'DEMO-LFP-20A'" in text
    # no cell id in the file, and a name that does not show one
    assert "The file gives no cell_id, and its name does not show it either" in text


def test_a_workbook_with_its_metadata_above_the_header_on_one_sheet() -> None:
    from openpyxl import Workbook

    book = Workbook()
    sheet = book.active
    assert sheet is not None
    sheet.title = "Data"
    sheet.append(["Channel export"])
    for key, value in (("cell_id", "C9"), ("lot", "L9"), ("cell_type", "DEMO-LFP-20A")):
        sheet.append([key, value])
    sheet.append(["Time [min]", "Voltage [mV]", "Current [mA]"])
    record = _record()
    for t, v, i in zip(record["time"], record["voltage"], record["current"], strict=True):
        sheet.append([t / 60, v * 1000, i * 1000])
    out = io.BytesIO()
    book.save(out)
    text, trace = guessed(out.getvalue(), "c9.xlsx")
    assert 'data_sheets = "Data"' in text and "metadata_sheet" not in text
    assert (trace.cell_id, trace.lot) == ("C9", "L9")
    np.testing.assert_allclose(trace.time_s, record["time"])
    np.testing.assert_allclose(trace.current_a, record["current"])


def test_time_that_restarts_with_each_step_is_read_as_time_since_the_step_began() -> None:
    record = _record()
    lines = ["# cell_id: C1", "# lot: L1", "# cell_type: T", "Step,Step time (s),Voltage (V),Current (A)"]
    began = 0.0
    previous = None
    for t, v, i, s in zip(record["time"], record["voltage"], record["current"], record["step"], strict=True):
        if s != previous and previous is not None:
            began = t - 60.0  # the step's first row counts from the previous row
        previous = s
        lines.append(f"{int(s)},{t - began:.1f},{v},{i}")
    text, trace = guessed(("\n".join(lines) + "\n").encode(), "steps.csv")
    assert 'stamps = "step elapsed"' in text
    np.testing.assert_allclose(trace.time_s, record["time"])


@pytest.mark.parametrize(
    ("data", "problem"),
    [
        (b"", "the file is empty"),
        (b"\n\n  \n", "the file is empty"),
        (b"just a note\nand another\n", "no header row followed by data rows was found"),
        ("\ufefftime;U\n0;3\n".encode("utf-16"), "the file looks like UTF-16 text"),
    ],
)
def test_a_file_with_nothing_to_guess_from_is_a_located_error(data: bytes, problem: str) -> None:
    with pytest.raises(InputError) as caught:
        guess_profile(data, "inbox/x.csv")
    assert str(caught.value).startswith("inbox/x.csv")
    assert problem in str(caught.value)


def test_a_zip_archive_and_a_damaged_workbook_are_named() -> None:
    archive = io.BytesIO()
    with zipfile.ZipFile(archive, "w") as z:
        z.writestr("a.csv", "time_s,voltage_V,current_A\n")
    with pytest.raises(InputError, match=r"x\.zip: the file is a zip archive, not a cycle file"):
        guess_profile(archive.getvalue(), "x.zip")
    good = (LAYOUTS / "workbook_sheets.xlsx").read_bytes()
    with pytest.raises(InputError, match=r"cut\.xlsx: the workbook cannot be read"):
        guess_profile(good[: len(good) // 2], "cut.xlsx")


def test_a_gzip_file_is_guessed_from_what_it_holds() -> None:
    data = gzip.compress((GOOD / "tab_log_cell-0012.tsv").read_bytes(), mtime=0)
    text, trace = guessed(data, "log.tsv.gz")
    assert 'delimiter = "tab"' in text and len(trace) == 24


# ---------------------------------------------------------------- the commands


def test_profile_guess_prints_the_profile_and_says_when_the_file_needs_more(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "LOT-A7_CELL-0012.csv"
    shutil.copy(GOOD / path.name, path)
    assert main(["profile", "guess", str(path)]) == 0
    out, err = capsys.readouterr()
    assert out == guess_profile(path.read_bytes(), str(path))
    assert err.splitlines()[0] == "note: LOT-A7_CELL-0012.csv cannot be read with this profile as it is:"
    assert "no cell_type in the metadata" in err


def test_profile_guess_writes_the_profile_with_out(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "log.tsv"
    shutil.copy(GOOD / "tab_log_cell-0012.tsv", path)
    out_path = tmp_path / "profiles" / "log.toml"
    assert main(["profile", "guess", str(path), "-o", str(out_path)]) == 0
    out, err = capsys.readouterr()
    assert out == (
        f"{out_path}: a profile for log.tsv; see what it reads with: "
        f"formgate profile show {out_path} {path}\n"
    )
    assert err == ""
    assert out_path.read_text("utf-8") == guess_profile(path.read_bytes(), str(path))


def test_profile_commands_exit_2_with_located_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text('[units]\ncurrent = "kA"\n', encoding="utf-8")
    assert main(["profile", "show", str(bad), str(GOOD / "v1_basic.csv")]) == 2
    assert capsys.readouterr().err.startswith(f'{bad}, line 2: [units] current = "kA" is not one of')
    empty = tmp_path / "empty.csv"
    empty.write_bytes(b"")
    assert main(["profile", "guess", str(empty)]) == 2
    assert capsys.readouterr().err.startswith(f"{empty}: the file is empty.")
    assert main(["profile", "guess", str(tmp_path / "missing.csv")]) == 2
    assert "missing.csv" in capsys.readouterr().err
    semicolon = PROFILES / "semicolon_decimal_comma.toml"
    assert main(["profile", "show", str(semicolon), str(GOOD / "v1_basic.csv")]) == 2
    assert "v1_basic.csv, line 8: no column for time" in capsys.readouterr().err


def _doc_example(command: str) -> tuple[str, str]:
    """The lines docs/cli.md shows after ``$ formgate <command>``, up to the block's end or the next $."""
    doc = (REPO / "docs" / "cli.md").read_text("utf-8")
    found = re.search(rf"^\$ formgate {re.escape(command)}\n(.*?)(?=^\$ |^```)", doc, re.M | re.S)
    assert found, command
    return command, found[1]


def _in_station_like_folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A folder with rules/ (the shipped rule sets and profiles) and inbox/LOT-A7_CELL-0012.csv."""
    shutil.copytree(RULES_DIR, tmp_path / "rules")
    (tmp_path / "inbox").mkdir()
    shutil.copy(GOOD / "LOT-A7_CELL-0012.csv", tmp_path / "inbox")
    monkeypatch.chdir(tmp_path)


def test_profile_show_prints_what_was_read_as_docs_cli_md_shows_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _in_station_like_folder(tmp_path, monkeypatch)
    command, shown = _doc_example(
        "profile show rules/profiles/semicolon_decimal_comma.toml inbox/LOT-A7_CELL-0012.csv"
    )
    assert main(command.split()) == 0
    out, err = capsys.readouterr()
    assert out == shown
    assert err == ""
    # the rows in s, V, A with positive = charge: the file's first current (-10000 mA) is a charge
    assert "  line 9    120.000    3.30000   10.00000          25.20     2      1" in out


def test_profile_guess_with_out_as_docs_cli_md_shows_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _in_station_like_folder(tmp_path, monkeypatch)
    command, shown = _doc_example("profile guess inbox/LOT-A7_CELL-0012.csv -o rules/profiles/lot_export.toml")
    assert main(command.split()) == 0
    out, err = capsys.readouterr()
    assert out + err == shown
    assert Path("rules/profiles/lot_export.toml").is_file()


def test_a_date_and_a_time_of_day_in_two_columns_is_named_as_what_the_profile_cannot_read() -> None:
    data = (
        b"# cell_id: C1\n# lot: L1\n# cell_type: T\nDate;Time;U (V);I (A)\n"
        b"02.06.2024;08:26:00;3,2;0\n02.06.2024;08:27:00;3,3;1,5\n02.06.2024;08:28:00;3,4;1,5\n"
    )
    text = guess_profile(data, "two.csv")
    assert "# - the date (Date) and the time of day (Time) stand in two columns" in text
    assert "[mode]" not in text and "mode =" not in text  # a column of dates is no mode column


def test_a_counter_of_one_direction_only_is_left_out_with_its_reason() -> None:
    # the cycler's "Charge (Ah)" counts only while charging: beside formgate's integral of
    # every step it would put a data-quality note on every certificate
    record = _record()
    lines = ["# cell_id: C1", "# lot: L1", "# cell_type: T", "Time (s),Voltage (V),Current (A),Step,Charge capacity (Ah)"]
    counted = 0.0
    for k, (t, v, i, s) in enumerate(zip(record["time"], record["voltage"], record["current"], record["step"], strict=True)):
        if k and i > 1:
            counted += i * 60 / 3600
        lines.append(f"{t},{v},{i},{int(s)},{counted:.6f}")
    text = guess_profile(("\n".join(lines) + "\n").encode(), "c1.csv")
    assert "capacity =" not in text
    assert "# not read: 'Charge capacity (Ah)' (the cycler's capacity counter in Ah, 50 % apart" in text


def test_a_v1_column_name_that_holds_something_else_is_not_read_as_that_quantity() -> None:
    data = b"# cell_id: C1\n# lot: L1\n# cell_type: T\nt (s),U (V),I (A),cycle\n0,3.2,0,a\n60,3.3,5,b\n120,3.4,5,c\n"
    text, trace = guessed(data, "c1.csv")
    assert 'cycle = "(no cycle column)"' in text
    assert trace.cycle is None


def test_key_value_lines_without_a_prefix_are_skipped_and_named() -> None:
    data = b"Cell ID: X1\nBatch: B7\nModel: DEMO-LFP-20A\n\nTime (s),Voltage (V),Current (A)\n0,3.2,0\n60,3.3,5\n120,3.4,5\n"
    text = guess_profile(data, "export.csv")
    assert "skip_lines = 3" in text
    said = comments(text)
    assert "Cell ID, Batch, Model stand there as 'key: value' without a prefix" in said
    assert "the file gives no cell_id, but its line (which is not read as metadata) 'Cell ID' says 'X1'" in said
    assert '# cell_type = "DEMO-LFP-20A"' in text
    assert "cell_id =" not in text  # a cell id is never fixed for every file


def test_a_workbook_of_local_date_time_cells_without_a_zone_and_prefixed_metadata_cells() -> None:
    from openpyxl import Workbook

    from pipeline.read.zones import parse_zone

    # a record across the night the clocks go back in Europe/Berlin (02:00 to 03:00 twice),
    # written as the local wall-clock time in date-time cells, without a zone anywhere
    berlin = parse_zone("Europe/Berlin")
    start = dt.datetime(2026, 10, 25, 0, 0, tzinfo=dt.UTC)
    record = _record()
    stamps = [start + dt.timedelta(seconds=4 * t) for t in record["time"]]  # one row every 4 min
    book = Workbook()
    sheet = book.active
    assert sheet is not None
    for line in ("// cell_id: C5", "// lot: L5", "// cell_type: DEMO-LFP-20A"):
        sheet.append([line])
    sheet.append(["Date/Time", "Voltage (V)", "Current (A)"])
    for stamp, v, i in zip(stamps, record["voltage"], record["current"], strict=True):
        sheet.append([stamp.astimezone(berlin).replace(tzinfo=None), v, i])
    out = io.BytesIO()
    book.save(out)
    text, trace = guessed(out.getvalue(), "c5.xlsx")
    assert 'metadata_prefix = "//"' in text
    assert 'zone = "Europe/Berlin"' in text
    assert (trace.cell_id, trace.cell_type) == ("C5", "DEMO-LFP-20A")
    np.testing.assert_allclose(trace.time_s, 4 * np.array(record["time"]), atol=1e-3)


def test_profile_show_reads_a_file_that_lacks_its_cell_type_and_names_what_is_missing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "LOT-A7_CELL-0012.csv"
    shutil.copy(GOOD / path.name, path)
    profile = tmp_path / "guessed.toml"
    profile.write_text(guess_profile(path.read_bytes(), path.name), encoding="utf-8")
    assert main(["profile", "show", str(profile), str(path), "--rules", str(RULES_DIR)]) == 2
    out, err = capsys.readouterr()
    assert "  line 9    120.000    3.30000   10.00000          25.20     2      1" in out
    assert "  cell_type   (missing)                  not in the file: a check asks for it" in out
    assert out.endswith("\nsteps: not cut, the file lacks metadata a check needs (below)\n")
    assert err.startswith(f"{path}, line 3: no cell_type in the metadata")


def test_a_header_written_over_two_columns_is_not_mapped() -> None:
    data = b"# cell_id: C1\n# lot: L1\n# cell_type: T\nt (s),U (V),I (A),T (C),T (C)\n0,3.2,0,25,26\n60,3.3,5,25,26\n120,3.4,5,25,26\n"
    text, trace = guessed(data, "c1.csv")
    assert "# not read: 'T (C)' (its header stands over 2 columns)" in text
    assert trace.temperature_c is None
