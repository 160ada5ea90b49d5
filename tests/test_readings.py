"""OCV reading files, the K-value and the demo aging tester.

The reader: good files of many cells read alike however they are stored (gzip, CRLF, a
byte-order mark, extra columns), every bad one gives an error naming the file, the line
and the column. The K-value: hand-computed cases, its sign, its time span, temperature
correction, file order, and its error bound on noisy readings. The demo: a slow
self-discharger stands out, and the OCV drop it writes is the one charge conservation asks.
"""

from __future__ import annotations

import datetime
import doctest
import gzip
import importlib
import random
from collections.abc import Sequence
from pathlib import Path

import pytest
import scipy.constants
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.demo import ocp
from pipeline.demo.aging import (
    AgingCell,
    aging_readings,
    demo_aging_lot,
)
from pipeline.errors import InputError
from pipeline.judge.kvalue import KValue, NotMade, group_by_cell, k_value
from pipeline.read.readings import Reading, looks_like_readings, read_readings

UTC = datetime.UTC
GOOD_CYCLE_FILES = Path(__file__).resolve().parent / "data" / "traces" / "good"

GOOD = """\
# kind: ocv readings
# tester: TST-OCV-2
# station: aging-room-b
# lot: DEMO-AGE-03
cell_id,time,ocv_V,acir_mOhm,temperature_C,cell_type
A-001,2026-03-02T08:00:00Z,3.6512,21.40,24.8,DEMO-NMC-5A
A-002,2026-03-02T08:00:04+00:00,3.6498,21.90,24.9,DEMO-NMC-5A
A-003,2026-03-02T09:00:08+01:00,3.6505,,25.1,DEMO-NMC-5A
A-001,2026-03-09T08:00:00Z,3.6470,21.50,25.3,DEMO-NMC-5A
A-002,2026-03-09T08:00:04Z,3.6452,22.00,,DEMO-NMC-5A
A-003,2026-03-09T08:00:08Z,3.6330,20.80,25.2,
"""


def read(text: str | bytes, name: str = "aging.csv") -> list[Reading]:
    data = text.encode("utf-8") if isinstance(text, str) else text
    return list(read_readings(data, name).readings)


def at(day: float, hour: int = 8) -> datetime.datetime:
    return datetime.datetime(2026, 3, 2, hour, tzinfo=UTC) + datetime.timedelta(days=day)


def reading(
    day: float, ocv_v: float, *, cell: str = "C1", temperature: float | None = None, line: int = 0
) -> Reading:
    return Reading(cell, "L1", None, at(day), ocv_v, None, temperature, line=line)


# ------------------------------------------------------------------------------- the reader


def test_a_good_file_of_many_cells_reads_every_reading_in_file_order() -> None:
    found = read_readings(GOOD.encode(), "aging.csv")
    assert found.source == "aging.csv"
    assert dict(found.metadata) == {
        "kind": "ocv readings",
        "tester": "TST-OCV-2",
        "station": "aging-room-b",
        "lot": "DEMO-AGE-03",
    }
    rows = found.readings
    assert [r.cell_id for r in rows] == ["A-001", "A-002", "A-003"] * 2
    assert [r.line for r in rows] == [6, 7, 8, 9, 10, 11]
    assert {r.lot for r in rows} == {"DEMO-AGE-03"}
    assert rows[0].ocv_v == 3.6512 and rows[0].acir_mohm == 21.4 and rows[0].temperature_c == 24.8
    assert rows[2].acir_mohm is None and rows[4].temperature_c is None
    assert rows[5].cell_type is None and rows[0].cell_type == "DEMO-NMC-5A"
    # 09:00:08+01:00 is the same instant as 08:00:08Z; every time is aware
    assert rows[2].at == datetime.datetime(2026, 3, 2, 8, 0, 8, tzinfo=UTC)
    assert all(r.at.utcoffset() is not None for r in rows)


