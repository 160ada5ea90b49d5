"""One record written as the invented cycler exports that the example profiles read.

Cycle file version 1 is formgate's own layout; cyclers export others. Each writer here takes
a record read from a version 1 file (its *twin*) and writes the same samples as one invented
export, so that a test can judge both and expect the same metrics and verdict, and so that
``docs/layouts/`` can show a person one file of each kind beside the profile that reads it:

- **date-time text with a mode column** (``rules/profiles/datetime_mode_column.toml``):
  semicolons and decimal commas; local wall-clock stamps (``31.10.2026 02:30:00.10``, to the
  hundredth of a second) in the zone a metadata line names; the current as a magnitude and a
  mode word per row (``charge``, ``discharge``, ``pause``); the cycler's own charge counter
  (Ah, restarting with each step) and energy counter (Wh, net over the record), integrated
  from the samples by the trapezoid rule so that they agree with formgate's integrals;
- **ISO 8601 stamps with their UTC offset** (``iso_offsets.toml``): ``2026-10-25T02:30:00.10+02:00``,
  current in mA with discharge counted positive;
- **time since the step began** (``step_time.toml``): tab-separated, restarting at every step
  beside the step number;
- **workbook** (``workbook_sheets.toml``): an .xlsx with the metadata on a sheet ``Info`` (key in
  column A, value in B) and the rows on ``Record``, continued on ``Record_2``, ``Record_3``, ...
  once a sheet holds ``rows_per_sheet`` rows, each sheet repeating the header; time as elapsed
  seconds or as date-time cells;
- **Parquet** (``parquet_columns.toml``): one column per quantity (time in whole ms), the
  metadata in the file's key/value metadata.

The layouts, their column names and mode words are our own invention. Writers are pure (a
record in, bytes out); openpyxl and pyarrow are imported only by the writers that need them.
``python -m pipeline.demo.layouts FOLDER`` writes the example files of ``docs/layouts/``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import io
import sys
import zlib
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.model import FloatArray, IntArray, Trace
from pipeline.read.zones import parse_zone

DEFAULT_ZONE = "Europe/Berlin"
# The start of a record whose metadata gives none (any instant will do: the elapsed time is
# what the judge reads).
DEFAULT_START = dt.datetime(2026, 1, 5, 6, 0, tzinfo=dt.UTC)
DAY_FIRST = "%d.%m.%Y %H:%M:%S.%f"
MODE_WORDS: Mapping[str, str] = {"charge": "charge", "discharge": "discharge", "rest": "pause"}
# A step whose median current is below this share of the record's largest is a rest.
_REST_SHARE = 0.01
ZONE_KEY = "clock_zone"  # the metadata entry in which the invented exports name their clock's zone

FIRST_SHEET = "Record"
INFO_SHEET = "Info"


def sheet_name(part: int) -> str:
    """The name of the ``part``-th data sheet (0-based): Record, Record_2, Record_3, ...

    >>> [sheet_name(k) for k in range(3)]
    ['Record', 'Record_2', 'Record_3']
    """
    return FIRST_SHEET if part == 0 else f"{FIRST_SHEET}_{part + 1}"


def read_twin(data: bytes, name: str) -> Trace:
    """A cycle file version 1's bytes -> the Trace the layouts are written from."""
    from pipeline.read.cyclefile import read_cycle_file

    return read_cycle_file(data, name)


# --- what the cycler would have known: start, modes, steps, counters -------------------------


def record_start(metadata: Mapping[str, str], start: dt.datetime | None = None) -> dt.datetime:
    """When the record's time zero was: ``start``, else its started_at, else DEFAULT_START."""
    if start is None:
        written = metadata.get("started_at")
        start = dt.datetime.fromisoformat(written) if written else DEFAULT_START
    if start.tzinfo is None:
        raise ValueError("the start of a record must carry its zone or UTC offset")
    return start.astimezone(dt.UTC)


def _dated(
    record: Trace, metadata: Mapping[str, str] | None, start: dt.datetime | None
) -> tuple[dict[str, str], list[dt.datetime]]:
    """The metadata to write (its started_at the record's start) and each row's instant (UTC)."""
    written = dict(record.metadata if metadata is None else metadata)
    origin = record_start(written, start)
    if start is not None or "started_at" not in written:
        written["started_at"] = origin.isoformat()
    return written, stamps_utc(record, origin)


