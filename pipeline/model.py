"""The shared frozen records of a cell's data, from its trace to its metrics.

Only data lives here: no parsing, no computation beyond trivial derived
properties. Units are suffixes of field names (``_s``, ``_v``, ``_a``, ``_ah``,
``_wh``, ``_c``, ``_pct``, ``_mohm``). Numpy arrays are made read-only on
construction so that a frozen record really cannot change.

What a cycle file holds (the Trace, where its rows stand, notes on its data), its steps and
cycles, and what was measured on it (the channel's accuracy class, the rest band, plateaus,
the views the certificate draws, the cycle and cell metrics). The records of a rule set and
of what judging found are pipeline.acceptance's (rules.py and results.py).
"""

from __future__ import annotations

import datetime
import enum
import fnmatch
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import TypeVar

import numpy as np
import numpy.typing as npt

V = TypeVar("V")
FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


# The type of a capsule, the object through which a C library hands memory it allocated
# over to an array (the standard library's datetime C API is one, always there to ask).
_CAPSULE = type(datetime.datetime_CAPI)


def owns_memory(values: npt.NDArray[np.generic]) -> bool:
    """Whether ``values`` holds its memory alone, as an array that owns its data does.

    An array may instead be made over memory a C library allocated for it alone and hands
    over with it, held by a capsule that frees it with the array: pandas' CSV parser makes
    each column it parses so. No other object reaches that memory but views of the array.
    """
    return bool(values.flags.owndata) or isinstance(values.base, _CAPSULE)


def frozen_array(values: object, dtype: type = np.float64) -> npt.NDArray[np.generic]:
    """Return a read-only contiguous copy of ``values`` as ``dtype``.

    An array that is already read-only, contiguous, of ``dtype`` and holds its memory
    alone (:func:`owns_memory`: one made by ``frozen_array``, or a fresh one its maker
    froze) is returned as it is: copying megabytes of samples again on every Trace gains
    no safety.
    """
    if (
        isinstance(values, np.ndarray)
        and values.dtype == dtype
        and owns_memory(values)
        and values.flags.c_contiguous
        and not values.flags.writeable
    ):
        return values
    array: npt.NDArray[np.generic] = np.array(values, dtype=dtype, copy=True)
    array.setflags(write=False)
    return array


