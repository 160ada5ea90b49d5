"""Every invented export of a record is judged exactly as its cycle file version 1 twin.

Each layout of pipeline/demo/layouts.py (date-time text with a mode column and counters, ISO
8601 stamps with offsets, time since the step began, a workbook over several sheets, Parquet)
is written from a version 1 file of the demo lots or the PyBaMM reference lot, read through
its shipped example profile (rules/profiles/) by ``check_file``, the call `formgate check
--profile` makes, and must give the twin's verdict, hazards, check outcomes and metrics.

Tolerance of the metrics: relative 1e-6 (absolute 1e-9 near zero). The layouts carry the
twin's digits (or its float64 values), so the metrics differ only by float rounding: the
elapsed time counted from the first stamp instead of from 0.1 s, mA times 0.001 against the
twin's A, the workbook's date-time cells stored as fractions of a day (about 1 µs).
"""

from __future__ import annotations

import calendar
import dataclasses
import datetime as dt
import functools
import hashlib
import json
from collections.abc import Callable
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.results import CellResult
from pipeline.demo import cycletext
from pipeline.demo.batch import expected_verdict
from pipeline.demo.layouts import (
    LAYOUTS,
    TWIN_EXAMPLE,
    Layout,
    date_time_text,
    example_files,
    iso_offset_text,
    parquet,
    read_twin,
    sheet_name,
    workbook,
)
from pipeline.demo.lots import (
    DEMO_CELLS,
    DEMO_NA_CELLS,
    DEMO_NMC_CELLS,
    DemoCell,
    demo_file_bytes,
)
from pipeline.errors import InputError
from pipeline.model import Trace
from pipeline.read.cyclefile import read_cycle_file
from pipeline.read.profile import Profile, load_profile
from pipeline.rulebook.book import RuleBook, load_rules_dir
from pipeline.runner import check_file
from tests.conftest import REPO, RULES_DIR
from tests.test_physics_lot import EXPECTED as REFERENCE_EXPECTED
from tests.test_physics_lot import read_through
from tests.test_physics_lot import rulebook as reference_rulebook

ANALYSED_AT = dt.datetime(2026, 3, 5, 8, 0, tzinfo=dt.UTC)
PROFILES = RULES_DIR / "profiles"
EXAMPLES = REPO / "docs" / "layouts"
REL, ABS = 1e-6, 1e-9  # see the module's docstring
BERLIN = ZoneInfo("Europe/Berlin")


def _by_defect(cells: tuple[DemoCell, ...], defect: str) -> DemoCell:
    return next(c for c in cells if c.defect == defect)


# Passing cells (one gzip-compressed), failing cells of every lot, and a cell held for review.
DEMO_SAMPLE: tuple[DemoCell, ...] = (
    DEMO_CELLS[0],
    DEMO_CELLS[2],
    _by_defect(DEMO_CELLS, "low_capacity"),
    _by_defect(DEMO_CELLS, "internal_short"),
    _by_defect(DEMO_CELLS, "over_temperature"),
    _by_defect(DEMO_CELLS, "slow_drift"),
    _by_defect(DEMO_NMC_CELLS, "high_dcir"),
    _by_defect(DEMO_NA_CELLS, "sodium_plating"),
)
# Reference cells resampled every 5 s (test_physics_lot.interval_of): a pass and two fails.
REFERENCE_SAMPLE = ("nmc_normal_3", "nmc_high_dcir", "lfp_missing_plateau")


@functools.cache
def shipped_rulebook() -> RuleBook:
    return load_rules_dir(RULES_DIR)


@functools.cache
def shipped_profile(file_name: str) -> Profile:
    path = PROFILES / file_name
    return load_profile(path.read_text(encoding="utf-8"), str(path))  # as `formgate check --profile`


def checked(path: Path, data: bytes, profile: Profile | None, rulebook: RuleBook) -> CellResult:
    """Write ``data`` to ``path`` and judge it as `formgate check` does; raise its error."""
    path.write_bytes(data)
    outcome = check_file(path, rulebook, None, analysed_at=ANALYSED_AT, profile=profile, certificate=False)
    if outcome.error is not None:
        raise outcome.error
    assert outcome.result is not None
    return outcome.result