def _micros(record: Trace) -> IntArray:
    time_s = np.asarray(record.time_s, dtype=np.float64)
    if not np.all(np.isfinite(time_s)):
        raise ValueError("every row of the record needs a time to be written as a date and time")
    micros: IntArray = np.round(time_s * 1e6).astype(np.int64)
    return micros


def stamps_utc(record: Trace, start: dt.datetime | None = None) -> list[dt.datetime]:
    """Each row's instant (UTC), truncated to the hundredth of a second as the exports write it."""
    origin = record_start(record.metadata, start)
    centis = _micros(record) // 10_000
    return [origin + dt.timedelta(microseconds=10_000 * int(c)) for c in centis.tolist()]


def step_blocks(record: Trace) -> IntArray:
    """A number per row that changes where a step changes: the step column, else runs of modes."""
    if record.step is not None:
        return np.asarray(record.step, dtype=np.int64)
    kinds = _direction(np.asarray(record.current_a, dtype=np.float64))
    changes = np.concatenate(([0], np.cumsum(kinds[1:] != kinds[:-1])))
    blocks: IntArray = changes.astype(np.int64) + 1
    return blocks


def _direction(current: FloatArray) -> np.ndarray:
    finite = np.abs(current[np.isfinite(current)])
    band = _REST_SHARE * (float(finite.max()) if finite.size else 0.0)
    return np.where(current > band, 1, np.where(current < -band, -1, 0))


def row_modes(record: Trace) -> np.ndarray:
    """Each row's mode: "charge", "discharge" or "rest".

    A step whose median current is within 1 % of the record's largest is a rest (each of its
    rows keeps its measured value, sign and all); on any other row the sign of the current
    says charge or discharge (a row of exactly zero takes its step's direction), so that a
    magnitude and its mode give back the signed current exactly.
    """
    current = np.asarray(record.current_a, dtype=np.float64)
    finite = np.abs(current[np.isfinite(current)])
    largest = float(finite.max()) if finite.size else 0.0
    blocks = step_blocks(record)
    modes = np.empty(len(current), dtype=object)
    bounds = np.concatenate(([0], np.flatnonzero(np.diff(blocks) != 0) + 1, [len(current)]))
    for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist(), strict=True):
        block = current[a:b]
        median = float(np.nanmedian(block)) if np.isfinite(block).any() else 0.0
        if abs(median) <= _REST_SHARE * largest:
            modes[a:b] = "rest"
            continue
        lean = "charge" if median > 0 else "discharge"
        modes[a:b] = np.where(block > 0, "charge", np.where(block < 0, "discharge", lean))
    return modes


def counters(record: Trace) -> tuple[FloatArray, FloatArray]:
    """The cycler's own counters: charge in Ah (restarting with each step) and net energy in Wh.

    Both are trapezoid integrals of the samples (|I| within a step; V·I over the record,
    charge counted up and discharge down), as a cycler integrates its own readings.
    """
    time_s = np.asarray(record.time_s, dtype=np.float64)
    current = np.asarray(record.current_a, dtype=np.float64)
    power = current * np.asarray(record.voltage_v, dtype=np.float64)
    dt_s = np.diff(time_s)
    charge_parts = 0.5 * (np.abs(current[1:]) + np.abs(current[:-1])) * dt_s
    blocks = step_blocks(record)
    charge_parts[blocks[1:] != blocks[:-1]] = 0.0
    charge = np.concatenate(([0.0], np.cumsum(charge_parts)))
    # restart at each step: subtract the running total where each step begins
    starts = np.concatenate(([0], np.flatnonzero(np.diff(blocks) != 0) + 1))
    lengths = np.diff(np.concatenate((starts, [len(time_s)])))
    charge_ah: FloatArray = (charge - np.repeat(charge[starts], lengths)) / 3600.0
    energy_wh: FloatArray = np.concatenate(([0.0], np.cumsum(0.5 * (power[1:] + power[:-1]) * dt_s))) / 3600.0
    return charge_ah, energy_wh


# --- text ----------------------------------------------------------------------------------