def test_a_row_s_lot_and_cell_type_win_over_the_metadata() -> None:
    text = (
        "# lot: L-META\n# cell_type: T-META\n"
        "cell_id,lot,cell_type,time,ocv_V\n"
        "C1,L-ROW,T-ROW,2026-03-02T08:00:00Z,3.3\n"
        "C2,,,2026-03-02T08:00:00Z,3.3\n"
    )
    first, second = read(text)
    assert (first.lot, first.cell_type) == ("L-ROW", "T-ROW")
    assert (second.lot, second.cell_type) == ("L-META", "T-META")


def test_gzip_crlf_cr_and_a_byte_order_mark_read_the_same_readings_on_the_same_lines() -> None:
    plain = read(GOOD)
    assert read(gzip.compress(GOOD.encode()), "aging.csv.gz") == plain
    assert read(gzip.compress(GOOD.encode()), "aging.csv") == plain  # told by its magic bytes
    assert read(GOOD.replace("\n", "\r\n")) == plain
    assert read(GOOD.replace("\n", "\r")) == plain
    assert read(b"\xef\xbb\xbf" + GOOD.replace("\n", "\r\n").encode()) == plain


def test_extra_columns_are_kept_with_each_reading_and_blank_lines_are_skipped() -> None:
    text = (
        "# lot: L1\n\nchannel,cell_id,time,grade,ocv_V\n"
        '3-07,C1,2026-03-02T08:00:00Z,"A, first",3.30\n\n'
        "3-08,C2,2026-03-02T08:00:00Z,B,3.31\n\n"
    )
    found = read_readings(text.encode(), "x.csv")
    assert found.columns == ("channel", "cell_id", "time", "grade", "ocv_V")
    first, second = found.readings
    assert first.extra == (("channel", "3-07"), ("grade", "A, first"))
    assert second.extra == (("channel", "3-08"), ("grade", "B")) and second.line == 6


HEADER = "cell_id,time,ocv_V,acir_mOhm,temperature_C\n"
ROW = "C1,2026-03-02T08:00:00Z,3.65,21.0,25.0\n"


@pytest.mark.parametrize(
    ("text", "line", "column", "words"),
    [
        pytest.param(
            "# lot: L\ncell_id,when,voltage\nC1,x,3.6\n", 2, None,
            ["no column time, ocv_V", "found: cell_id, when, voltage"], id="missing-column",
        ),
        pytest.param("", None, None, ["the file is empty"], id="empty"),
        pytest.param(" \n\n", None, None, ["the file is empty"], id="blank"),
        pytest.param("# lot: L\n# tester: T\n", 2, None, ["no header row"], id="only-metadata"),
        pytest.param("# lot: L\n" + HEADER + "\n", 2, None, ["not followed by any readings"],
                     id="no-rows"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("3.65", "3.6x"), 3, 3,
                     ["ocv_V is '3.6x', not a number"], id="bad-number"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("21.0", "21,0"),
                     3, None, ["6 fields where the header has 5"], id="decimal-comma-splits-row"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("3.65", "nan"), 3, 3,
                     ["'nan', not a number"], id="nan"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("3.65", ""), 3, 3,
                     ["ocv_V is empty"], id="empty-ocv"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("2026-03-02T08:00:00Z", "yesterday"),
                     3, 2, ["'yesterday', not an ISO 8601 time"], id="bad-time"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("08:00:00Z", "08:00:00"), 3, 2,
                     ["has no UTC offset"], id="naive-time"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("C1", " "), 3, 1,
                     ["cell_id is empty"], id="empty-cell-id"),
        pytest.param("# lot: L\n" + HEADER + ROW + "C2,2026-03-02T08:00:00Z,3.6\n", 4, None,
                     ["3 fields where the header has 5"], id="short-row"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("3.65", "7.2"), 3, 3,
                     ["7.2 V, outside the plausible range -0.1 to 5.5 V", "not an acceptance"],
                     id="implausible-ocv"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("3.65", "-0.2"), 3, 3,
                     ["plausible"], id="negative-ocv"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("21.0", "-1.5"), 3, 4,
                     ["acir_mOhm is -1.5 mOhm, negative"], id="negative-acir"),
        pytest.param("# lot: L\n" + HEADER + ROW.replace("25.0", "250"), 3, 5,
                     ["temperature_C is 250 degC, outside the plausible range"], id="hot"),
        pytest.param(HEADER + ROW, 2, None, ["no lot", "no '# lot' line"], id="no-lot"),
        pytest.param("cell_id,lot,time,ocv_V\nC1,,2026-03-02T08:00:00Z,3.6\n", 2, 2,
                     ["no lot"], id="empty-lot-column"),
        pytest.param("# lot:\n" + HEADER + ROW, 1, None, ["metadata lot is empty"],
                     id="empty-lot-metadata"),
        pytest.param("# lot: L\n# lot: M\n" + HEADER + ROW, 2, None,
                     ["metadata lot is given twice (lines 1 and 2)"], id="metadata-twice"),
        pytest.param("# lot: L\ncell_id,time,ocv_V,ocv_V\n", 2, 4,
                     ["the column ocv_V appears twice (columns 3 and 4)"], id="column-twice"),
        pytest.param("cell_id,lot,time,ocv_V\nC1,A,2026-03-02T08:00:00Z,3.6\n"
                     "C1,B,2026-03-09T08:00:00Z,3.6\n", 3, None,
                     ["cell C1 is in lot A on line 2 but in lot B here"], id="two-lots"),
    ],
)
def test_every_bad_file_gives_an_error_naming_file_line_and_column(
    text: str, line: int | None, column: int | None, words: Sequence[str]
) -> None:
    with pytest.raises(InputError) as caught:
        read(text, "shelf-3.csv")
    error = caught.value
    assert error.where is not None and error.where.path == "shelf-3.csv"
    assert (error.where.line, error.where.column) == (line, column)
    assert str(error).startswith("shelf-3.csv")
    for word in words:
        assert word in str(error)
    assert error.hint  # every error says what to do