def assert_judged_alike(got: CellResult, twin: CellResult, where: str) -> None:
    assert (got.verdict.kind, got.verdict.hazards) == (twin.verdict.kind, twin.verdict.hazards), where
    assert [(c.rule_id, c.outcome) for c in got.verdict.checks] == [
        (c.rule_id, c.outcome) for c in twin.verdict.checks
    ], where
    assert got.verdict.reasons == twin.verdict.reasons, where
    assert (got.cell_id, got.metadata["lot"], got.cell_type.name) == (
        twin.cell_id,
        twin.metadata["lot"],
        twin.cell_type.name,
    ), where
    assert set(got.metrics.values) == set(twin.metrics.values), where
    for name, value in twin.metrics.values.items():
        if value is None:
            assert got.metrics.values[name] is None, f"{where}: {name}"
        else:
            assert got.metrics.values[name] == pytest.approx(value, rel=REL, abs=ABS), f"{where}: {name}"
    assert sorted(n.code for n in got.notes) == sorted(n.code for n in twin.notes), where


def elapsed(trace: Trace) -> np.ndarray:
    return np.asarray(trace.time_s) - trace.time_s[0]


def suffix(layout: Layout) -> str:
    return Path(layout.example).suffix


# ----------------------------------------------------------------- the demo and reference lots


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("layouts")


_twins: dict[str, tuple[Trace, CellResult]] = {}


def demo_twin(cell: DemoCell, folder: Path) -> tuple[Trace, CellResult]:
    """The cell's version 1 file as read, and as judged (once per test module)."""
    if cell.cell_id not in _twins:
        data = demo_file_bytes(cell)
        result = checked(folder / cell.file_name, data, None, shipped_rulebook())
        _twins[cell.cell_id] = (read_twin(data, cell.file_name), result)
    return _twins[cell.cell_id]


@pytest.mark.parametrize("cell", DEMO_SAMPLE, ids=lambda c: f"{c.cell_id}-{c.defect or 'normal'}")
@pytest.mark.parametrize("kind", list(LAYOUTS))
def test_each_layout_of_a_demo_cell_is_judged_as_its_twin(kind: str, cell: DemoCell, folder: Path) -> None:
    record, twin = demo_twin(cell, folder)
    assert twin.verdict.kind.value == expected_verdict(cell)  # the sample holds fails and a hold
    layout = LAYOUTS[kind]
    path = folder / f"{cell.lot}_{cell.cell_id}_{layout.profile.removesuffix('.toml')}{suffix(layout)}"
    got = checked(path, layout.write(record), shipped_profile(layout.profile), shipped_rulebook())
    assert_judged_alike(got, twin, f"{kind} of {cell.cell_id}")
    assert not [n for n in got.notes if n.code.endswith("_counter_differs")]


@functools.cache
def reference_twin_bytes(name: str) -> bytes:
    # through a simulated channel (0.05 % current noise, 0.01 % offset), as test_physics_lot reads it
    record = read_through(name, 5e-4, 1e-4, seed=1)
    return cycletext.to_cycle_file(record, record.metadata).encode("utf-8")


@pytest.mark.slow
@pytest.mark.parametrize("name", REFERENCE_SAMPLE)
def test_each_layout_of_a_reference_cell_is_judged_as_its_twin(name: str, folder: Path) -> None:
    data = reference_twin_bytes(name)
    twin = checked(folder / f"{name}.csv", data, None, reference_rulebook())
    assert (twin.verdict.kind, twin.verdict.hazards) == REFERENCE_EXPECTED[name]
    record = read_twin(data, f"{name}.csv")
    for kind, layout in LAYOUTS.items():
        path = folder / f"{name}_{layout.profile.removesuffix('.toml')}{suffix(layout)}"
        got = checked(path, layout.write(record), shipped_profile(layout.profile), reference_rulebook())
        assert_judged_alike(got, twin, f"{kind} of reference cell {name}")


# ---------------------------------------------------------------- daylight-saving changes

# Directive 2000/84/EC (summer-time arrangements in the EU), Articles 2 and 3: summer time
# begins at 01:00 UTC on the last Sunday of March and ends at 01:00 UTC on the last Sunday of
# October; the IANA tz database's Europe/Berlin follows it (UTC+1 in winter, UTC+2 in summer).


def last_sunday(year: int, month: int) -> int:
    days = calendar.monthrange(year, month)[1]
    return max(d for d in range(days - 6, days + 1) if calendar.weekday(year, month, d) == calendar.SUNDAY)


