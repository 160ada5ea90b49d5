"""Invented OCV tester files for the demo: each cell read at the start and the end of aging.

Every cell, lot and tester here is our own invention. A cell rests on the shelf at its
storage state of charge and loses charge through its self-discharge current; the tester
reads its open-circuit voltage from the cell's open-circuit curve (the published fits of
``pipeline.demo.ocp``: full-cell OCV = positive - negative at the stoichiometries of that
charge), with a meter's noise and resolution, plus an AC resistance and a shelf temperature.

The charge bookkeeping is the definition of the ampere-hour (1 Ah = 3600 C, the charge a
1 A current carries in one hour): over ``days`` the cell loses dQ = I_sd * t, so its state
of charge falls by dSOC = I_sd[A] * t[h] / C_nominal[Ah], and its OCV by the open-circuit
curve's fall over that span. The demo's OCV does not depend on temperature.

What a K-value shows depends on the curve's slope at the storage charge. On the NMC811/graphite
curve at 40 % the slope is about 0.7 V per unit SOC, so a 0.1 mA leak in a 5 Ah cell shows
as about 0.3 mV per day. On an LFP/graphite plateau dV/dSOC is tiny (about 0.02 V per unit
SOC at half charge on this demo's curve: the flat LFP curve less a graphite step), so the
same leak moves the OCV some thirty times less: K-values there are small, close to the
meter's noise, and a K limit for LFP has to be set from that cell type's own curve.
"""

from __future__ import annotations

import datetime
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import constants

from pipeline.demo import ocp
from pipeline.model import FloatArray

# The full-cell open-circuit curves a demo cell may follow (pipeline.demo.ocp's published fits).
CURVES: dict[str, Callable[[npt.ArrayLike], FloatArray]] = {
    "nmc811_graphite": ocp.nmc811_graphite_cell,
    "lfp_graphite": ocp.lfp_graphite_cell,
    "nmc811_lto": ocp.nmc811_lto_cell,
    "nvpf_hard_carbon": ocp.nvpf_hard_carbon_cell,
}

HOUR_S: float = float(constants.hour)  # 3600 s: 1 Ah = 3600 C by the definition of the ampere-hour
DAY_S: float = float(constants.day)  # 86400 s
# A healthy cell's self-discharge during aging, about 2-3 % of its charge a month for a 5 Ah
# cell (from memory); a slow self-discharger (a small internal short) leaks several times that.
NORMAL_SELF_DISCHARGE_MA = 0.1
SLOW_SELF_DISCHARGE_FACTOR = 5.0
# The OCV meter: 0.1 mV resolution, about 0.05 mV noise (from memory, a bench tester's class).
METER_RESOLUTION_MV = 0.1
METER_NOISE_MV = 0.05
ACIR_SPREAD = 0.03  # relative spread of a lot's 1 kHz resistance (our choice)
SHELF_TEMPERATURE_C = (23.0, 27.0)  # an aging room's band (common practice)
SECONDS_PER_CELL = 4.0  # the tester reads one cell after another


@dataclass(frozen=True, slots=True)
class AgingCell:
    """One invented cell on the aging shelf.

    ``curve`` names its open-circuit curve in CURVES; ``storage_soc`` is its state of charge
    (0-1) at the first reading; ``self_discharge_ma`` the constant current (mA) it loses
    charge through; ``capacity_ah`` its nominal capacity; ``acir_mohm`` its typical 1 kHz
    AC resistance (each reading spreads around it).
    """

    cell_id: str
    lot: str
    cell_type: str
    curve: str = "nmc811_graphite"
    storage_soc: float = 0.4
    self_discharge_ma: float = NORMAL_SELF_DISCHARGE_MA
    capacity_ah: float = 5.0
    acir_mohm: float = 20.0


def soc_after(cell: AgingCell, days: float) -> float:
    """The cell's state of charge ``days`` after its first reading: SOC0 - I*t / C."""
    lost_coulombs = cell.self_discharge_ma / 1000.0 * days * DAY_S  # dQ = I * t
    lost_ah = lost_coulombs / HOUR_S
    return cell.storage_soc - lost_ah / cell.capacity_ah


def true_ocv_v(cell: AgingCell, days: float) -> float:
    """The cell's open-circuit voltage (V) ``days`` after its first reading, without the meter."""
    return float(CURVES[cell.curve](soc_after(cell, days)))


