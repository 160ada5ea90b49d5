"""Reading cycle files and import profiles: good layouts read alike, bad ones give located errors.

One bad file per error lives in data/traces/bad/ beside its .expected message.
"""

from __future__ import annotations

import contextlib
import gzip
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.acceptance.rules import CellType
from pipeline.errors import InputError, ProfileError
from pipeline.model import AccuracyClass, SourceRef, Trace
from pipeline.read.accuracy import ACCURACY_KEYS
from pipeline.read.cyclefile import read_cycle_file
from pipeline.read.profile import DEFAULT_PROFILE, Profile, load_profile
from pipeline.read.profile_keys import PROFILE_KEYS, V1_COLUMNS, describe_profile_keys
from pipeline.read.validate import validate_trace

HERE = Path(__file__).resolve().parent
TRACES = HERE / "data" / "traces"
PROFILES = HERE.parent / "rules" / "profiles"
BAD_PROFILES = HERE / "data" / "profiles" / "bad"
# Invented cell type of the test files; plausibility bounds as a rule set would give them.
CELL_TYPES = {"DEMO-LFP-20A": CellType("DEMO-LFP-20A", 20.0, -0.1, 4.5)}
META = {"cell_id": "CELL-0012", "lot": "LOT-A7", "cell_type": "DEMO-LFP-20A"}


def make_csv(
    rows: list[list[object]],
    columns: tuple[str, ...] = ("time_s", "voltage_V", "current_A"),
    metadata: dict[str, str] | None = None,
    *,
    delimiter: str = ",",
    decimal: str = ".",
    prefix: str = "#",
    banner: tuple[str, ...] = (),
    eol: str = "\n",
) -> str:
    """A cycle file's text: banner lines, '<prefix> key: value' lines, header, rows."""
    meta = META if metadata is None else metadata

    def cell(value: object) -> str:
        if isinstance(value, float):
            return "" if math.isnan(value) else repr(value).replace(".", decimal)
        return str(value)

    lines = [*banner, *(f"{prefix} {k}: {v}" for k, v in meta.items()), delimiter.join(columns)]
    lines += [delimiter.join(cell(v) for v in row) for row in rows]
    return eol.join(lines) + eol


def read_profile(path: Path) -> Profile:
    return load_profile(path.read_text(encoding="utf-8"), path.name)