def eu_change(year: int, month: int) -> dt.datetime:
    return dt.datetime(year, month, last_sunday(year, month), 1, 0, tzinfo=dt.UTC)


AUTUMN_2026 = eu_change(2026, 10)
SPRING_2026 = eu_change(2026, 3)


def test_the_changes_used_here_are_those_of_the_zone_database() -> None:
    assert (AUTUMN_2026.day, SPRING_2026.day) == (25, 29)
    second = dt.timedelta(seconds=1)
    for change, before, after in ((AUTUMN_2026, 2, 1), (SPRING_2026, 1, 2)):
        assert (change - second).astimezone(BERLIN).utcoffset() == dt.timedelta(hours=before)
        assert change.astimezone(BERLIN).utcoffset() == dt.timedelta(hours=after)


DATE_TIME_WRITERS: dict[str, tuple[Callable[..., bytes], str]] = {
    "date-time text": (date_time_text, "datetime_mode_column.toml"),
    "ISO 8601 offsets": (iso_offset_text, "iso_offsets.toml"),
}


@pytest.mark.parametrize("kind", list(DATE_TIME_WRITERS))
def test_local_stamps_across_the_autumn_change_keep_the_twins_elapsed_time(kind: str, folder: Path) -> None:
    cell = DEMO_CELLS[1]
    record, twin = demo_twin(cell, folder)
    start = AUTUMN_2026 - dt.timedelta(hours=15)  # 12:00 local the day before; the record runs 27 h
    write, profile_file = DATE_TIME_WRITERS[kind]
    data = write(record, start=start)
    stamps = [line.split(";" if kind == "date-time text" else ",")[0] for line in data.decode().splitlines()]
    repeated = [s for s in stamps if s.startswith(("25.10.2026 02:", "2026-10-25T02:"))]
    # the hour from 02:00 to 03:00 is lived twice: once in summer time, once in winter time
    assert len(repeated) > 2 * 300, "10 s samples fill the repeated hour twice"
    if kind == "date-time text":
        assert len(set(repeated)) < len(repeated)  # the same wall-clock text on two rows
    else:
        assert {s[-6:] for s in repeated} == {"+02:00", "+01:00"}
    profile = shipped_profile(profile_file)
    trace = read_cycle_file(data, "autumn.csv", profile)
    np.testing.assert_allclose(elapsed(trace), elapsed(record), rtol=0, atol=1e-6)
    assert trace.metadata["started_at"] == start.isoformat()
    got = checked(folder / f"autumn_{profile_file}.csv", data, profile, shipped_rulebook())
    assert_judged_alike(got, twin, f"{kind} across the autumn change")


@pytest.mark.parametrize("kind", list(DATE_TIME_WRITERS))
def test_local_stamps_across_the_spring_change_keep_the_twins_elapsed_time(kind: str, folder: Path) -> None:
    cell = DEMO_NMC_CELLS[0]
    record, twin = demo_twin(cell, folder)
    start = SPRING_2026 - dt.timedelta(hours=14)  # 12:00 local the day before
    write, profile_file = DATE_TIME_WRITERS[kind]
    data = write(record, start=start)
    text = data.decode()
    # the hour from 02:00 to 03:00 does not exist that night: no stamp falls into it
    assert "29.03.2026 01:59:5" in text or "2026-03-29T01:59:5" in text
    assert "29.03.2026 02:" not in text and "2026-03-29T02:" not in text
    profile = shipped_profile(profile_file)
    trace = read_cycle_file(data, "spring.csv", profile)
    np.testing.assert_allclose(elapsed(trace), elapsed(record), rtol=0, atol=1e-6)
    got = checked(folder / f"spring_{profile_file}.csv", data, profile, shipped_rulebook())
    assert_judged_alike(got, twin, f"{kind} across the spring change")


WORKBOOK_DATE_TIME = """\
[file]
format = "workbook"

[workbook]
data_sheets = "Record*"
metadata_sheet = "Info"

[columns]
time = "Date and time"
voltage = "Voltage (V)"
current = "Current (A)"
temperature = "Temperature (°C)"
step = "Step"
cycle = "Cycle"

[time]
stamps = "date-time"
zone_metadata = "clock_zone"
"""


