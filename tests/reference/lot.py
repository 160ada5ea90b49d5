"""Load the reference lot (tests/data/reference_lot): its truths, and each cell resampled.

The fixture is the noiseless output of a PyBaMM SPMe simulation (make_reference_lot.py,
README.md beside this file). :func:`load_cell` resamples a cell onto the uniform sampling
a cycler channel would log at ``interval_s``, step by step, so that tests can add the
project's own cycler noise to it and judge the result against the truths.
"""

from __future__ import annotations

import gzip
import io
import json
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.interpolate import PchipInterpolator

FIXTURE_DIR = Path(__file__).resolve().parent.parent / "data" / "reference_lot"
TRUTH_FILE = FIXTURE_DIR / "truth.json"

REFERENCE_CELLS: tuple[str, ...] = (
    "nmc_normal_1",
    "nmc_normal_2",
    "nmc_normal_3",
    "nmc_normal_4",
    "nmc_low_capacity",
    "nmc_high_dcir",
    "nmc_internal_short",
    "nmc_lithium_plating",
    "lfp_normal_1",
    "lfp_normal_2",
    "lfp_normal_3",
    "lfp_normal_4",
    "lfp_low_first_cycle_efficiency",
    "lfp_over_temperature",
    "lfp_missing_plateau",
)

# A cycler logs a step's first sample just after the switch; the fixture's own first row of
# a step is 1 ms after it, so this sample is interpolated, never extrapolated.
FIRST_SAMPLE_S = 0.1
# A grid sample closer than this to a step's end is left out, so that times written with
# 0.1 s resolution stay strictly increasing.
END_GUARD_S = 0.2
MIN_INTERVAL_S = 1.0
MAX_INTERVAL_S = 10.0

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


@dataclass(frozen=True)
class ReferenceRecord:
    """One reference cell resampled: the file's metadata, its columns, and its truth entry.

    Units: s, V, A (positive = charge), degC; ``step`` and ``cycle`` are the program's.
    """

    name: str
    interval_s: float
    metadata: Mapping[str, str]
    time_s: FloatArray
    voltage_v: FloatArray
    current_a: FloatArray
    temperature_c: FloatArray
    step: IntArray
    cycle: IntArray
    truth: Mapping[str, Any]

    def __post_init__(self) -> None:
        for name in ("time_s", "voltage_v", "current_a", "temperature_c", "step", "cycle"):
            getattr(self, name).setflags(write=False)


@cache
def load_truth() -> Mapping[str, Any]:
    """truth.json as a dict: ``pybamm_version`` and ``cells`` (one entry per cell name)."""
    document: dict[str, Any] = json.loads(TRUTH_FILE.read_text(encoding="utf-8"))
    return document


def fixture_path(name: str) -> Path:
    """The cell's fixture file (``<name>.csv.gz``); ValueError for an unknown name."""
    if name not in REFERENCE_CELLS:
        raise ValueError(f"no reference cell {name!r}; use one of {', '.join(REFERENCE_CELLS)}")
    return FIXTURE_DIR / f"{name}.csv.gz"


def read_fixture(name: str) -> tuple[dict[str, str], FloatArray]:
    """The fixture as written: its metadata and its rows (time, V, I, T, step, cycle)."""
    text = gzip.decompress(fixture_path(name).read_bytes()).decode("ascii")
    metadata: dict[str, str] = {}
    lines = text.splitlines()
    body_start = 0
    for number, line in enumerate(lines):
        if line.startswith("# "):
            key, _, value = line[2:].partition(": ")
            metadata[key] = value
        else:
            body_start = number + 1  # this line is the header
            break
    rows = np.loadtxt(io.StringIO("\n".join(lines[body_start:])), delimiter=",", dtype=np.float64)
    return metadata, rows


def sample_times(start_s: float, end_s: float, interval_s: float) -> FloatArray:
    """A step's sampling: 0.1 s after its start, every ``interval_s`` from its start, its end."""
    grid = start_s + np.arange(1, int((end_s - start_s) / interval_s) + 2) * interval_s
    grid = grid[grid < end_s - END_GUARD_S]
    first = min(start_s + FIRST_SAMPLE_S, end_s)
    return np.unique(np.concatenate(([first], grid, [end_s])))


def load_cell(name: str, interval_s: float) -> ReferenceRecord:
    """The cell resampled to ``interval_s`` (1-10 s) within each program step.

    Each step is sampled from its start (the previous step's last row; the first row for
    step 1): 0.1 s in, then every ``interval_s``, then the step's end. Voltage, current and
    temperature are interpolated by a monotone cubic (PCHIP) through the step's own rows
    only, never across a step boundary, where the voltage jumps with the current.
    """
    if not MIN_INTERVAL_S <= interval_s <= MAX_INTERVAL_S:
        raise ValueError(f"interval_s must lie in {MIN_INTERVAL_S:g}-{MAX_INTERVAL_S:g} s, "
                         f"not {interval_s!r}")
    metadata, rows = read_fixture(name)
    time, volts, amps, temps = rows[:, 0], rows[:, 1], rows[:, 2], rows[:, 3]
    steps = rows[:, 4].astype(np.int64)
    cycles = rows[:, 5].astype(np.int64)
    bounds = np.flatnonzero(np.diff(steps)) + 1
    starts = np.concatenate(([0], bounds))
    stops = np.concatenate((bounds, [len(steps)]))
    parts: dict[str, list[Any]] = {k: [] for k in ("t", "v", "i", "temp", "step", "cycle")}
    for k, (a, b) in enumerate(zip(starts, stops, strict=True)):
        start_s = time[a] if k == 0 else time[a - 1]
        t = sample_times(float(start_s), float(time[b - 1]), interval_s)
        rows_t = time[a:b]
        for key, column in (("v", volts), ("i", amps), ("temp", temps)):
            parts[key].append(PchipInterpolator(rows_t, column[a:b], extrapolate=False)(t))
        parts["t"].append(t)
        parts["step"].append(np.full(len(t), steps[a]))
        parts["cycle"].append(np.full(len(t), cycles[a]))
    joined = {key: np.concatenate(value) for key, value in parts.items()}
    if not np.all(np.isfinite(joined["v"])):
        raise AssertionError(f"{name}: a sample fell outside its step's rows")
    return ReferenceRecord(
        name=name,
        interval_s=float(interval_s),
        metadata=metadata,
        time_s=joined["t"].astype(np.float64),
        voltage_v=joined["v"].astype(np.float64),
        current_a=joined["i"].astype(np.float64) + 0.0,
        temperature_c=joined["temp"].astype(np.float64),
        step=joined["step"].astype(np.int64),
        cycle=joined["cycle"].astype(np.int64),
        truth=load_truth()["cells"][name],
    )