class FrozenMap(Mapping[str, V]):
    """A read-only, ordered, picklable mapping (a MappingProxyType cannot cross a process pipe).

    >>> FrozenMap({"a": 1})["a"]
    1
    """

    __slots__ = ("_data",)

    def __init__(self, values: Mapping[str, V] | None = None) -> None:
        self._data: dict[str, V] = dict(values or {})

    def __getitem__(self, key: str) -> V:
        return self._data[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __repr__(self) -> str:
        return f"FrozenMap({self._data!r})"

    def __reduce__(self) -> tuple[type[FrozenMap[V]], tuple[dict[str, V]]]:
        return (FrozenMap, (self._data,))


def frozen_mapping(values: Mapping[str, V] | None = None) -> FrozenMap[V]:
    """Return a read-only mapping that keeps the insertion order of ``values``."""
    return FrozenMap(values)


@dataclass(frozen=True, slots=True)
class SourceRef:
    """Where something came from: a file name and, where it applies, a line and column (1-based).

    In a workbook ``sheet`` names the sheet and ``line`` is the row its program shows
    (``unit`` "row", the column shown as its letter); in a Parquet file ``line`` is the
    1-based row of the table.

    >>> str(SourceRef("b.xlsx", 12, 3, sheet="Record_2", unit="row"))
    "b.xlsx, sheet 'Record_2', row 12, column C"
    """

    path: str
    line: int | None = None
    column: int | None = None
    sheet: str | None = None
    unit: str = "line"

    def __str__(self) -> str:
        text = self.path
        if self.sheet is not None:
            text += f", sheet '{self.sheet}'"
        if self.line is not None:
            text += f", {self.unit} {self.line}"
        if self.column is not None and (self.line is not None or self.sheet is not None):
            text += f", column {column_letters(self.column) if self.sheet else self.column}"
        return text


def column_letters(column: int) -> str:
    """A 1-based column number as a spreadsheet writes it: 1 -> A, 27 -> AA.

    >>> column_letters(1), column_letters(26), column_letters(27), column_letters(703)
    ('A', 'Z', 'AA', 'AAA')
    """
    letters = ""
    while column > 0:
        column, rest = divmod(column - 1, 26)
        letters = chr(ord("A") + rest) + letters
    return letters


@dataclass(frozen=True, slots=True)
class RowPlaces:
    """Where each data row of a record stands in its file, when that is not one line each.

    ``spans`` holds, for each stretch of rows that sit together (one sheet of a workbook, or
    the whole of a Parquet table), the index of its first record row, the sheet's name (None
    outside workbooks) and the row number its first record row has there.

    >>> places = RowPlaces("b.xlsx", ((0, "Record", 3), (100, "Record_2", 2)))
    >>> str(places.at(101, 2)), places.label(5)
    ("b.xlsx, sheet 'Record_2', row 3, column B", "row 8 of sheet 'Record'")
    """

    path: str
    spans: tuple[tuple[int, str | None, int], ...]

    def at(self, row: int, column: int | None = None) -> SourceRef:
        first, sheet, number = self.spans[0]
        for span in self.spans:
            if span[0] > row:
                break
            first, sheet, number = span
        return SourceRef(self.path, number + row - first, column, sheet=sheet, unit="row")

    def label(self, row: int) -> str:
        where = self.at(row)
        return f"row {where.line}" + (f" of sheet '{where.sheet}'" if where.sheet else "")


@dataclass(frozen=True, slots=True)
class Note:
    """A data-quality observation that did not stop the analysis (shown on the certificate).

    ``code`` is a stable machine name (``nan_rows_dropped``, ``time_duplicates``, ...);
    ``text`` is the sentence for people; ``blocks`` names the metrics that cannot be
    trusted because of it (a check on such a metric is "not judged" and leads to hold).
    """

    code: str
    text: str
    where: SourceRef | None = None
    blocks: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class Trace:
    """One cell's record as read from a cycle file, in file units of the v1 format.

    ``time_s`` is elapsed seconds, ``voltage_v`` volts, ``current_a`` amperes with
    positive = charge. ``step``/``cycle`` are the cycler program's numbers when the
    file has them. ``first_data_line`` is the 1-based line number of row 0 in the
    source file, so row ``i`` is on line ``first_data_line + i`` (the reader refuses
    blank lines inside the data, which keeps that true).
    """

    source: str
    metadata: Mapping[str, str]
    time_s: FloatArray
    voltage_v: FloatArray
    current_a: FloatArray
    temperature_c: FloatArray | None = None
    step: IntArray | None = None
    cycle: IntArray | None = None
    first_data_line: int = 2
    notes: tuple[Note, ...] = ()
    # where rows stand in a workbook or Parquet file; None for text, one line per row
    places: RowPlaces | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))
        for name in ("time_s", "voltage_v", "current_a", "temperature_c"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, frozen_array(value))
        for name in ("step", "cycle"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, frozen_array(value, np.int64))
        n = len(self.time_s)
        for name in ("voltage_v", "current_a", "temperature_c", "step", "cycle"):
            value = getattr(self, name)
            if value is not None and len(value) != n:
                raise ValueError(f"Trace.{name} has {len(value)} rows, time_s has {n}")

    def __len__(self) -> int:
        return len(self.time_s)

    def line_of(self, row: int) -> int:
        """1-based line number in the source file of data row ``row`` (0-based).

        For a workbook or a Parquet file, the row's number where it stands (see ``where``).
        """
        if self.places is not None:
            return self.places.at(row).line or 0
        return self.first_data_line + row

    def where(self, row: int, column: int | None = None) -> SourceRef:
        """Where data row ``row`` (0-based) stands in the source file, for messages."""
        if self.places is not None:
            return self.places.at(row, column)
        return SourceRef(self.source, self.first_data_line + row, column)

    def place(self, row: int) -> str:
        """Data row ``row`` as a reader finds it: 'line 12', or 'row 12 of sheet ...'."""
        if self.places is not None:
            return self.places.label(row)
        return f"line {self.line_of(row)}"

    def span(self, first: int, last: int) -> str:
        """Data rows ``first`` to ``last``: 'lines 5 to 9', or their rows in a workbook."""
        if self.places is None:
            return f"lines {self.line_of(first)} to {self.line_of(last)}"
        return f"{self.place(first)} to {self.place(last)}"

    @property
    def cell_id(self) -> str:
        return self.metadata.get("cell_id", "")

    @property
    def lot(self) -> str:
        return self.metadata.get("lot", "")

    @property
    def cell_type(self) -> str:
        return self.metadata.get("cell_type", "")


class StepKind(enum.Enum):
    REST = "rest"
    CHARGE = "charge"
    DISCHARGE = "discharge"


class StepMode(enum.Enum):
    """How the step was controlled: constant current, constant voltage, or neither (rest)."""

    CC = "cc"
    CV = "cv"
    NONE = "none"


@dataclass(frozen=True, slots=True)
class Step:
    """A run of consecutive rows with one kind and mode: rows ``start`` to ``stop - 1``.

    ``capacity_ah`` is the trapezoid integral of |I| dt over the step's own rows
    (0 for rest); ``energy_wh`` likewise of V|I| dt. ``program_step`` is the file's
    ``step`` number when the file has one.
    """

    index: int
    kind: StepKind
    mode: StepMode
    start: int
    stop: int
    start_s: float
    end_s: float
    capacity_ah: float
    energy_wh: float
    mean_current_a: float
    program_step: int | None = None

    @property
    def duration_s(self) -> float:
        return self.end_s - self.start_s

    @property
    def rows(self) -> int:
        return self.stop - self.start