def _formatted(values: Iterable[float], digits: int, decimal: str) -> list[str]:
    texts = [f"{v:.{digits}f}" for v in values]
    return [t.replace(".", decimal) for t in texts] if decimal != "." else texts


def _metadata_lines(metadata: Mapping[str, str], prefix: str = "#") -> list[str]:
    lines = []
    for key, value in metadata.items():
        if not key or any(c in key for c in ":\r\n") or any(c in value for c in "\r\n"):
            raise ValueError(f"metadata {key!r} cannot be written as a '{prefix} key: value' line")
        lines.append(f"{prefix} {key}: {value}")
    return lines


def _text(head: list[str], columns: list[list[str]], delimiter: str) -> bytes:
    rows = (delimiter.join(row) for row in zip(*columns, strict=True))
    return ("\n".join([*head, *rows]) + "\n").encode("utf-8")


def _local_stamp(instant: dt.datetime, zone: dt.tzinfo, pattern: str) -> str:
    local = instant.astimezone(zone)
    return local.strftime(pattern.replace("%f", f"{local.microsecond // 10_000:02d}"))


def _temperature(record: Trace) -> FloatArray:
    if record.temperature_c is None:
        raise ValueError("the invented exports write a temperature on every row")
    return np.asarray(record.temperature_c, dtype=np.float64)


def _whole(values: IntArray | None) -> list[str] | None:
    return None if values is None else [str(v) for v in values.tolist()]


def date_time_text(
    record: Trace,
    metadata: Mapping[str, str] | None = None,
    *,
    start: dt.datetime | None = None,
    zone: str = DEFAULT_ZONE,
    date_format: str = DAY_FIRST,
    delimiter: str = ";",
    decimal: str = ",",
    mode_words: Mapping[str, str] = MODE_WORDS,
    counter_scale: float = 1.0,
) -> bytes:
    """Local wall-clock stamps, a mode column, the current's magnitude and the cycler's counters.

    Stamps are written with ``date_format`` (its ``%f`` as hundredths of a second) in ``zone``
    (a zone name follows its daylight-saving changes; a fixed offset such as "+05:45" does
    not), which a metadata line ``clock_zone`` names. ``counter_scale`` multiplies both
    counters, as a channel whose own integration is off calibration would write them.
    """
    tz = parse_zone(zone)
    metadata, instants = _dated(record, metadata, start)
    metadata[ZONE_KEY] = zone
    stamps = [_local_stamp(s, tz, date_format) for s in instants]
    modes = row_modes(record)
    current = np.asarray(record.current_a, dtype=np.float64)
    shown = np.where(modes == "rest", current, np.abs(current))
    charge_ah, energy_wh = counters(record)
    header = ["Date and time", "Mode", "Voltage (V)", "Current (A)", "Temperature (°C)"]
    columns = [
        stamps,
        [mode_words[m] for m in modes.tolist()],
        _formatted(record.voltage_v.tolist(), 5, decimal),
        _formatted(shown.tolist(), 5, decimal),
        _formatted(_temperature(record).tolist(), 2, decimal),
    ]
    for title, values in (("Step", _whole(record.step)), ("Cycle", _whole(record.cycle))):
        if values is not None:
            header.append(title)
            columns.append(values)
    header += ["Capacity (Ah)", "Energy (Wh)"]
    columns += [
        _formatted((charge_ah * counter_scale).tolist(), 6, decimal),
        _formatted((energy_wh * counter_scale).tolist(), 6, decimal),
    ]
    head = ["# Cell test export, one row per sample", *_metadata_lines(metadata), delimiter.join(header)]
    return _text(head, columns, delimiter)


def iso_offset_stamp(instant: dt.datetime, zone: dt.tzinfo) -> str:
    """ISO 8601 local time to the hundredth of a second with its UTC offset.

    >>> berlin = parse_zone("Europe/Berlin")
    >>> iso_offset_stamp(dt.datetime(2026, 10, 25, 0, 30, 0, 100000, tzinfo=dt.UTC), berlin)
    '2026-10-25T02:30:00.10+02:00'
    >>> iso_offset_stamp(dt.datetime(2026, 10, 25, 1, 30, 0, 100000, tzinfo=dt.UTC), berlin)
    '2026-10-25T02:30:00.10+01:00'
    """
    local = instant.astimezone(zone)
    whole = local.replace(microsecond=0).isoformat()
    cut = len(whole) - 6 if whole[-6] in "+-" else len(whole)
    return f"{whole[:cut]}.{local.microsecond // 10_000:02d}{whole[cut:]}"