def test_a_workbook_of_date_time_cells_across_the_autumn_change_is_judged_as_its_twin(folder: Path) -> None:
    cell = _by_defect(DEMO_CELLS, "low_capacity")
    record, twin = demo_twin(cell, folder)
    data = workbook(record, rows_per_sheet=4000, time="date-time", start=AUTUMN_2026 - dt.timedelta(hours=15))
    profile = load_profile(WORKBOOK_DATE_TIME, "workbook_date_time.toml")
    trace = read_cycle_file(data, "autumn.xlsx", profile)
    # a date-time cell is a fraction of a day in a float64: exact to about a microsecond
    np.testing.assert_allclose(elapsed(trace), elapsed(record), rtol=0, atol=1e-3)
    got = checked(folder / "autumn_book.xlsx", data, profile, shipped_rulebook())
    assert_judged_alike(got, twin, "workbook of date-time cells across the autumn change")


PARQUET_DATE_TIME = """\
[file]
format = "parquet"

[columns]
time = "timestamp_utc"
voltage = "voltage"
current = "current"
temperature = "temperature"
step = "step_number"
cycle = "cycle_number"

[time]
stamps = "date-time"
"""


def test_a_parquet_file_of_utc_timestamps_is_judged_as_its_twin(folder: Path) -> None:
    cell = _by_defect(DEMO_NMC_CELLS, "internal_short")
    record, twin = demo_twin(cell, folder)
    data = parquet(record, time="date-time", start=AUTUMN_2026 - dt.timedelta(hours=15))
    profile = load_profile(PARQUET_DATE_TIME, "parquet_date_time.toml")
    trace = read_cycle_file(data, "utc.parquet", profile)
    np.testing.assert_allclose(elapsed(trace), elapsed(record), rtol=0, atol=1e-6)
    got = checked(folder / "utc.parquet", data, profile, shipped_rulebook())
    assert_judged_alike(got, twin, "Parquet of UTC timestamps")


@functools.cache
def short_record() -> Trace:
    """The first eight hours of the examples' record (30 s samples): a rest, a charge, a rest."""
    record = read_twin(example_files()[TWIN_EXAMPLE], TWIN_EXAMPLE)
    keep = np.asarray(record.time_s) < 8 * 3600.0
    return dataclasses.replace(
        record,
        time_s=record.time_s[keep],
        voltage_v=record.voltage_v[keep],
        current_a=record.current_a[keep],
        temperature_c=None if record.temperature_c is None else record.temperature_c[keep],
        step=None if record.step is None else record.step[keep],
        cycle=None if record.cycle is None else record.cycle[keep],
    )


def offset_text(minutes: int) -> str:
    sign = "-" if minutes < 0 else "+"
    hours, rest = divmod(abs(minutes), 60)
    return f"{sign}{hours:02d}:{rest:02d}"


@settings(max_examples=50, deadline=None)
@given(
    quarter_hours=st.integers(min_value=-12 * 4, max_value=14 * 4),  # -12:00 .. +14:00
    start=st.datetimes(
        min_value=dt.datetime(1980, 1, 1), max_value=dt.datetime(2090, 12, 31), timezones=st.just(dt.UTC)
    ),
)
def test_any_fixed_utc_offset_and_start_give_the_same_elapsed_time(quarter_hours: int, start: dt.datetime) -> None:
    record = short_record()
    zone = offset_text(15 * quarter_hours)
    data = date_time_text(record, start=start, zone=zone)
    assert f"# clock_zone: {zone}\n".encode() in data
    trace = read_cycle_file(data, "offset.csv", shipped_profile("datetime_mode_column.toml"))
    # stamps are written to the hundredth of a second, cut (not rounded): within 10 ms
    np.testing.assert_allclose(elapsed(trace), elapsed(record), rtol=0, atol=0.01 + 1e-9)


@settings(max_examples=50, deadline=None)
@given(
    year=st.integers(min_value=1997, max_value=2037),  # the EU's rule as it has stood since 1996
    month=st.sampled_from([3, 10]),
    lead_s=st.integers(min_value=3601, max_value=3 * 3600),
    centis=st.integers(min_value=0, max_value=99),
)
def test_any_start_before_a_daylight_saving_change_gives_the_same_elapsed_time(
    year: int, month: int, lead_s: int, centis: int
) -> None:
    # the record begins 1-3 h before the change and runs 8 h: in autumn it holds both passes
    # through the repeated hour, which the order of the rows tells apart
    start = eu_change(year, month) - dt.timedelta(seconds=lead_s, microseconds=10_000 * centis)
    record = short_record()
    for write, profile_file in DATE_TIME_WRITERS.values():
        trace = read_cycle_file(write(record, start=start), "dst.csv", shipped_profile(profile_file))
        np.testing.assert_allclose(elapsed(trace), elapsed(record), rtol=0, atol=0.01 + 1e-9)