@dataclass(frozen=True, slots=True)
class Cycle:
    """One charge followed by one discharge: the indices of its steps, in time order.

    ``index`` is 1-based. A cycle may lack its discharge (a file that ends on a
    charge, e.g. to storage state of charge); it is then incomplete.
    """

    index: int
    charge_steps: tuple[int, ...]
    discharge_steps: tuple[int, ...]
    program_cycle: int | None = None

    @property
    def complete(self) -> bool:
        return bool(self.charge_steps) and bool(self.discharge_steps)


@dataclass(frozen=True, slots=True)
class AccuracyClass:
    """The accuracy a cycler channel is specified to: each number the half-width of the error
    its maker guarantees, taken as a rectangular distribution (JCGM 100:2008 4.3.7).

    Voltage ±(``voltage_pct_of_reading`` % of the reading + ``voltage_mv`` mV); current
    ±(``current_pct_of_reading`` % of the reading + ``current_pct_of_range`` % of the
    channel's range ``current_range_a``: None takes the largest current of the record,
    rounded up to the 1-2-5 series, as the range); temperature ±``temperature_k`` K; the
    time base ±``time_ppm`` parts per million. ``source`` says where it was declared.
    The defaults are a usual class of formation channels (common practice).
    """

    voltage_pct_of_reading: float = 0.02
    voltage_mv: float = 1.0
    current_pct_of_reading: float = 0.02
    current_pct_of_range: float = 0.02
    current_range_a: float | None = None
    temperature_k: float = 1.0
    time_ppm: float = 50.0
    source: str = "default class, common practice"


DEFAULT_ACCURACY = AccuracyClass()


@dataclass(frozen=True, slots=True)
class ChannelClasses:
    """Accuracy classes declared for the channels of one inbox: the first whose channel
    pattern (shell-style, as ``fnmatch``) matches the record's ``channel`` metadata, else
    ``default`` (the inbox's own class; None: not declared)."""

    patterns: tuple[tuple[str, AccuracyClass], ...] = ()
    default: AccuracyClass | None = None

    def choose(self, channel: str | None) -> AccuracyClass | None:
        if channel:
            for pattern, accuracy in self.patterns:
                if fnmatch.fnmatchcase(channel, pattern):
                    return accuracy
        return self.default


@dataclass(frozen=True, slots=True)
class CurrentBand:
    """How rest was told from current in one file: rows with |I - offset_a| <= threshold_a are rest.

    ``offset_a`` is the channel's zero offset and ``noise_a`` the robust rms spread of its
    current at rest (1.4826 x the median absolute deviation), both estimated from the
    ``rows`` samples near zero current; ``floor_a`` is the rule set's ``rest_current_C``
    times the nominal capacity. ``threshold_a`` is the larger of the floor and a multiple
    of the noise, so that noise at rest can never make a step. ``offset_u_a`` is the
    standard uncertainty of the offset estimate; ``corrected``: the offset was taken out
    of every row of the current before steps were told and charge was counted
    (rest_band.take_out_offset), so the band is centred on zero (``centre_a``).
    """

    offset_a: float
    noise_a: float
    threshold_a: float
    floor_a: float
    rows: int
    offset_u_a: float = 0.0
    corrected: bool = False

    @property
    def centre_a(self) -> float:
        """Where rest lies in the current as analysed: zero once the offset is taken out."""
        return 0.0 if self.corrected else self.offset_a


@dataclass(frozen=True, slots=True)
class Segmentation:
    """The steps and cycles of one trace, plus notes (e.g. disagreement with the file's step column)."""

    steps: tuple[Step, ...]
    cycles: tuple[Cycle, ...]
    notes: tuple[Note, ...] = ()
    band: CurrentBand | None = None


@dataclass(frozen=True, slots=True)
class Plateau:
    """A flat run of the grading discharge V(q), q in % of that discharge's capacity."""

    start_pct: float
    end_pct: float
    voltage_v: float
    length_ah: float

    @property
    def length_pct(self) -> float:
        return self.end_pct - self.start_pct