def iso_offset_text(
    record: Trace,
    metadata: Mapping[str, str] | None = None,
    *,
    start: dt.datetime | None = None,
    zone: str = DEFAULT_ZONE,
) -> bytes:
    """ISO 8601 stamps each with its UTC offset; current in mA, discharge counted positive."""
    tz = parse_zone(zone)
    metadata, instants = _dated(record, metadata, start)
    stamps = [iso_offset_stamp(s, tz) for s in instants]
    milliamps = -1000.0 * np.asarray(record.current_a, dtype=np.float64) + 0.0
    header = ["Timestamp"]
    columns = [stamps]
    for title, values in (("Step", _whole(record.step)), ("Cycle", _whole(record.cycle))):
        if values is not None:
            header.append(title)
            columns.append(values)
    header += ["Voltage [V]", "Current [mA]", "Temperature [C]"]
    columns += [
        _formatted(record.voltage_v.tolist(), 5, "."),
        _formatted(milliamps.tolist(), 2, "."),
        _formatted(_temperature(record).tolist(), 2, "."),
    ]
    return _text([*_metadata_lines(metadata), ",".join(header)], columns, ",")


def step_times(record: Trace) -> FloatArray:
    """Time since each step began; a step's first row counts from the previous step's last row.

    >>> from pipeline.model import Trace
    >>> t = Trace("x", {}, np.array([0.1, 10, 20, 30, 40]), np.zeros(5), np.zeros(5),
    ...           step=np.array([1, 1, 2, 2, 3]))
    >>> step_times(t).tolist()
    [0.1, 10.0, 10.0, 20.0, 10.0]
    """
    if record.step is None:
        raise ValueError("time since the step began needs the record's step numbers")
    time_s = np.asarray(record.time_s, dtype=np.float64)
    steps = np.asarray(record.step)
    starts = np.flatnonzero(np.diff(steps) != 0) + 1
    origin = np.zeros(len(time_s))
    bounds = np.concatenate((starts, [len(time_s)]))
    for a, b in zip(starts.tolist(), bounds[1:].tolist(), strict=True):
        origin[a:b] = time_s[a - 1]
    since: FloatArray = time_s - origin
    return since


def step_time_text(record: Trace, metadata: Mapping[str, str] | None = None) -> bytes:
    """Tab-separated: step number, cycle, time since the step began (s), voltage, current, temperature."""
    metadata = dict(record.metadata if metadata is None else metadata)
    header = ["Step", "Cycle", "Step time (s)", "U (V)", "I (A)", "T (C)"]
    cycles = _whole(record.cycle)
    if cycles is None:
        raise ValueError("the step-time export writes the cycle number on every row")
    columns = [
        _whole(record.step) or [],
        cycles,
        _formatted(step_times(record).tolist(), 3, "."),
        _formatted(record.voltage_v.tolist(), 5, "."),
        _formatted(record.current_a.tolist(), 5, "."),
        _formatted(_temperature(record).tolist(), 2, "."),
    ]
    head = ["Step-time log", *_metadata_lines(metadata), "\t".join(header)]
    return _text(head, columns, "\t")


# --- workbook and Parquet -----------------------------------------------------------------

WORKBOOK_TIMES = ("elapsed", "date-time")