def basic_rows(n: int = 12) -> list[list[object]]:
    return [[60.0 * k, 3.2 + 0.01 * k, 10.0 if k < n // 2 else -10.0] for k in range(n)]


def same_numbers(a: Trace, b: Trace, atol: float = 1e-9) -> None:
    for name in ("time_s", "voltage_v", "current_a", "temperature_c"):
        left, right = getattr(a, name), getattr(b, name)
        assert (left is None) == (right is None), name
        if left is not None:
            np.testing.assert_allclose(left, right, rtol=1e-9, atol=atol, err_msg=name)


# ---------------------------------------------------------------- bad files, one per error


def _bad_cases() -> list[Path]:
    return sorted(
        p for p in (TRACES / "bad").iterdir() if not p.name.endswith((".expected", ".profile.toml"))
    )


@pytest.mark.parametrize("path", _bad_cases(), ids=lambda p: p.name)
def test_bad_cycle_file_gives_its_located_message(path: Path) -> None:
    expected = path.with_name(path.name + ".expected").read_text(encoding="utf-8").rstrip("\n")
    sidecar = path.with_name(path.name + ".profile.toml")
    profile = read_profile(sidecar) if sidecar.exists() else None
    with pytest.raises(InputError) as caught:
        trace = read_cycle_file(path.read_bytes(), "incoming/" + path.name, profile)
        validate_trace(trace, CELL_TYPES[trace.cell_type])
    assert str(caught.value) == expected


def test_every_bad_file_has_its_expected_message() -> None:
    for path in _bad_cases():
        assert path.with_name(path.name + ".expected").exists(), path.name


@pytest.mark.parametrize("path", sorted(BAD_PROFILES.glob("*.toml")), ids=lambda p: p.name)
def test_bad_profile_gives_its_located_message(path: Path) -> None:
    expected = path.with_name(path.name + ".expected").read_text(encoding="utf-8").rstrip("\n")
    with pytest.raises(ProfileError) as caught:
        load_profile(path.read_text(encoding="utf-8"), "profiles/" + path.name)
    assert str(caught.value) == expected


# ---------------------------------------------------------------- good files read alike

GOOD = {
    "v1_basic.csv": None,
    "v1_basic.csv.gz": None,
    "v1_bom_crlf.csv": None,
    "v1_reordered_extra_columns.csv": None,
    "LOT-A7_CELL-0012.csv": "semicolon_decimal_comma.toml",
    "tab_log_cell-0012.tsv": "tab_separated_ms.toml",
}


@pytest.mark.parametrize("file_name", GOOD, ids=str)
def test_good_layouts_read_to_the_same_trace(file_name: str) -> None:
    reference = read_cycle_file((TRACES / "good" / "v1_basic.csv").read_bytes(), "v1_basic.csv")
    profile_file = GOOD[file_name]
    profile = read_profile(PROFILES / profile_file) if profile_file else None
    trace = read_cycle_file((TRACES / "good" / file_name).read_bytes(), file_name, profile)
    same_numbers(trace, reference, atol=1e-6)  # hours written with 10 decimals: 0.4 us
    assert len(trace) == 24
    assert (trace.cell_id, trace.lot, trace.cell_type) == ("CELL-0012", "LOT-A7", "DEMO-LFP-20A")
    if trace.step is not None:
        np.testing.assert_array_equal(trace.step, reference.step)
    assert validate_trace(trace, CELL_TYPES[trace.cell_type]) == ()


def test_v1_file_gives_units_metadata_and_first_line() -> None:
    trace = read_cycle_file((TRACES / "good" / "v1_basic.csv").read_bytes(), "v1_basic.csv")
    assert dict(trace.metadata) == {
        "cell_id": "CELL-0012",
        "lot": "LOT-A7",
        "cell_type": "DEMO-LFP-20A",
        "channel": "3",
        "station": "pilot line 1",
        "started_at": "2026-11-30T08:00:00+00:00",
        "fixture": "F-2",  # not a v1 key: kept, in order
    }
    assert list(trace.metadata) == [
        "cell_id",
        "lot",
        "cell_type",
        "channel",
        "station",
        "started_at",
        "fixture",
    ]
    assert trace.first_data_line == 9  # seven metadata lines and the header
    assert trace.line_of(2) == 11
    assert trace.time_s[:3].tolist() == [0.0, 60.0, 120.0]
    assert trace.current_a[2] == 10.0  # charge is positive
    assert trace.step is not None and trace.step.dtype == np.int64
    assert trace.cycle is not None and trace.cycle.tolist() == [1] * 24


def test_profile_reads_metadata_from_the_file_name_and_its_defaults() -> None:
    profile = read_profile(PROFILES / "semicolon_decimal_comma.toml")
    data = (TRACES / "good" / "LOT-A7_CELL-0012.csv").read_bytes()
    trace = read_cycle_file(data, "incoming/LOT-A7_CELL-0012.csv", profile)
    # the file's own lines first, then the file name, then the profile's fixed values
    assert list(trace.metadata.items()) == [
        ("channel", "3"),
        ("started_at", "2026-11-30T08:00:00+00:00"),
        ("fixture", "F-2"),
        ("lot", "LOT-A7"),
        ("cell_id", "CELL-0012"),
        ("cell_type", "DEMO-LFP-20A"),
        ("station", "pilot line 1"),
    ]
    assert trace.first_data_line == 7  # two banner lines, three metadata lines, header


def test_metadata_in_the_file_wins_over_profile_defaults() -> None:
    profile = load_profile('[metadata]\ncell_type = "OTHER"\nstation = "S9"\n', "p.toml")
    trace = read_cycle_file(make_csv(basic_rows()).encode(), "c.csv", profile)
    assert trace.cell_type == "DEMO-LFP-20A"
    assert trace.metadata["station"] == "S9"


def test_gzip_round_trip_gives_the_same_trace() -> None:
    text = make_csv(basic_rows(), ("time_s", "voltage_V", "current_A"))
    plain = read_cycle_file(text.encode(), "c.csv")
    packed = read_cycle_file(gzip.compress(text.encode()), "c.csv")  # found by its magic bytes
    same_numbers(plain, packed)
    assert dict(plain.metadata) == dict(packed.metadata)
    assert plain.first_data_line == packed.first_data_line


def test_gzip_with_two_members_reads_as_one_file() -> None:
    text = make_csv(basic_rows()).encode()
    half = text.index(b"\n600.0")
    data = gzip.compress(text[:half]) + gzip.compress(text[half:])
    assert len(read_cycle_file(data, "c.csv.gz")) == 12


def test_gzip_bomb_is_refused_at_the_cap() -> None:
    data = gzip.compress(make_csv(basic_rows()).encode() + b"0" * 100_000)
    with pytest.raises(InputError) as caught:
        read_cycle_file(data, "c.csv.gz", max_uncompressed_bytes=2**16)
    assert str(caught.value) == (
        "c.csv.gz: the file holds more than 65536 bytes of text, the most formgate reads.\n"
        "  Check that the file is one cell's record."
    )


def test_plain_file_above_the_cap_is_refused() -> None:
    with pytest.raises(InputError, match="more than 100 bytes of text"):
        read_cycle_file(make_csv(basic_rows()).encode(), "c.csv", max_uncompressed_bytes=100)


def test_byte_order_mark_and_windows_line_ends_are_read() -> None:
    text = "\ufeff" + make_csv(basic_rows(), eol="\r\n")
    trace = read_cycle_file(text.encode(), "c.csv")
    assert trace.cell_id == "CELL-0012"
    assert trace.first_data_line == 5


def test_latin1_text_through_a_profile() -> None:
    profile = load_profile('[file]\nencoding = "latin-1"\n', "p.toml")
    text = make_csv(basic_rows(), metadata={**META, "operator": "Zoë Müller-Ørsted"})
    trace = read_cycle_file(text.encode("latin-1"), "c.csv", profile)
    assert trace.metadata["operator"] == "Zoë Müller-Ørsted"


def test_decimal_comma_and_semicolons_through_a_profile() -> None:
    profile = load_profile('[file]\ndelimiter = "semicolon"\ndecimal = "comma"\n', "p.toml")
    text = make_csv(basic_rows(), delimiter=";", decimal=",")
    assert "3,21" in text
    trace = read_cycle_file(text.encode(), "c.csv", profile)
    assert trace.voltage_v[1] == pytest.approx(3.21)


@pytest.mark.parametrize(
    ("units", "factor_t", "factor_v", "factor_i"),
    [
        ('time = "ms"', 1000.0, 1.0, 1.0),
        ('time = "min"', 1 / 60, 1.0, 1.0),
        ('time = "h"', 1 / 3600, 1.0, 1.0),
        ('voltage = "mV"', 1.0, 1000.0, 1.0),
        ('current = "mA"', 1.0, 1.0, 1000.0),
        ('current = "mA"\nvoltage = "mV"\ntime = "h"', 1 / 3600, 1000.0, 1000.0),
    ],
)
def test_units_are_converted_to_seconds_volts_amperes(
    units: str, factor_t: float, factor_v: float, factor_i: float
) -> None:
    rows = basic_rows()
    scaled = [[t * factor_t, v * factor_v, i * factor_i] for t, v, i in rows]
    profile = load_profile(f"[units]\n{units}\n", "p.toml")
    trace = read_cycle_file(make_csv(scaled).encode(), "c.csv", profile)
    reference = read_cycle_file(make_csv(rows).encode(), "c.csv")
    same_numbers(trace, reference)


def test_discharge_positive_profile_flips_the_sign() -> None:
    profile = load_profile('[units]\ncurrent_sign = "discharge positive"\n', "p.toml")
    rows = basic_rows()
    flipped = [[t, v, -i] for t, v, i in rows]
    trace = read_cycle_file(make_csv(flipped).encode(), "c.csv", profile)
    assert trace.current_a.tolist() == [row[2] for row in rows]


def test_empty_fields_become_nan_for_validation_to_judge() -> None:
    rows = basic_rows(20)
    rows[4][1] = float("nan")
    trace = read_cycle_file(
        make_csv(
            [[*r, 25.0 if k % 2 else float("nan")] for k, r in enumerate(rows)],
            ("time_s", "voltage_V", "current_A", "temperature_C"),
        ).encode(),
        "c.csv",
    )
    assert math.isnan(trace.voltage_v[4])
    assert trace.temperature_c is not None and np.isnan(trace.temperature_c).sum() == 10


def test_an_empty_field_leaves_every_other_number_as_read_without_it() -> None:
    # rows are parsed without pandas' NA filter first, and again with it when a field is empty
    rows = [[0.1 * k, 3.2 + 1e-5 * k, 10.0 / 3.0 * (1 if k < 40 else -1), 25.0 + 0.01 * k] for k in range(80)]
    columns = ("time_s", "voltage_V", "current_A", "temperature_C")
    whole = read_cycle_file(make_csv(rows, columns).encode(), "c.csv")
    rows[7][2] = float("nan")
    holed = read_cycle_file(make_csv(rows, columns).encode(), "c.csv")
    assert math.isnan(holed.current_a[7])
    others = np.arange(80) != 7
    assert holed.current_a[others].tobytes() == whole.current_a[others].tobytes()
    for name in ("time_s", "voltage_v", "temperature_c"):
        assert getattr(holed, name).tobytes() == getattr(whole, name).tobytes()
    # the layout is now parsed with the NA filter first in this process: the same numbers
    from pipeline.read import cyclenumbers

    assert any(layout[2:] == columns for layout in cyclenumbers._LAYOUTS_WITH_EMPTY_FIELDS)
    again = read_cycle_file(make_csv(rows[:7] + rows[8:], columns).encode(), "c.csv")
    kept = read_cycle_file(make_csv(rows[:7] + rows[8:], columns).encode(), "d.csv")
    for name in ("time_s", "voltage_v", "current_a", "temperature_c"):
        assert getattr(again, name).tobytes() == getattr(whole, name)[others].tobytes()
        assert getattr(kept, name).tobytes() == getattr(again, name).tobytes()


def test_optional_columns_are_none_when_absent() -> None:
    trace = read_cycle_file(make_csv(basic_rows()).encode(), "c.csv")
    assert (trace.temperature_c, trace.step, trace.cycle) == (None, None, None)


def test_trailing_blank_lines_and_a_missing_final_newline_are_fine() -> None:
    text = make_csv(basic_rows())
    assert len(read_cycle_file((text + "\n\n  \n").encode(), "c.csv")) == 12
    assert len(read_cycle_file(text.rstrip("\n").encode(), "c.csv")) == 12


def test_comment_lines_without_a_colon_are_not_metadata() -> None:
    text = make_csv(basic_rows(), metadata={**META}).replace(
        "# lot", "# exported by an invented tool\n# lot"
    )
    trace = read_cycle_file(text.encode(), "c.csv")
    assert list(trace.metadata) == ["cell_id", "lot", "cell_type"]
    assert trace.first_data_line == 6


def test_skip_lines_and_another_metadata_prefix() -> None:
    profile = load_profile('[file]\nskip_lines = 2\nmetadata_prefix = "//"\n', "p.toml")
    text = make_csv(basic_rows(), prefix="//", banner=("BANNER A", "time_s,banner"))
    trace = read_cycle_file(text.encode(), "c.csv", profile)
    assert trace.first_data_line == 7


def test_a_huge_integer_is_still_a_number() -> None:
    rows: list[list[object]] = [[k, 3.2, 1.0] for k in range(12)]
    rows[0][0] = "-99999999999999999999999"  # pandas keeps this as text; it is a number
    trace = read_cycle_file(make_csv(rows).encode(), "c.csv")
    assert trace.time_s[0] == pytest.approx(-1e23)


def test_a_repeated_unknown_metadata_key_keeps_its_first_value() -> None:
    text = make_csv(basic_rows(), metadata={**META}).replace(
        "# lot", "# fixture: F-1\n# fixture: F-2\n# lot"
    )
    assert read_cycle_file(text.encode(), "c.csv").metadata["fixture"] == "F-1"


def test_an_optional_group_of_the_file_name_pattern_may_be_absent() -> None:
    profile = load_profile(
        "[file]\nfile_name_pattern = "
        "'^(?P<lot>[^_]+)_(?P<cell_id>[^_.]+)(?:_ch(?P<channel>[0-9]+))?'",
        "p.toml",
    )
    text = make_csv(basic_rows(), metadata={"cell_type": "DEMO-LFP-20A"})
    without = read_cycle_file(text.encode(), "LOT-A7_CELL-1.csv", profile)
    assert "channel" not in without.metadata
    assert (
        read_cycle_file(text.encode(), "LOT-A7_CELL-1_ch12.csv", profile).metadata["channel"]
        == "12"
    )


def test_a_header_field_too_long_for_the_csv_module_is_still_split_and_refused() -> None:
    columns = ("time_s", "voltage_V", "current_A", '"' + "x" * 200_000 + '"')
    rows = [[*row, "1"] for row in basic_rows()]
    with pytest.raises(InputError) as caught:
        read_cycle_file(make_csv(rows, columns).encode(), "c.csv")
    assert caught.value.where == SourceRef("c.csv", 4, 4)
    assert "the name of column 4" in caught.value.problem
    assert "200,002 bytes long" in caught.value.problem


def test_a_text_column_of_numbers_with_empty_fields_and_huge_integers() -> None:
    rows: list[list[object]] = [[k, 3.2, 1.0] for k in range(12)]
    rows[0][0] = "-99999999999999999999999"
    rows[1][0] = ""
    trace = read_cycle_file(make_csv(rows).encode(), "c.csv")
    assert trace.time_s[0] == pytest.approx(-1e23) and math.isnan(trace.time_s[1])


def test_an_integer_too_large_for_a_float_is_refused() -> None:
    rows: list[list[object]] = [[k, 3.2, 1.0] for k in range(12)]
    rows[3][0] = "9" * 400
    with pytest.raises(InputError) as caught:
        read_cycle_file(make_csv(rows).encode(), "c.csv")
    assert str(caught.value) == (
        "c.csv, line 8, column 1: time_s is inf, not a finite number.\n"
        "  Fix the value, or leave it empty if it is missing."
    )


def test_a_number_that_overflows_on_unit_conversion_is_refused() -> None:
    profile = load_profile('[units]\ntime = "h"\n', "p.toml")
    rows: list[list[object]] = [[k, 3.2, 1.0] for k in range(12)]
    rows[2][0] = "1e306"
    with pytest.raises(InputError) as caught:
        read_cycle_file(make_csv(rows).encode(), "c.csv", profile)
    assert str(caught.value) == (
        "c.csv, line 7, column 1: time_s is 1e+306, too large to convert.\n"
        "  Fix the value, or leave it empty if it is missing."
    )


@pytest.mark.parametrize(
    "text",
    ['file = {delimter = "tab"}\n', 'file.delimter = "tab"\n'],
    ids=["inline table", "dotted key"],
)
def test_profile_errors_find_keys_written_inline_or_dotted(text: str) -> None:
    with pytest.raises(ProfileError) as caught:
        load_profile('description = "x"\n' + text, "p.toml")
    assert str(caught.value) == (
        "p.toml, line 2: unknown key 'delimter' in [file].\n  Did you mean 'delimiter'?"
    )


def test_a_unit_value_far_from_any_is_not_guessed() -> None:
    with pytest.raises(ProfileError) as caught:
        load_profile('[units]\nvoltage = "kV"\n', "p.toml")
    assert str(caught.value) == (
        'p.toml, line 2: [units] voltage = "kV" is not one of "V", "mV".\n  Use one of "V", "mV".'
    )


# ---------------------------------------------------------------- profiles


def test_shipped_example_profiles_load() -> None:
    names = sorted(p.name for p in PROFILES.glob("*.toml"))
    assert names == ["datetime_mode_column.toml", "iso_offsets.toml", "parquet_columns.toml", "semicolon_decimal_comma.toml", "step_time.toml", "tab_separated_ms.toml", "workbook_sheets.toml"]
    first = read_profile(PROFILES / "semicolon_decimal_comma.toml")
    assert (first.delimiter, first.decimal, first.encoding) == (";", ",", "latin-1")
    assert (first.time_unit, first.voltage_unit, first.current_unit) == ("h", "mV", "mA")
    assert first.current_sign == "discharge positive"
    assert first.file_name_pattern is not None
    second = read_profile(PROFILES / "tab_separated_ms.toml")
    assert (second.delimiter, second.time_unit, second.metadata_prefix) == ("\t", "ms", "//")


def test_empty_profile_means_cycle_file_v1() -> None:
    profile = load_profile("", "empty.toml")
    assert profile.columns == DEFAULT_PROFILE.columns == V1_COLUMNS
    assert profile.is_v1 is False and DEFAULT_PROFILE.is_v1 is True
    fields = (
        "delimiter",
        "decimal",
        "encoding",
        "time_unit",
        "voltage_unit",
        "current_unit",
        "current_sign",
        "skip_lines",
        "metadata_prefix",
        "file_name_pattern",
    )
    for name in fields:
        assert getattr(profile, name) == getattr(DEFAULT_PROFILE, name), name


def test_every_documented_key_is_accepted() -> None:
    values = {
        ("", "description"): '"all keys"',
        ("file", "delimiter"): '"tab"',
        ("file", "decimal"): '"comma"',
        ("file", "encoding"): '"latin-1"',
        ("file", "skip_lines"): "1",
        ("file", "metadata_prefix"): '"//"',
        ("file", "file_name_pattern"): "'(?P<lot>.+)'",
        ("units", "time"): '"h"',
        ("units", "voltage"): '"mV"',
        ("units", "current"): '"mA"',
        ("units", "current_sign"): '"from mode"',
        ("units", "capacity"): '"mAh"',
        ("units", "energy"): '"J"',
        ("file", "format"): '"workbook"',
        ("time", "stamps"): '"date-time"',
        ("time", "date_format"): '"%d.%m.%Y %H:%M:%S"',
        ("time", "zone"): '"Europe/Berlin"',
        ("time", "zone_metadata"): '"clock zone"',
        ("mode", "charge"): '["C", "CV"]',
        ("mode", "discharge"): '["D"]',
        ("mode", "rest"): '["R"]',
        ("counters", "compare"): "false",
        ("counters", "tolerance_percent"): "2.5",
        ("metadata", "*"): '"F-1"',
        **{("accuracy", k.name): f"{i + 1}" for i, k in enumerate(ACCURACY_KEYS)},
    }
    tables: dict[str, list[str]] = {}
    for key in PROFILE_KEYS:
        assert key.meaning and key.allowed and key.default, key
        tables.setdefault(key.table, []).append(key.key)
    text = ""
    for table, keys in tables.items():
        text += f"[{table}]\n" if table else ""
        for k in keys:
            value = values.get((table, k), f'"col {k}"')
            text += f"{'fixture' if k == '*' else k} = {value}\n"
    profile = load_profile(text, "all.toml")
    assert profile.description == "all keys"
    assert (profile.delimiter, profile.decimal, profile.skip_lines) == ("\t", ",", 1)
    assert profile.columns["cycle"] == "col cycle"
    assert profile.metadata["fixture"] == "F-1"
    assert profile.current_sign == "from mode"
    assert profile.modes == {"C": "charge", "CV": "charge", "D": "discharge", "R": "rest"}
    assert (profile.time_stamps, profile.zone, profile.zone_metadata) == (
        "date-time", "Europe/Berlin", "clock zone"
    )
    assert (profile.file_format, profile.data_sheets, profile.metadata_sheet) == (
        "workbook", "col data_sheets", "col metadata_sheet"
    )
    assert (profile.compare_counters, profile.counter_tolerance_percent) == (False, 2.5)
    assert (profile.columns["capacity"], profile.capacity_unit, profile.energy_unit) == (
        "col capacity", "mAh", "J"
    )
    assert profile.accuracy == AccuracyClass(1, 2, 3, 4, 5, 6, 7, "import profile all.toml")


def test_profile_key_table_documents_every_key() -> None:
    table = describe_profile_keys()
    assert table.count("\n") == len(PROFILE_KEYS) + 2
    for key in PROFILE_KEYS:
        assert (f"`{key.key}`" if key.key != "*" else "any metadata name") in table
    assert "| [units] | `current_sign` | charge positive, discharge positive, from mode |" in table


# ---------------------------------------------------------------- properties

finite = st.floats(allow_nan=False, allow_infinity=False, width=64)


@st.composite
def small_traces(draw: st.DrawFn) -> dict[str, list[float]]:
    n = draw(st.integers(1, 25))
    steps = draw(st.lists(st.floats(0.001, 5000), min_size=n, max_size=n))
    time_s = [float(x) for x in np.cumsum(steps) - steps[0]]
    volts = draw(st.lists(st.floats(-0.1, 4.5), min_size=n, max_size=n))
    amps = draw(st.lists(st.floats(-200, 200), min_size=n, max_size=n))
    temps = draw(st.lists(st.floats(-20, 80), min_size=n, max_size=n))
    return {"t": time_s, "v": volts, "i": amps, "T": temps}


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    trace=small_traces(),
    delimiter=st.sampled_from(["comma", "semicolon", "tab"]),
    decimal=st.sampled_from(["point", "comma"]),
    encoding=st.sampled_from(["utf-8", "utf-8-sig", "latin-1"]),
    time_unit=st.sampled_from(["s", "ms", "min", "h"]),
    voltage_unit=st.sampled_from(["V", "mV"]),
    current_unit=st.sampled_from(["A", "mA"]),
    sign=st.sampled_from(["charge positive", "discharge positive"]),
    from_name=st.booleans(),
    skip=st.integers(0, 2),
)
def test_a_trace_written_in_any_profile_layout_reads_back_as_v1(
    trace: dict[str, list[float]],
    delimiter: str,
    decimal: str,
    encoding: str,
    time_unit: str,
    voltage_unit: str,
    current_unit: str,
    sign: str,
    from_name: bool,
    skip: int,
) -> None:
    if delimiter == "comma" and decimal == "comma":
        decimal = "point"
    mark = {"comma": ",", "semicolon": ";", "tab": "\t"}[delimiter]
    dot = "." if decimal == "point" else ","
    rows_v1 = [list(r) for r in zip(trace["t"], trace["v"], trace["i"], trace["T"], strict=True)]
    columns = ("time_s", "voltage_V", "current_A", "temperature_C")
    v1 = read_cycle_file(make_csv(rows_v1, columns).encode(), "v1.csv")

    per_s = {"s": 1.0, "ms": 1000.0, "min": 1 / 60, "h": 1 / 3600}[time_unit]
    per_v = {"V": 1.0, "mV": 1000.0}[voltage_unit]
    per_a = {"A": 1.0, "mA": 1000.0}[current_unit] * (1 if sign == "charge positive" else -1)
    rows = [[t * per_s, v * per_v, i * per_a, temp] for t, v, i, temp in rows_v1]
    profile_text = (
        f'[file]\ndelimiter = "{delimiter}"\ndecimal = "{decimal}"\nencoding = "{encoding}"\n'
        f"skip_lines = {skip}\n"
        + ("file_name_pattern = '^(?P<lot>[^_]+)_(?P<cell_id>[^_.]+)'\n" if from_name else "")
        + '[columns]\ntime = "elapsed"\nvoltage = "U (V)"\ncurrent = "I"\n'
        + 'temperature = "T (°C)"\n'
        + f'[units]\ntime = "{time_unit}"\nvoltage = "{voltage_unit}"\n'
        + f'current = "{current_unit}"\ncurrent_sign = "{sign}"\n'
        + '[metadata]\ncell_type = "DEMO-LFP-20A"\n'
    )
    profile = load_profile(profile_text, "p.toml")
    meta = {} if from_name else {"lot": "LOT-A7", "cell_id": "CELL-0012"}
    text = make_csv(
        rows,
        ("elapsed", "U (V)", "I", "T (°C)"),
        meta,
        delimiter=mark,
        decimal=dot,
        banner=("x",) * skip,
    )
    data = text.encode("latin-1" if encoding == "latin-1" else "utf-8")
    if encoding == "utf-8-sig":
        data = b"\xef\xbb\xbf" + data
    other = read_cycle_file(data, "LOT-A7_CELL-0012.csv", profile)
    same_numbers(v1, other)
    assert {k: other.metadata[k] for k in META} == META


@settings(max_examples=300, deadline=None)
@given(data=st.binary(max_size=600), name=st.sampled_from(["c.csv", "c.csv.gz", "c.tsv"]))
def test_arbitrary_bytes_give_an_input_error_or_a_trace(data: bytes, name: str) -> None:
    for profile in (None, read_profile(PROFILES / "tab_separated_ms.toml")):
        with contextlib.suppress(InputError):
            read_cycle_file(data, name, profile)


@settings(max_examples=300, deadline=None)
@given(
    body=st.text(alphabet='0123456789.,;-+eE \t\n\r"#:xT\x00\x1c٣', max_size=400),
    header=st.sampled_from(
        [
            "time_s,voltage_V,current_A",
            "time_s,voltage_V,current_A,step",
            "step,current_A,time_s,voltage_V,temperature_C,cycle",
        ]
    ),
    tabs=st.booleans(),
)
def test_data_of_digits_and_separators_gives_an_input_error_or_a_trace(
    body: str, header: str, tabs: bool
) -> None:
    profile = read_profile(PROFILES / "tab_separated_ms.toml") if tabs else None
    if tabs:
        header = header.replace(",", "\t").replace("time_s", "t_ms").replace("voltage_V", "U_V")
        header = header.replace("current_A", "I_mA").replace("temperature_C", "T_degC")
    text = make_csv([], (header,), prefix="//" if tabs else "#") + body
    try:
        trace = read_cycle_file(text.encode(), "c.csv", profile)
    except InputError:
        return
    assert len(trace) == trace.time_s.size
    with contextlib.suppress(InputError):
        validate_trace(trace, CELL_TYPES["DEMO-LFP-20A"])


@settings(max_examples=300, deadline=None)
@given(
    file_name=st.sampled_from(sorted(GOOD)),
    edits=st.lists(
        st.tuples(
            st.integers(0, 10_000),
            st.sampled_from(["set", "insert", "delete"]),
            st.binary(min_size=1, max_size=3),
        ),
        min_size=1,
        max_size=4,
    ),
    cut=st.none() | st.integers(0, 2000),
)
def test_damaged_good_files_give_an_input_error_or_a_trace(
    file_name: str, edits: list[tuple[int, str, bytes]], cut: int | None
) -> None:
    data = bytearray((TRACES / "good" / file_name).read_bytes())
    if file_name.endswith(".gz"):
        data = bytearray(gzip.decompress(bytes(data)))
    for position, kind, payload in edits:
        at = position % (len(data) + 1)
        if kind == "set":
            data[at : at + len(payload)] = payload
        elif kind == "insert":
            data[at:at] = payload
        else:
            del data[at : at + len(payload)]
    blob = bytes(data[:cut] if cut is not None else data)
    if file_name.endswith(".gz"):
        blob = gzip.compress(blob)[: None if cut is None else cut]
    profile_file = GOOD[file_name]
    profile = read_profile(PROFILES / profile_file) if profile_file else None
    try:
        trace = read_cycle_file(blob, file_name, profile)
    except InputError:
        return
    with contextlib.suppress(InputError):
        validate_trace(trace, CELL_TYPES.get(trace.cell_type, CELL_TYPES["DEMO-LFP-20A"]))


@settings(max_examples=200, deadline=None)
@given(text=st.text(max_size=300))
def test_arbitrary_profile_text_gives_a_profile_error_or_a_profile(text: str) -> None:
    with contextlib.suppress(ProfileError):
        load_profile(text, "p.toml")


@settings(max_examples=200, deadline=None)
@given(
    key=st.sampled_from([(k.table, k.key) for k in PROFILE_KEYS]),
    value=st.one_of(
        st.integers(-3, 3),
        st.text(max_size=12),
        st.booleans(),
        st.floats(allow_nan=False, allow_infinity=False),
    ),
)
def test_any_value_under_any_key_gives_a_profile_error_or_a_profile(
    key: tuple[str, str], value: object
) -> None:
    table, name = key
    name = "cell_type" if name == "*" else name
    if isinstance(value, str):
        shown = '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    elif isinstance(value, bool):
        shown = str(value).lower()
    elif isinstance(value, float):
        shown = repr(value)
    else:
        shown = str(value)
    text = (f"[{table}]\n" if table else "") + f"{name} = {shown}\n"
    with contextlib.suppress(ProfileError):
        load_profile(text, "p.toml")


# ---------------------------------------------------------------- the three ways in agree
# An ASCII file is parsed from its own bytes; a UTF-8 file with other characters from its
# bytes after the decoded head; a file with CR line ends (or in Latin-1) from re-encoded text.


def _three_ways(text: str) -> list[bytes]:
    """The same cycle file as ASCII, as UTF-8 with a BOM and a non-ASCII line, with CR LF."""
    ascii_bytes = text.encode("ascii")
    utf8 = ("\ufeff# operator: Zoë Ørsted\n" + text).encode("utf-8")
    crlf = text.replace("\n", "\r\n").encode("ascii")
    return [ascii_bytes, utf8, crlf]


def _outcome(data: bytes) -> tuple[object, ...]:
    try:
        trace = read_cycle_file(data, "c.csv")
    except InputError as exc:
        return ("error", exc.problem, exc.where.line if exc.where else None,
                exc.where.column if exc.where else None)
    arrays = tuple(
        None if getattr(trace, n) is None else getattr(trace, n).tobytes()
        for n in ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle")
    )
    return ("trace", trace.cell_id, arrays)


@settings(max_examples=150, deadline=None)
@given(
    rows=st.lists(
        st.tuples(
            st.floats(0, 1e6, allow_nan=False),
            st.floats(0, 5, allow_nan=False) | st.just(math.nan),
            st.floats(-50, 50, allow_nan=False),
            st.integers(1, 40) | st.just(2.5),
        ),
        min_size=1,
        max_size=30,
    ),
    damage=st.sampled_from(["", "x", '"', "\n\n", ",,", "1e999"]),
    where=st.integers(0, 10_000),
    trailing=st.sampled_from(["", "\n", "\n\n", "\n \n"]),
)
def test_ascii_utf8_and_crlf_files_read_alike(
    rows: list[tuple[float, float, float, float]], damage: str, where: int, trailing: str
) -> None:
    text = make_csv([list(r) for r in rows], ("time_s", "voltage_V", "current_A", "step"))
    head_end = text.index("time_s")
    body = text[head_end:]
    at = body.index("\n") + 1 + where % max(1, len(body) - body.index("\n"))
    text = text[:head_end] + body[:at] + damage + body[at:]
    text = text.rstrip("\n") + trailing
    plain, utf8, crlf = (_outcome(data) for data in _three_ways(text))
    assert crlf == plain
    if plain[0] == "error":  # the UTF-8 variant has one line more before the data
        line, column = plain[2], plain[3]
        assert utf8 == ("error", plain[1], None if line is None else line + 1, column)
    else:
        assert utf8 == plain


def test_a_head_longer_than_the_first_block_read_is_found() -> None:
    # about 200 kB of comment lines (no colon: comments, not metadata entries, of which a
    # head may hold only bounds.MAX_METADATA_ENTRIES)
    banner = tuple(f"# note {k} " + "x" * 90 for k in range(2_000))
    text = make_csv(basic_rows(), banner=banner)
    trace = read_cycle_file(text.encode("ascii"), "c.csv")
    assert trace.cell_id == "CELL-0012"
    assert trace.first_data_line == len(banner) + len(META) + 2
    assert len(trace) == 12


def test_step_numbers_beyond_what_a_float_holds_exactly_are_refused() -> None:
    rows = [[60.0 * k, 3.2, 1.0, 2**53 + 2 if k == 3 else 1] for k in range(6)]
    text = make_csv(rows, ("time_s", "voltage_V", "current_A", "step"))
    with pytest.raises(InputError, match="not a whole step number"):
        read_cycle_file(text.encode(), "c.csv")


def test_arrays_of_a_trace_are_read_only() -> None:
    rows = [[60.0 * k, 3.2, 1.0, 1, 1] for k in range(6)]
    trace = read_cycle_file(
        make_csv(rows, ("time_s", "voltage_V", "current_A", "step", "cycle")).encode(), "c.csv"
    )
    for name in ("time_s", "voltage_v", "current_a", "step", "cycle"):
        with pytest.raises(ValueError, match="read-only"):
            getattr(trace, name)[0] = 0


@pytest.mark.parametrize("chunk_fields", [None, 10])
def test_each_column_read_is_the_parsers_own_or_copied_once_when_joined(
    chunk_fields: int | None, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The Trace holds the very arrays the table's frame holds, each holding its memory alone:
    the parser's own when the rows came in one chunk (no copy at all), the chunks' joined into
    one when they came in many; no copy is made again on the way to the Trace."""
    from pipeline.model import owns_memory
    from pipeline.read import cyclenumbers
    from pipeline.read.convert import to_trace
    from pipeline.read.cyclefile import read_table

    if chunk_fields is not None:  # a few rows per chunk
        monkeypatch.setattr(cyclenumbers, "CHUNK_FIELDS", chunk_fields)
    rows = [[60.0 * k, 3.2 + 0.01 * k, 1.0, 25.0, 1 + k // 4, 1] for k in range(12)]
    columns = ("time_s", "voltage_V", "current_A", "temperature_C", "step", "cycle")
    table = read_table(make_csv(rows, columns).encode(), "c.csv")
    trace = to_trace(table, DEFAULT_PROFILE)
    for name, column in zip(
        ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle"), range(6), strict=True
    ):
        values = getattr(trace, name)
        assert owns_memory(values) and not values.flags.writeable
        assert np.shares_memory(values, table.frame[column].to_numpy())
    assert trace.voltage_v.tolist() == [3.2 + 0.01 * k for k in range(12)]


def test_an_array_over_memory_others_can_reach_is_copied_into_a_trace() -> None:
    from pipeline.model import frozen_array, owns_memory

    whole = np.arange(6.0)
    assert owns_memory(whole) and not owns_memory(whole[1:])
    shared = bytearray(np.arange(6.0).tobytes())  # memory the bytearray still writes to
    over = np.frombuffer(shared, dtype=np.float64)
    over.setflags(write=False)
    assert not owns_memory(over)
    kept = frozen_array(over)
    assert kept is not over and not np.shares_memory(kept, over)