# ----------------------------------------------------------------- located errors


def _rows(data: bytes) -> tuple[list[str], int]:
    """The file's lines, and the 0-based index of its header line."""
    lines = data.decode("utf-8").split("\n")
    header = next(k for k, line in enumerate(lines) if line.startswith("Date and time;"))
    return lines, header


def test_a_clock_that_jumps_back_is_a_located_error_that_says_so(tmp_path: Path) -> None:
    lines, header = _rows(date_time_text(short_record()))
    row = header + 200
    stamp, rest = lines[row].split(";", 1)
    earlier = lines[row - 3].split(";", 1)[0]
    lines[row] = f"{earlier};{rest}"
    with pytest.raises(InputError) as caught:
        checked(tmp_path / "back.csv", "\n".join(lines).encode(), shipped_profile("datetime_mode_column.toml"),
                shipped_rulebook())
    error = caught.value
    before = lines[row - 1].split(";", 1)[0]
    assert error.problem.startswith("the clock goes back ")
    assert error.problem.endswith(f", from {before} on line {row} to {earlier}")
    assert error.where is not None and (error.where.line, error.where.column) == (row + 1, 1)
    assert str(error).startswith(f"{tmp_path / 'back.csv'}, line {row + 1}, column 1: the clock goes back")
    assert stamp != earlier


def test_local_stamps_read_as_a_fixed_offset_across_autumn_go_back_and_say_why(tmp_path: Path) -> None:
    start = AUTUMN_2026 - dt.timedelta(hours=3)
    data = date_time_text(short_record(), start=start)
    # the file claims a clock on fixed +02:00, but it followed Europe/Berlin into winter time
    data = data.replace(b"# clock_zone: Europe/Berlin\n", b"# clock_zone: +02:00\n")
    with pytest.raises(InputError) as caught:
        checked(tmp_path / "fixed.csv", data, shipped_profile("datetime_mode_column.toml"), shipped_rulebook())
    error = caught.value
    lines, _ = _rows(data)
    assert error.where is not None and error.where.column == 1 and error.where.line is not None
    after, before = lines[error.where.line - 1].split(";")[0], lines[error.where.line - 2].split(";")[0]
    assert before.startswith("25.10.2026 02:59:") and after.startswith("25.10.2026 02:00:")
    assert error.problem.startswith("the clock goes back ")
    assert error.problem.endswith(f" min, from {before} on line {error.where.line - 1} to {after}")


def test_a_fixed_offset_from_the_files_metadata_that_goes_back_hints_at_a_zone_name(tmp_path: Path) -> None:
    data = date_time_text(short_record(), start=AUTUMN_2026 - dt.timedelta(hours=3))
    data = data.replace(b"# clock_zone: Europe/Berlin\n", b"# clock_zone: +02:00\n")
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, "fixed.csv", shipped_profile("datetime_mode_column.toml"))
    assert 'give its zone name (e.g. "Europe/Berlin")' in caught.value.hint


def test_a_mode_word_the_profile_does_not_list_names_the_word_and_its_place(tmp_path: Path) -> None:
    lines, header = _rows(date_time_text(short_record()))
    row = next(k for k in range(header + 1, len(lines)) if ";charge;" in lines[k])
    lines[row] = lines[row].replace(";charge;", ";unload;", 1)
    with pytest.raises(InputError) as caught:
        checked(tmp_path / "mode.csv", "\n".join(lines).encode(), shipped_profile("datetime_mode_column.toml"),
                shipped_rulebook())
    error = caught.value
    assert error.problem == "Mode is 'unload', not a mode the import profile lists"
    assert error.where is not None and (error.where.line, error.where.column) == (row + 1, 2)
    assert "'charge' (charge), 'discharge' (discharge), 'pause' (rest)" in error.hint


# ----------------------------------------------------------------- the cycler's counters