def workbook(
    record: Trace,
    metadata: Mapping[str, str] | None = None,
    *,
    rows_per_sheet: int = 100_000,
    time: str = "elapsed",
    start: dt.datetime | None = None,
    zone: str = DEFAULT_ZONE,
) -> bytes:
    """An .xlsx: metadata on the sheet ``Info``, the rows on ``Record``, ``Record_2``, ...

    ``time`` is "elapsed" (a column ``Test time (s)`` of numbers) or "date-time" (a column
    ``Date and time`` of date-time cells holding the local wall-clock time in ``zone``, which
    the Info sheet names under clock_zone). Each data sheet repeats the header row.
    """
    from openpyxl import Workbook
    from openpyxl.cell import WriteOnlyCell

    if time not in WORKBOOK_TIMES:
        raise ValueError(f"time must be one of {WORKBOOK_TIMES}, not {time!r}")
    if rows_per_sheet < 1:
        raise ValueError("rows_per_sheet must be 1 or more")
    written = dict(record.metadata if metadata is None else metadata)
    book = Workbook(write_only=True)
    book.properties.creator = "formgate demo"
    # fixed document times, so that the same record gives the same workbook content
    book.properties.created = book.properties.modified = DEFAULT_START.replace(tzinfo=None)
    columns: list[list[Any]]
    if time == "date-time":
        tz = parse_zone(zone)
        written, instants = _dated(record, written, start)
        written[ZONE_KEY] = zone
        local = [s.astimezone(tz).replace(tzinfo=None) for s in instants]
        header = ["Date and time"]
        columns = [local]
    else:
        header = ["Test time (s)"]
        columns = [np.asarray(record.time_s, dtype=np.float64).tolist()]
    header += ["Voltage (V)", "Current (A)", "Temperature (°C)"]
    columns += [record.voltage_v.tolist(), record.current_a.tolist(), _temperature(record).tolist()]
    for title, values in (("Step", record.step), ("Cycle", record.cycle)):
        if values is not None:
            header.append(title)
            columns.append(values.tolist())
    info = book.create_sheet(INFO_SHEET)
    for key, value in written.items():
        info.append([key, value])
    rows = list(zip(*columns, strict=True))
    for part, first in enumerate(range(0, max(len(rows), 1), rows_per_sheet)):
        sheet = book.create_sheet(sheet_name(part))
        sheet.append(header)
        for row in rows[first : first + rows_per_sheet]:
            if time == "date-time":
                stamp = WriteOnlyCell(sheet, value=row[0])
                stamp.number_format = "yyyy-mm-dd hh:mm:ss.00"
                sheet.append([stamp, *row[1:]])
            else:
                sheet.append(list(row))
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


PARQUET_TIMES = ("elapsed", "date-time")