def test_a_decimal_comma_in_a_quoted_field_is_named_as_such() -> None:
    text = "# lot: L\n" + HEADER + ROW.replace("3.65", '"3,65"')
    with pytest.raises(InputError, match="decimal comma") as caught:
        read(text)
    assert caught.value.where is not None and caught.value.where.column == 3


def test_bytes_that_are_not_utf8_are_located_by_line_and_column() -> None:
    data = ("# lot: L\n" + HEADER).encode() + b"C\xff1,2026-03-02T08:00:00Z,3.6,1,25\n"
    with pytest.raises(InputError, match="0xFF is not UTF-8") as caught:
        read(data, "bytes.csv")
    assert str(caught.value.where) == "bytes.csv, line 3, column 2"


def test_gzip_that_is_broken_or_cut_short_is_refused_naming_the_file() -> None:
    packed = gzip.compress(GOOD.encode())
    with pytest.raises(InputError, match="cut short") as cut:
        read(packed[: len(packed) // 2], "aging.csv.gz")
    with pytest.raises(InputError, match="not valid gzip") as broken:
        read(b"plain text", "aging.csv.gz")
    for caught in (cut, broken):
        assert caught.value.where is not None and caught.value.where.path == "aging.csv.gz"


def test_a_header_row_tells_a_reading_file_from_a_cycle_file_by_its_bytes() -> None:
    assert looks_like_readings(GOOD.encode())
    assert looks_like_readings(b"\xef\xbb\xbf\r\n# a: b\r\nocv_V,cell_id\r\n")
    packed = gzip.compress(GOOD.encode() * 50)
    assert looks_like_readings(packed)
    assert looks_like_readings(packed[:200])  # a compressed head cut mid-stream
    for path in sorted(GOOD_CYCLE_FILES.iterdir()):  # the project's own good cycle files
        assert not looks_like_readings(path.read_bytes()[:4096]), path.name
    assert not looks_like_readings(b"")
    assert not looks_like_readings(b"# lot: L\n")
    assert not looks_like_readings(b"\x1f\x8b not gzip at all")
    assert not looks_like_readings(b"cell_id,time,voltage_V\n")


def test_a_ten_thousand_row_tester_file_reads_in_full() -> None:
    cells = demo_aging_lot("DEMO-AGE-99", 5000, seed=2)
    data = aging_readings(cells, start=at(0), days=7.0, seed=2)
    readings = read_readings(data, "big.csv").readings
    assert len(readings) == 10_000 and readings[-1].line == 10_005


# A small writer of our own, and the strategies the round trip draws from.
CELL_IDS = st.text("ABCXYZ0123456789-_.", min_size=1, max_size=12)
OFFSETS = st.integers(-12 * 60, 14 * 60).map(
    lambda m: datetime.timezone(datetime.timedelta(minutes=m))
)
TIMES = st.datetimes(
    min_value=datetime.datetime(2000, 1, 1), max_value=datetime.datetime(2099, 12, 31),
    timezones=OFFSETS,
)
ROWS = st.lists(
    st.tuples(
        CELL_IDS,
        TIMES,
        st.floats(-0.1, 5.5),
        st.none() | st.floats(0.0, 1e4),
        st.none() | st.floats(-40.0, 100.0),
    ),
    min_size=1,
    max_size=40,
)


def write(rows: Sequence[tuple[str, datetime.datetime, float, float | None, float | None]]) -> bytes:
    def field(value: float | None) -> str:
        return "" if value is None else repr(value)

    lines = ["# kind: ocv readings", "# lot: DEMO-AGE-01", "cell_id,time,ocv_V,acir_mOhm,temperature_C"]
    lines += [f"{c},{t.isoformat()},{v!r},{field(a)},{field(k)}" for c, t, v, a, k in rows]
    return ("\n".join(lines) + "\n").encode()


def content(reading: Reading) -> tuple[object, ...]:
    """A reading without its line: what the file says about the cell."""
    return (reading.cell_id, reading.lot, reading.at, reading.ocv_v, reading.acir_mohm,
            reading.temperature_c)


@settings(max_examples=60, deadline=None)
@given(ROWS, st.randoms(use_true_random=False))
def test_whatever_the_writer_writes_reads_back_equal_in_any_row_order(
    rows: list[tuple[str, datetime.datetime, float, float | None, float | None]],
    shuffler: random.Random,
) -> None:
    back = read(write(rows))
    assert [content(r) for r in back] == [(c, "DEMO-AGE-01", t, v, a, k) for c, t, v, a, k in rows]
    shuffled = list(rows)
    shuffler.shuffle(shuffled)
    again = read(write(shuffled))
    assert sorted(map(content, again), key=repr) == sorted(map(content, back), key=repr)
    # grouped by cell, the file's order no longer shows (ties in time keep file order)
    grouped = {c: [content(r) for r in rs] for c, rs in group_by_cell(back).items()}
    grouped_again = {c: [content(r) for r in rs] for c, rs in group_by_cell(again).items()}
    assert grouped.keys() == grouped_again.keys()
    for cell in grouped:
        assert [g[2] for g in grouped[cell]] == [g[2] for g in grouped_again[cell]]
        assert sorted(grouped[cell], key=repr) == sorted(grouped_again[cell], key=repr)


# ----------------------------------------------------------------------------- the K-value


def test_k_value_by_hand() -> None:
    # The K-value as the trade defines it, OCV drop per day (common practice):
    # 3.6512 V, then 3.6470 V seven days later: a drop of 4.2 mV over 7 days = 0.6 mV/day.
    k = k_value([reading(0, 3.6512), reading(7, 3.6470)], min_days=3)
    assert isinstance(k, KValue)
    assert k.mv_per_day == pytest.approx(0.6, abs=1e-9)
    assert (k.days, k.readings, k.corrected, k.slope_mv_per_day) == (7.0, 2, False, None)
    assert "0.600 mV/day" in k.note


def test_a_rising_ocv_gives_a_negative_k_value() -> None:
    # 3.3000 V then 3.3014 V over 7 days: a rise of 1.4 mV = -0.2 mV/day.
    k = k_value([reading(0, 3.3000), reading(7, 3.3014)], min_days=3)
    assert isinstance(k, KValue) and k.mv_per_day == pytest.approx(-0.2, abs=1e-9)


def test_the_first_and_last_reading_in_time_count_not_in_the_file() -> None:
    ordered = [reading(0, 3.6512, line=2), reading(3, 3.6500, line=3), reading(7, 3.6470, line=4)]
    forward = k_value(ordered, min_days=3)
    backward = k_value(ordered[::-1], min_days=3)
    assert isinstance(forward, KValue) and isinstance(backward, KValue)
    assert forward == backward
    assert (forward.first.line, forward.last.line) == (2, 4)


def test_readings_too_close_in_time_make_no_k_value_and_say_why() -> None:
    result = k_value([reading(0, 3.6512), reading(0.8, 3.6508)], min_days=3)
    assert result == NotMade("C1", 2, "readings 0.8 days apart; the K-value needs at least 3 days")
    close = k_value([reading(0, 3.6512), reading(2.96, 3.6508)], min_days=3)
    assert isinstance(close, NotMade) and close.reason.startswith("readings 2.96 days apart")
    exactly = k_value([reading(0, 3.6512), reading(3, 3.6500)], min_days=3)
    assert isinstance(exactly, KValue)


def test_fewer_than_two_readings_make_no_k_value() -> None:
    one = k_value([reading(0, 3.6512)], min_days=3)
    none = k_value([], min_days=3)
    assert isinstance(one, NotMade) and one.cell_id == "C1" and "one reading" in one.reason
    assert isinstance(none, NotMade) and none.cell_id is None and "no readings" in none.reason


def test_temperature_correction_by_hand() -> None:
    # 0.1 mV/K to 25 degC: first 3651.2 mV at 23 degC -> 3651.2 - 0.1*(23-25) = 3651.4 mV;
    # last 3647.0 mV at 27 degC -> 3647.0 - 0.1*(27-25) = 3646.8 mV; 4.6 mV / 7 d = 0.657 mV/day.
    readings = [reading(0, 3.6512, temperature=23.0), reading(7, 3.6470, temperature=27.0)]
    k = k_value(readings, min_days=3, temperature_coefficient_mV_per_K=0.1)
    assert isinstance(k, KValue) and k.corrected
    assert k.mv_per_day == pytest.approx(4.6 / 7, abs=1e-9)
    # against another reference temperature the shift is common to both ends: K unchanged
    other = k_value(readings, min_days=3, temperature_coefficient_mV_per_K=0.1, reference_C=20.0)
    assert isinstance(other, KValue) and other.mv_per_day == pytest.approx(4.6 / 7, abs=1e-9)


def test_temperature_correction_without_a_temperature_is_not_made() -> None:
    readings = [reading(0, 3.6512, temperature=23.0, line=5), reading(7, 3.6470, line=9)]
    result = k_value(readings, min_days=3, temperature_coefficient_mV_per_K=0.1)
    assert isinstance(result, NotMade) and "line 9 has no temperature" in result.reason
    assert isinstance(k_value(readings, min_days=3), KValue)  # uncorrected it is made


def test_readings_of_several_cells_or_a_naive_time_are_refused() -> None:
    with pytest.raises(ValueError, match="several cells"):
        k_value([reading(0, 3.6, cell="A"), reading(7, 3.6, cell="B")], min_days=3)
    naive = Reading("C1", "L1", None, datetime.datetime(2026, 3, 2), 3.6, None, None, line=7)
    with pytest.raises(ValueError, match="line 7"):
        k_value([naive, reading(7, 3.6)], min_days=3)
    with pytest.raises(ValueError, match="min_days"):
        k_value([reading(0, 3.6), reading(7, 3.6)], min_days=0)


def test_the_slope_over_every_reading_matches_scipy_least_squares_on_noisy_readings() -> None:
    # Reference: scipy.stats.linregress, ordinary least squares (Virtanen et al. 2020, SciPy 1.0).
    rng = random.Random(5)
    days = [0.0, 1.0, 2.5, 4.0, 7.0]
    ocv = [3.6512 - 0.0006 * d + rng.gauss(0.0, 0.00005) for d in days]
    k = k_value([reading(d, v) for d, v in zip(days, ocv, strict=True)], min_days=3)
    assert isinstance(k, KValue) and k.slope_mv_per_day is not None
    fit = scipy.stats.linregress(days, [v * 1000.0 for v in ocv])
    assert k.slope_mv_per_day == pytest.approx(-fit.slope, abs=1e-9)
    assert "least-squares slope" in k.note


@settings(max_examples=200, deadline=None)
@given(
    true_k=st.floats(-5.0, 5.0),
    start_v=st.floats(2.5, 4.2),
    days=st.floats(7.0, 30.0),
    noise=st.tuples(st.floats(-0.05, 0.05), st.floats(-0.05, 0.05)),
)
def test_meter_noise_moves_k_by_at_most_twice_the_noise_over_the_days(
    true_k: float, start_v: float, days: float, noise: tuple[float, float]
) -> None:
    # Each reading is off by at most n = 0.05 mV (the meter's noise, from memory), so the
    # drop is off by at most 2n and K = drop / days by at most 2n / days.
    first = start_v * 1000.0 + noise[0]
    last = start_v * 1000.0 - true_k * days + noise[1]
    k = k_value([reading(0, first / 1000.0), reading(days, last / 1000.0)], min_days=3)
    assert isinstance(k, KValue)
    assert abs(k.mv_per_day - true_k) <= 2 * 0.05 / days + 1e-9


def test_group_by_cell_sorts_each_cell_by_time_and_the_cells_by_id() -> None:
    readings = read(GOOD)
    grouped = group_by_cell(readings[::-1])
    assert list(grouped) == ["A-001", "A-002", "A-003"]
    for cell, rows in grouped.items():
        assert [r.at for r in rows] == sorted(r.at for r in rows)
        assert {r.cell_id for r in rows} == {cell}
    k = k_value(grouped["A-001"], min_days=3)
    assert isinstance(k, KValue) and k.mv_per_day == pytest.approx(0.6, abs=1e-9)


# ------------------------------------------------------------------------------ the demo


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_cell_that_self_discharges_five_times_faster_has_a_clearly_larger_k(seed: int) -> None:
    cells = demo_aging_lot("DEMO-AGE-07", 12, slow=(5,), seed=seed)
    data = aging_readings(cells, start=at(0), days=7.0, seed=seed)
    assert looks_like_readings(data)
    ks = {}
    for cell, rows in group_by_cell(read(data)).items():
        k = k_value(rows, min_days=3)
        assert isinstance(k, KValue)
        ks[cell] = k.mv_per_day
    slow = ks.pop("DEMO-AGE-07-005")
    assert all(k > 0 for k in ks.values())  # every cell loses charge: its OCV falls
    assert slow > 3 * max(ks.values())


def test_the_same_seed_writes_the_same_bytes() -> None:
    cells = demo_aging_lot("DEMO-AGE-07", 4, seed=9)
    first = aging_readings(cells, start=at(0), days=7.0, seed=9)
    assert first == aging_readings(cells, start=at(0), days=7.0, seed=9)
    assert first != aging_readings(cells, start=at(0), days=7.0, seed=10)


# The published open-circuit fits the demo draws on: NMC811 and graphite from Chen et al.,
# J. Electrochem. Soc. 167 (2020) 080534; LFP from Safari & Delacourt, J. Electrochem. Soc.
# 158 (2011) A562; NVPF and hard carbon from Chayambuka et al., Electrochim. Acta 404 (2022)
# 139764. The test evaluates them itself, independent of the demo's own bookkeeping.
CURVES = {
    "nmc811_graphite": ocp.nmc811_graphite_cell,
    "lfp_graphite": ocp.lfp_graphite_cell,
    "nvpf_hard_carbon": ocp.nvpf_hard_carbon_cell,
}


def expected_drop_mv(curve: str, soc: float, current_ma: float, capacity_ah: float, days: float) -> float:
    """The OCV drop charge conservation asks: dQ = I*t in coulombs, 1 Ah = 3600 C (the
    ampere-hour's definition; scipy.constants.hour), so dSOC = dQ / (3600 C/Ah * C_nominal)."""
    charge_c = current_ma / 1000.0 * days * 24.0 * scipy.constants.hour
    dsoc = charge_c / scipy.constants.hour / capacity_ah
    return float(CURVES[curve](soc) - CURVES[curve](soc - dsoc)) * 1000.0


@pytest.mark.parametrize("curve", sorted(CURVES))
@pytest.mark.parametrize(("noise_mv", "bound_mv"), [(0.0, 0.1), (0.05, 0.1 + 2 * 5 * 0.05)])
def test_the_demo_s_ocv_drop_is_the_open_circuit_curve_s_for_the_charge_lost(
    curve: str, noise_mv: float, bound_mv: float
) -> None:
    # Without noise each reading is off by at most half the 0.1 mV resolution, so the drop by
    # at most 0.1 mV; with 0.05 mV Gaussian noise allow five standard deviations per reading.
    cells = [
        AgingCell(f"Q-{n}", "DEMO-AGE-08", "DEMO-CELL", curve=curve, storage_soc=soc,
                  self_discharge_ma=leak, capacity_ah=cap)
        for n, (soc, leak, cap) in enumerate(
            [(0.3, 0.1, 5.0), (0.4, 0.5, 5.0), (0.5, 2.0, 10.0), (0.45, 0.05, 2.0)]
        )
    ]
    data = aging_readings(cells, start=at(0), days=7.0, seed=4, noise_mv=noise_mv)
    grouped = group_by_cell(read(data))
    for cell in cells:
        first, last = grouped[cell.cell_id]
        assert (last.at - first.at) == datetime.timedelta(days=7)
        drop = (first.ocv_v - last.ocv_v) * 1000.0
        want = expected_drop_mv(curve, cell.storage_soc, cell.self_discharge_ma, cell.capacity_ah, 7.0)
        assert abs(drop - want) <= bound_mv + 1e-9, cell.cell_id


def test_the_same_leak_shows_far_less_on_the_flat_lfp_curve() -> None:
    nmc = AgingCell("N-1", "DEMO-AGE-09", "DEMO-NMC", curve="nmc811_graphite", storage_soc=0.5)
    lfp = AgingCell("F-1", "DEMO-AGE-09", "DEMO-LFP", curve="lfp_graphite", storage_soc=0.5)
    grouped = group_by_cell(read(aging_readings([nmc, lfp], start=at(0), days=7.0, seed=1)))
    k_nmc, k_lfp = (k_value(grouped[c], min_days=3) for c in ("N-1", "F-1"))
    assert isinstance(k_nmc, KValue) and isinstance(k_lfp, KValue)
    assert k_nmc.mv_per_day > 10 * abs(k_lfp.mv_per_day)


def test_cells_of_several_lots_are_written_with_a_lot_column() -> None:
    cells = [AgingCell("A", "DEMO-AGE-10", "T"), AgingCell("B", "DEMO-AGE-11", "T")]
    found = read_readings(aging_readings(cells, start=at(0), days=7.0, seed=1), "two.csv")
    assert "lot" in found.columns and "lot" not in found.metadata
    assert {(r.cell_id, r.lot) for r in found.readings} == {("A", "DEMO-AGE-10"), ("B", "DEMO-AGE-11")}


def test_the_demo_refuses_a_naive_start_or_an_unknown_curve() -> None:
    with pytest.raises(ValueError, match="UTC offset"):
        aging_readings([AgingCell("A", "L", "T")], start=datetime.datetime(2026, 3, 2), days=7, seed=1)
    with pytest.raises(ValueError, match="unknown curve"):
        aging_readings([AgingCell("A", "L", "T", curve="x")], start=at(0), days=7, seed=1)


@pytest.mark.parametrize("name", ["pipeline.read.readings", "pipeline.judge.kvalue"])
def test_docstring_examples_hold(name: str) -> None:
    failures, _ = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert failures == 0