@pytest.mark.parametrize("cell", [DEMO_CELLS[0], _by_defect(DEMO_CELLS, "low_capacity")], ids=lambda c: c.cell_id)
def test_counters_three_percent_off_give_a_note_and_leave_the_verdict(cell: DemoCell, folder: Path) -> None:
    record, twin = demo_twin(cell, folder)
    profile = shipped_profile("datetime_mode_column.toml")
    data = date_time_text(record, counter_scale=1.03)
    trace = read_cycle_file(data, "counters.csv", profile)
    codes = [n.code for n in trace.notes]
    assert "capacity_counter_differs" in codes and "energy_counter_differs" in codes
    note = next(n for n in trace.notes if n.code == "capacity_counter_differs")
    assert note.blocks == ()
    assert "apart, more than the 1 % the import profile allows" in note.text
    got = checked(folder / f"counters_{cell.cell_id}.csv", data, profile, shipped_rulebook())
    assert (got.verdict.kind, got.verdict.hazards) == (twin.verdict.kind, twin.verdict.hazards)
    for name, value in twin.metrics.values.items():
        assert got.metrics.values[name] == pytest.approx(value, rel=REL, abs=ABS), name
    assert "capacity_counter_differs" in {n.code for n in got.notes}
    # within the profile's 1 %: no note
    close = read_cycle_file(date_time_text(record, counter_scale=1.005), "close.csv", profile)
    assert not [n for n in close.notes if n.code.endswith("_counter_differs")]


# ----------------------------------------------------------------- shipped examples


def test_every_layout_has_a_shipped_profile_and_example_that_name_each_other() -> None:
    for layout in LAYOUTS.values():
        text = (PROFILES / layout.profile).read_text(encoding="utf-8")
        assert f"docs/layouts/{layout.example}" in text, layout.profile
        assert (EXAMPLES / layout.example).is_file(), layout.example
    assert (EXAMPLES / TWIN_EXAMPLE).is_file()


def test_the_shipped_examples_are_what_the_generator_writes() -> None:
    fresh = example_files()
    assert sorted(fresh) == sorted(p.name for p in EXAMPLES.iterdir())
    for name, data in fresh.items():
        shipped = (EXAMPLES / name).read_bytes()
        assert len(shipped) < 300_000, f"{name} is to stay small"
        if name.endswith((".csv", ".tsv", ".md")):
            assert shipped == data, f"run: python -m pipeline.demo.layouts docs/layouts ({name})"
    # the workbook and the Parquet file carry their writers' versions: compared as read
    for layout in LAYOUTS.values():
        if layout.example.endswith((".xlsx", ".parquet")):
            profile = shipped_profile(layout.profile)
            shipped_trace = read_cycle_file((EXAMPLES / layout.example).read_bytes(), layout.example, profile)
            fresh_trace = read_cycle_file(fresh[layout.example], layout.example, profile)
            for field in ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle"):
                np.testing.assert_array_equal(getattr(shipped_trace, field), getattr(fresh_trace, field))
            assert dict(shipped_trace.metadata) == dict(fresh_trace.metadata)


def test_the_workbook_example_spans_sheets_that_repeat_the_header() -> None:
    from openpyxl import load_workbook

    book = load_workbook(EXAMPLES / "workbook_sheets.xlsx", read_only=True)
    try:
        names = book.sheetnames
        assert names[0] == "Info" and names[1:] == [sheet_name(k) for k in range(len(names) - 1)]
        assert len(names) >= 3
        headers = {tuple(next(book[n].iter_rows(max_row=1, values_only=True))) for n in names[1:]}
        assert headers == {("Test time (s)", "Voltage (V)", "Current (A)", "Temperature (°C)", "Step", "Cycle")}
        info = {row[0]: row[1] for row in book["Info"].iter_rows(values_only=True)}
        assert info["cell_id"] == "L01-001" and info["lot"] == "DEMO-LOT-01"
    finally:
        book.close()


@pytest.mark.parametrize("kind", list(LAYOUTS))
def test_each_shipped_example_reads_with_its_shipped_profile_and_is_judged_as_its_twin(kind: str) -> None:
    layout = LAYOUTS[kind]
    twin_path = EXAMPLES / TWIN_EXAMPLE
    twin = check_file(twin_path, shipped_rulebook(), None, analysed_at=ANALYSED_AT, certificate=False)
    got = check_file(
        EXAMPLES / layout.example,
        shipped_rulebook(),
        None,
        analysed_at=ANALYSED_AT,
        profile=shipped_profile(layout.profile),
        certificate=False,
    )
    assert twin.result is not None and got.error is None and got.result is not None
    assert twin.result.verdict.kind.value == "pass"
    assert_judged_alike(got.result, twin.result, f"docs/layouts/{layout.example}")