def parquet(
    record: Trace,
    metadata: Mapping[str, str] | None = None,
    *,
    time: str = "elapsed",
    start: dt.datetime | None = None,
) -> bytes:
    """A Parquet file: time in whole ms (or UTC timestamps), V, A, degC, step and cycle numbers.

    The metadata goes into the file's key/value metadata, one entry per key.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    if time not in PARQUET_TIMES:
        raise ValueError(f"time must be one of {PARQUET_TIMES}, not {time!r}")
    written = dict(record.metadata if metadata is None else metadata)
    arrays: dict[str, Any] = {}
    if time == "date-time":
        written, instants = _dated(record, written, start)
        arrays["timestamp_utc"] = pa.array(instants, type=pa.timestamp("ms", tz="UTC"))
    else:
        arrays["test_time_ms"] = pa.array(_micros(record) // 1000, type=pa.int64())
    arrays["voltage"] = pa.array(np.asarray(record.voltage_v, dtype=np.float64))
    arrays["current"] = pa.array(np.asarray(record.current_a, dtype=np.float64))
    arrays["temperature"] = pa.array(_temperature(record))
    for title, values in (("step_number", record.step), ("cycle_number", record.cycle)):
        if values is not None:
            arrays[title] = pa.array(np.asarray(values, dtype=np.int64))
    table = pa.table(arrays).replace_schema_metadata(
        {key.encode("utf-8"): value.encode("utf-8") for key, value in written.items()}
    )
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd")
    data: bytes = sink.getvalue().to_pybytes()
    return data


# --- the shipped examples -------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Layout:
    """One invented export: the shipped profile that reads it, its example file, its writer."""

    profile: str  # file name in rules/profiles/
    example: str  # file name in docs/layouts/
    write: Callable[[Trace], bytes]


LAYOUTS: Mapping[str, Layout] = {
    "date-time text": Layout("datetime_mode_column.toml", "datetime_mode_column.csv", date_time_text),
    "ISO 8601 offsets": Layout("iso_offsets.toml", "iso_offsets.csv", iso_offset_text),
    "step time": Layout("step_time.toml", "step_time.tsv", step_time_text),
    "workbook": Layout(
        "workbook_sheets.toml",
        "workbook_sheets.xlsx",
        lambda record: workbook(record, rows_per_sheet=EXAMPLE_ROWS_PER_SHEET),
    ),
    "Parquet": Layout("parquet_columns.toml", "parquet_columns.parquet", parquet),
}
TWIN_EXAMPLE = "cycle_file_v1.csv"
# The examples' record: the first demo cell, logged every 30 s (a third of the demo's rows,
# so that each file stays small), started just before the night the clocks go forward in
# spring 2026 in Europe/Berlin, so the date-time examples show the skipped hour.
EXAMPLE_INTERVAL_S = 30.0
EXAMPLE_START = dt.datetime(2026, 3, 28, 20, 0, tzinfo=dt.timezone(dt.timedelta(hours=1)))
EXAMPLE_ROWS_PER_SHEET = 1500


def example_twin() -> bytes:
    """The cycle file version 1 the examples are written from (pure, the same bytes each time)."""
    from pipeline.demo.cycletext import to_cycle_file
    from pipeline.demo.lots import DEMO_CELLS, demo_metadata, demo_recipe
    from pipeline.demo.synth import simulate_formation

    cell = DEMO_CELLS[0]
    rng = np.random.default_rng([2026, zlib.crc32(cell.cell_id.encode("utf-8"))])
    recipe = dataclasses.replace(demo_recipe(cell, rng), sample_interval_s=EXAMPLE_INTERVAL_S)
    metadata = {**demo_metadata(cell), "started_at": EXAMPLE_START.astimezone(dt.UTC).isoformat()}
    return to_cycle_file(simulate_formation(recipe, rng), metadata).encode("utf-8")


README = "README.md"


def example_readme() -> str:
    """docs/layouts/README.md: which file is which layout, and the profile that reads it."""
    lines = [
        "_Written by `python -m pipeline.demo.layouts docs/layouts` (pipeline/demo/layouts.py); "
        "do not edit by hand._",
        "",
        "# Example files of the shipped import profiles",
        "",
        "One record, the demo cell L01-001 of lot DEMO-LOT-01 (sampled every "
        f"{EXAMPLE_INTERVAL_S:g} s, started {EXAMPLE_START.isoformat()}, so that the date-time "
        "files pass the night the clocks go forward), written as cycle file version 1 and as "
        "each invented export that a profile in [rules/profiles](../../rules/profiles) reads. "
        "Every file is judged alike: the same metrics and verdict as the version 1 file.",
        "",
        "| file | layout | read with |",
        "|---|---|---|",
        f"| [`{TWIN_EXAMPLE}`]({TWIN_EXAMPLE}) | cycle file version 1 | no profile |",
    ]
    for kind, layout in LAYOUTS.items():
        lines.append(
            f"| [`{layout.example}`]({layout.example}) | {kind} | "
            f"[`{layout.profile}`](../../rules/profiles/{layout.profile}) |"
        )
    lines += [
        "",
        "Try one: `formgate check docs/layouts/iso_offsets.csv --profile "
        "rules/profiles/iso_offsets.toml --no-pdf`.",
        "",
    ]
    return "\n".join(lines)


def example_files() -> dict[str, bytes]:
    """File name -> bytes of every example in docs/layouts/: the version 1 twin, the layouts, a README."""
    twin = example_twin()
    record = read_twin(twin, TWIN_EXAMPLE)
    files = {TWIN_EXAMPLE: twin}
    for layout in LAYOUTS.values():
        files[layout.example] = layout.write(record)
    files[README] = example_readme().encode("utf-8")
    return files


def write_examples(folder: Path) -> list[Path]:
    """Write every example file into ``folder`` (created if needed); return their paths."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, data in example_files().items():
        path = folder / name
        path.write_bytes(data)
        paths.append(path)
    return paths


def main(argv: list[str]) -> int:
    if len(argv) != 1:
        print("usage: python -m pipeline.demo.layouts FOLDER", file=sys.stderr)
        return 2
    for path in write_examples(Path(argv[0])):
        print(f"{path}  {path.stat().st_size // 1024} KiB")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main(sys.argv[1:]))