def aging_readings(
    cells: Sequence[AgingCell],
    *,
    start: datetime.datetime,
    days: float,
    seed: int,
    noise_mv: float = METER_NOISE_MV,
    resolution_mv: float = METER_RESOLUTION_MV,
    tester: str = "DEMO-OCV-1",
    station: str = "demo-aging-1",
) -> bytes:
    """One tester file (OCV reading file, version 1) with two readings of every cell.

    The first reading at ``start`` (aware), the second ``days`` later, each cell a few
    seconds after the one before it. OCV: the cell's curve plus Gaussian meter noise of
    ``noise_mv``, rounded to ``resolution_mv``. Same seed, same bytes.
    """
    if start.utcoffset() is None:
        raise ValueError("start must carry its UTC offset")
    _check_cells(cells, days)
    rng = np.random.default_rng(seed)
    lots = sorted({c.lot for c in cells})
    head = ["# kind: ocv readings", f"# tester: {tester}", f"# station: {station}"]
    if len(lots) == 1:
        head.append(f"# lot: {lots[0]}")
    columns = ["cell_id", "time", "ocv_V", "acir_mOhm", "temperature_C", "cell_type"]
    if len(lots) > 1:
        columns.append("lot")
    rows = [
        _row(cell, start, i, day, rng, noise_mv, resolution_mv, len(lots) > 1)
        for day in (0.0, days)
        for i, cell in enumerate(cells)
    ]
    return ("\n".join([*head, ",".join(columns), *rows]) + "\n").encode("utf-8")


def demo_aging_lot(
    lot: str, count: int, *, slow: Sequence[int] = (), seed: int = 0
) -> tuple[AgingCell, ...]:
    """``count`` invented NMC811/graphite 5 Ah cells; those numbered in ``slow`` leak 5x faster.

    Normal cells' leaks spread by 10 % around NORMAL_SELF_DISCHARGE_MA, storage charge
    38-42 %, resistance 20 mOhm with the lot's spread (all our own choices).
    """
    rng = np.random.default_rng(seed)
    cells = []
    for n in range(1, count + 1):
        leak = NORMAL_SELF_DISCHARGE_MA * float(rng.normal(1.0, 0.1))
        if n in slow:
            leak = NORMAL_SELF_DISCHARGE_MA * SLOW_SELF_DISCHARGE_FACTOR
        cells.append(
            AgingCell(
                cell_id=f"{lot}-{n:03d}",
                lot=lot,
                cell_type="DEMO-NMC-5A",
                storage_soc=float(rng.uniform(0.38, 0.42)),
                self_discharge_ma=max(leak, 0.0),
            )
        )
    return tuple(cells)


def _check_cells(cells: Sequence[AgingCell], days: float) -> None:
    if not (math.isfinite(days) and days > 0):
        raise ValueError(f"days must be a positive number, not {days!r}")
    for cell in cells:
        if cell.curve not in CURVES:
            known = ", ".join(CURVES)
            raise ValueError(f"{cell.cell_id}: unknown curve {cell.curve!r} (one of {known})")
        if not 0.0 < soc_after(cell, days) <= cell.storage_soc <= 1.0:
            raise ValueError(f"{cell.cell_id}: storage charge and leak leave the 0-1 SOC range")


def _row(
    cell: AgingCell,
    start: datetime.datetime,
    index: int,
    day: float,
    rng: np.random.Generator,
    noise_mv: float,
    resolution_mv: float,
    with_lot: bool,
) -> str:
    """One reading's CSV row: the cell's OCV after ``day`` days, as the meter shows it."""
    at = start + datetime.timedelta(days=day, seconds=index * SECONDS_PER_CELL)
    ocv_mv = true_ocv_v(cell, day) * 1000.0
    if noise_mv:
        ocv_mv += float(rng.normal(0.0, noise_mv))
    shown_mv = round(ocv_mv / resolution_mv) * resolution_mv
    acir = cell.acir_mohm * float(rng.lognormal(0.0, ACIR_SPREAD))
    temperature = float(rng.uniform(*SHELF_TEMPERATURE_C))
    fields = [
        cell.cell_id,
        at.isoformat(timespec="seconds"),
        f"{shown_mv / 1000.0:.6f}",
        f"{acir:.2f}",
        f"{temperature:.1f}",
        cell.cell_type,
    ]
    return ",".join([*fields, cell.lot] if with_lot else fields)