@dataclass(frozen=True, slots=True)
class PlateauSettings:
    """Plateau detection parameters from the rule set (docs/metrics.md, "Plateaus").

    ``flatness_mv_per_pct``: |dV/dq| threshold in mV per 1 % of capacity.
    ``min_length_pct``: shortest run that counts. ``merge_gap_pct``: runs closer
    than this merge. ``smoothing_pct``: Savitzky-Golay window as % of capacity.
    ``grid_points``: uniform q grid size. ``ica_bin_mv``: voltage bin for dQ/dV.
    """

    flatness_mv_per_pct: float = 5.0
    min_length_pct: float = 5.0
    merge_gap_pct: float = 1.0
    smoothing_pct: float = 3.0
    grid_points: int = 1001
    ica_bin_mv: float = 5.0
    ica_min_prominence_ah_per_v: float = 0.0


@dataclass(frozen=True, slots=True)
class Curve:
    """A sampled curve for plotting: x and y arrays of equal length (read-only)."""

    x: FloatArray
    y: FloatArray

    def __post_init__(self) -> None:
        object.__setattr__(self, "x", frozen_array(self.x))
        object.__setattr__(self, "y", frozen_array(self.y))
        if len(self.x) != len(self.y):
            raise ValueError("Curve x and y differ in length")


@dataclass(frozen=True, slots=True)
class StepSpan:
    """Where one step lies on the record's time axis (hours since the record began)."""

    start_h: float
    end_h: float
    kind: StepKind


@dataclass(frozen=True, slots=True)
class RecordView:
    """The whole record thinned for drawing: V, I and T against hours since it began, and its steps."""

    voltage: Curve
    current: Curve
    temperature: Curve | None
    steps: tuple[StepSpan, ...]


@dataclass(frozen=True, slots=True)
class PulseView:
    """The DCIR pulse for drawing: V against seconds from the rest-to-discharge switch.

    ``before_v`` is the voltage before the switch (the rest's median over its last
    ``rest_s`` seconds), ``at_v`` the fitted voltage ``pulse_s`` into the discharge (the
    line fitted from ``fit_from_s`` to ``fit_to_s``), ``current_a`` the pulse's |I|.
    """

    voltage: Curve
    before_v: float
    at_v: float
    pulse_s: float
    rest_s: float
    fit_from_s: float
    fit_to_s: float
    current_a: float


@dataclass(frozen=True, slots=True)
class RestView:
    """The final rest for drawing: V against hours since the rest began, and its drift fit.

    The fit starts at ``fit_from_h`` (the relaxation left out) at ``fit_v`` volts and
    falls or rises by ``slope_mv_per_h``; it is the line the drift metric is the slope of.
    """

    voltage: Curve
    fit_from_h: float
    fit_v: float
    slope_mv_per_h: float
    slope_u_mv_per_h: float = 0.0  # the slope's standard error from the fit's residuals


@dataclass(frozen=True, slots=True)
class CycleMetrics:
    """Per-cycle metrics exactly as docs/metrics.md defines them (None where not applicable)."""

    index: int
    charge_capacity_ah: float
    discharge_capacity_ah: float | None
    coulombic_efficiency: float | None
    discharge_energy_wh: float | None
    mean_discharge_voltage_v: float | None
    max_charge_voltage_v: float | None
    min_discharge_voltage_v: float | None
    cv_duration_s: float
    max_temperature_c: float | None


@dataclass(frozen=True, slots=True)
class CellMetrics:
    """Everything measured on one cell.

    ``values`` maps each cell-level metric name (the JSON key, e.g.
    ``grading_capacity_Ah``) to its value, or None when it could not be measured;
    rules address metrics by these names. ``grading_curve`` is V (y) against
    discharged capacity in % (x) of the grading discharge; ``ica_curve`` is dQ/dV
    in Ah/V (y) against V (x).
    """

    values: Mapping[str, float | None]
    cycles: tuple[CycleMetrics, ...]
    plateaus: tuple[Plateau, ...]
    ica_peaks_v: tuple[float, ...]
    grading_curve: Curve | None = None
    ica_curve: Curve | None = None
    notes: tuple[Note, ...] = ()
    record: RecordView | None = None  # for the certificate's evidence plots
    rest: RestView | None = None
    grading_cycle: int | None = None  # the index of the cycle graded (CycleMetrics.index)
    # what the data's own scatter gives a metric's uncertainty (Type A, JCGM 100 4.2), by
    # name: a metric's standard error, or a "<metric>_per_V_of_noise" sensitivity to the
    # voltage's row noise, before the channel's accuracy class is added (uncertainty.py)
    scatter: Mapping[str, float] = field(default_factory=dict)
    # expanded uncertainty U (k = 2) of each metric that has one, by name (uncertainty.py)
    uncertainty: Mapping[str, float] = field(default_factory=dict)
    pulse: PulseView | None = None  # the DCIR pulse, for a failed DCIR check's evidence plot

    def __post_init__(self) -> None:
        object.__setattr__(self, "values", frozen_mapping(self.values))
        object.__setattr__(self, "scatter", frozen_mapping(self.scatter))
        object.__setattr__(self, "uncertainty", frozen_mapping(self.uncertainty))