def test_the_text_examples_do_not_read_as_cycle_file_v1() -> None:
    # without their profile the layouts are refused, never judged as something else
    for layout in LAYOUTS.values():
        outcome = check_file(EXAMPLES / layout.example, shipped_rulebook(), None, analysed_at=ANALYSED_AT,
                             certificate=False)
        assert outcome.result is None and isinstance(outcome.error, InputError), layout.example


# ----------------------------------------------------------------- a station


def assert_fields_alike(got: dict[str, object], twin: dict[str, object], where: str) -> None:
    """The same keys and values, floats within the module's tolerance."""
    assert set(got) == set(twin), where
    for name, value in twin.items():
        if isinstance(value, float):
            assert got[name] == pytest.approx(value, rel=REL, abs=ABS), f"{where}: {name}"
        else:
            assert got[name] == value, f"{where}: {name}"


STATION_GLOBS = {  # layout -> the glob a station picks its files up by
    "date-time text": "*_clock.csv",
    "ISO 8601 offsets": "*_iso.csv",
    "step time": "*.tsv",
    "workbook": "*.xlsx",
    "Parquet": "*.parquet",
}


@pytest.mark.slow
def test_a_station_picks_each_layout_by_its_glob_judges_it_as_its_twin_and_keeps_its_bytes(
    tmp_path: Path,
) -> None:
    import shutil

    from tests.station_kit import (
        check_invariants,
        drop,
        make_station,
        running,
        settled,
        station_toml,
        wait_until,
    )

    assert set(STATION_GLOBS) == set(LAYOUTS)
    globs = "".join(
        f'[profile.p{k}]\nglob = "{STATION_GLOBS[kind]}"\nfile = "{PROFILES / layout.profile}"\n\n'
        for k, (kind, layout) in enumerate(LAYOUTS.items())
    )
    s = make_station(tmp_path / "st", station_toml(extra=globs))
    shutil.copy(RULES_DIR / "lfp_graphite.toml", s.rules_dir / "lfp_graphite.toml")
    # one demo-lot cell in its version 1 file and in each layout, each under a cell id of its own
    cell = DEMO_CELLS[0]
    data = demo_file_bytes(cell)
    record = read_twin(data, cell.file_name)
    files = {cell.file_name: data}
    cells = {cell.cell_id: cell.file_name}
    for k, (kind, layout) in enumerate(LAYOUTS.items()):
        cell_id = f"{cell.cell_id}-{k + 1}"
        name = f"{cell_id}{STATION_GLOBS[kind].removeprefix('*')}"
        renamed = dataclasses.replace(record, metadata={**record.metadata, "cell_id": cell_id})
        files[name] = layout.write(renamed)
        cells[cell_id] = name
    with running(s):
        for name, written in files.items():
            drop(s.inboxes[0].folder, name, written)
        wait_until(lambda: settled(s, len(files)), what="six files judged")
    check_invariants(s, set(files))
    assert not [p for p in s.quarantine.iterdir() if p.is_file()], "nothing quarantined"
    results = {
        cell_id: json.loads((s.results / cell.lot / f"{cell_id}.json").read_text(encoding="utf-8"))
        for cell_id in cells
    }
    twin = results.pop(cell.cell_id)
    assert twin["verdict"] == expected_verdict(cell)
    for cell_id, doc in results.items():
        where = f"{cells[cell_id]} ({cell_id})"
        assert doc["verdict"] == twin["verdict"], where
        assert len(doc["checks"]) == len(twin["checks"]), where
        for check, twin_check in zip(doc["checks"], twin["checks"], strict=True):
            assert_fields_alike(check, twin_check, f"{where}: check {twin_check['id']}")
        assert_fields_alike(doc["metrics"], twin["metrics"], f"{where}: metrics")
    for name, written in files.items():
        (archived,) = [p for p in s.archive.rglob(f"*_{name}") if p.is_file()]
        assert hashlib.sha256(archived.read_bytes()).hexdigest() == hashlib.sha256(written).hexdigest(), name
