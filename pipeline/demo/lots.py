"""Write the invented demonstration lots: one cycle file per cell, a few of them gzip-compressed.

Three lots (LFP/graphite, NMC/graphite, sodium-ion NVPF/hard carbon). The lots, their cells
and their defects are our own invention (no real maker, product
or person). Building each cell's recipe and text is pure; only :func:`write_demo_lot`
touches the disk, writing each file under a hidden ``.part`` name first and renaming
it, so a watcher never claims half a file. The simulation itself is synth.py's (its cell
model cellmodel.py's, the split into stage records stages.py's, the text cycletext.py's).
"""

from __future__ import annotations

import dataclasses
import datetime
import gzip
import os
import pathlib
import zlib
from dataclasses import dataclass

import numpy as np

from pipeline.demo.aging import (
    NORMAL_SELF_DISCHARGE_MA,
    SLOW_SELF_DISCHARGE_FACTOR,
    AgingCell,
    aging_readings,
)
from pipeline.demo.cellmodel import CellRecipe, self_discharge_for_drift
from pipeline.demo.cycletext import to_cycle_file
from pipeline.demo.stages import StageRecords, split_stages, stage_metadata
from pipeline.demo.synth import SimulatedRecord, simulate_formation

STATION = "demo-line-1"
LFP_CELL_TYPE = "DEMO-LFP-20A"  # must match rules/lfp_graphite.toml
NMC_CELL_TYPE = "DEMO-NMC-5A"  # as declared in rules/nmc_graphite.toml
NA_CELL_TYPE = "DEMO-NA-10A"  # as declared in rules/sodium_hard_carbon.toml
# The same invented cell made on a line with an aging stage (rules/nmc_graphite.toml): its
# formation and grading come as two files, its aging readings in the lot's tester file.
STAGED_CELL_TYPE = "DEMO-NMC-5S"

DEFECTS = (
    "low_capacity",
    "low_first_cycle_efficiency",
    "high_dcir",
    "internal_short",
    "missing_plateau",
    "over_temperature",
)
# Cases that a review check (not a reject check) must catch: the cell is held, not failed.
REVIEW_CASES = ("slow_drift",)
# The sodium-ion lot's defects, each one a reject check of rules/sodium_hard_carbon.toml catches.
SODIUM_DEFECTS = ("internal_short", "sodium_plating", "high_dcir")


@dataclass(frozen=True, slots=True)
class DemoCell:
    """One invented cell of a demo lot; ``defect`` is "" for a normal cell (see DEFECTS)."""

    cell_id: str
    lot: str
    cell_type: str
    channel: str
    started_at: str  # fixed ISO 8601 time, never the clock
    defect: str = ""
    compressed: bool = False
    contact_mohm: float = 0.0  # a worn contact of its channel, in series with the cell

    @property
    def file_name(self) -> str:
        return f"{self.lot}_{self.cell_id}.csv" + (".gz" if self.compressed else "")


def _lot(
    lot: str,
    cell_type: str,
    prefix: str,
    day: str,
    defects: tuple[str, ...],
    normal: int,
    compressed: tuple[int, ...],
) -> tuple[DemoCell, ...]:
    kinds = ("",) * normal + defects
    return tuple(
        DemoCell(
            cell_id=f"{prefix}-{n:03d}",
            lot=lot,
            cell_type=cell_type,
            channel=f"{1 + (n - 1) // 8}-{1 + (n - 1) % 8:02d}",
            started_at=f"{day}T06:{n:02d}:00+00:00",
            defect=kind,
            compressed=n in compressed,
        )
        for n, kind in enumerate(kinds, start=1)
    )


# Lot DEMO-LOT-01: eight normal LFP/graphite cells, one of each defect; cell 3 gzip-compressed.
DEMO_CELLS: tuple[DemoCell, ...] = _lot(
    "DEMO-LOT-01",
    LFP_CELL_TYPE,
    "L01",
    "2026-03-02",
    DEFECTS + REVIEW_CASES,
    normal=8,
    compressed=(3,),
)
# Optional second lot, NMC811/graphite 5 Ah: five normal cells, an internal short, a high DCIR.
DEMO_NMC_CELLS: tuple[DemoCell, ...] = _lot(
    "DEMO-LOT-02",
    NMC_CELL_TYPE,
    "N02",
    "2026-03-03",
    ("internal_short", "high_dcir"),
    normal=5,
    compressed=(2,),
)
# Third lot, sodium-ion NVPF/hard carbon 10 Ah: five normal cells, an internal short, sodium
# plating (a low coulombic efficiency), a high DCIR.
DEMO_NA_CELLS: tuple[DemoCell, ...] = _lot(
    "DEMO-LOT-03",
    NA_CELL_TYPE,
    "NA3",
    "2026-03-04",
    SODIUM_DEFECTS,
    normal=5,
    compressed=(4,),
)
# Every demo lot, in the order the demo hands them over.
ALL_DEMO_CELLS: tuple[DemoCell, ...] = DEMO_CELLS + DEMO_NMC_CELLS + DEMO_NA_CELLS
# Lot DEMO-LOT-04, on a line with an aging stage: 22 normal NMC cells, one of low capacity, and
# one that loses charge five times faster on the shelf: its K-value stays inside the window,
# but far out of its lot. Each cell comes as a formation file and a grading file, the lot's
# aging readings as one tester file.
SLOW_SELF_DISCHARGE = "slow_self_discharge"
DEMO_STAGED_CELLS: tuple[DemoCell, ...] = _lot(
    "DEMO-LOT-04",
    STAGED_CELL_TYPE,
    "S04",
    "2026-03-05",
    ("low_capacity", SLOW_SELF_DISCHARGE),
    normal=22,
    compressed=(),
)
# Lot DEMO-LOT-05, on a rack of four channels that each test ten LFP cells in turn: from its
# third cell on, channel 5-03's contact wears and its resistance rises by 2.5 mOhm a cell, so
# that from its fourth cell on the cells it tests fail the DC resistance check (8 mOhm) though
# nothing is wrong with them. The station's channel screen flags the channel.
WORN_CONTACT_CHANNEL = "5-03"
WORN_FROM_TURN = 3
CHANNEL_LOT_CHANNELS = 4
CHANNEL_LOT_TURNS = 10
CHANNEL_PROGRAM_H = 18  # a channel starts its next cell this long after the last (our own)


def _channel_lot() -> tuple[DemoCell, ...]:
    start = datetime.datetime(2026, 3, 6, 6, 0, tzinfo=datetime.UTC)
    cells = []
    for n in range(1, CHANNEL_LOT_CHANNELS * CHANNEL_LOT_TURNS + 1):
        slot, turn = (n - 1) % CHANNEL_LOT_CHANNELS + 1, (n - 1) // CHANNEL_LOT_CHANNELS + 1
        channel = f"5-{slot:02d}"
        worn = channel == WORN_CONTACT_CHANNEL and turn >= WORN_FROM_TURN
        at = start + datetime.timedelta(hours=CHANNEL_PROGRAM_H * (turn - 1), minutes=5 * slot)
        cells.append(DemoCell(f"L05-{n:03d}", "DEMO-LOT-05", LFP_CELL_TYPE, channel, at.isoformat(),
                              contact_mohm=2.5 * (turn - WORN_FROM_TURN + 1) if worn else 0.0))
    return tuple(cells)


DEMO_CHANNEL_CELLS: tuple[DemoCell, ...] = _channel_lot()
AGING_START = "2026-03-09T08:00:00+00:00"  # the first reading, after formation
AGING_DAYS = 7.0
GRADING_AFTER_AGING_H = 2.0  # a cell goes from the shelf to its grading channel in this

# Cell-type baselines (our own invented cells): capacity is set about 2 % above nominal, as
# rated capacity is usually a few percent below typical (common practice).
_BASE = {
    LFP_CELL_TYPE: CellRecipe(
        chemistry="lfp_graphite",
        nominal_capacity_ah=20.0,
        capacity_factor=1.02,
        resistance_ohm=0.004,
        polarisation_ohm=0.002,
        first_cycle_loss_fraction=0.09,
        self_discharge_a=0.0005,
        thermal_resistance_k_per_w=3.0,
        thermal_time_constant_s=1800.0,
    ),
    NMC_CELL_TYPE: CellRecipe(
        chemistry="nmc_graphite",
        nominal_capacity_ah=5.0,
        capacity_factor=1.02,
        resistance_ohm=0.020,
        polarisation_ohm=0.010,
        first_cycle_loss_fraction=0.10,
        self_discharge_a=0.0001,
        thermal_resistance_k_per_w=8.0,
        thermal_time_constant_s=900.0,
    ),
    # First-cycle loss 13 %: hard carbon in sodium-ion cells reaches 80-90 % first-cycle
    # efficiency (from memory, medium). Resistances of our own, between the two types above.
    NA_CELL_TYPE: CellRecipe(
        chemistry="nvpf_hard_carbon",
        nominal_capacity_ah=10.0,
        capacity_factor=1.02,
        resistance_ohm=0.008,
        polarisation_ohm=0.004,
        first_cycle_loss_fraction=0.13,
        self_discharge_a=0.0002,
        thermal_resistance_k_per_w=5.0,
        thermal_time_constant_s=1200.0,
    ),
}
_BASE[STAGED_CELL_TYPE] = _BASE[NMC_CELL_TYPE]
# Internal-short drift after relaxation and over-temperature peak of the defect cells.
SHORT_DRIFT_MV_PER_H = -3.0
# A drift between the LFP rule set's review (-0.5) and reject (-2) limits: held for review.
SLOW_DRIFT_MV_PER_H = -1.0
OVER_TEMPERATURE_C = 62.0
# DCIR multiple of the high-resistance cell, well beyond the type's usual +-5 % spread.
_HIGH_DCIR_FACTOR = {
    LFP_CELL_TYPE: 2.5, NMC_CELL_TYPE: 3.5, STAGED_CELL_TYPE: 3.5, NA_CELL_TYPE: 2.5
}
# Part of each charge lost to sodium plated on the hard carbon: the grading cycle returns about
# 93 % of its charge, below the sodium rule set's 95 % (our own size).
PLATING_SIDE_FRACTION = 0.07


def _seed_for(cell: DemoCell, seed: int) -> np.random.Generator:
    return np.random.default_rng([seed, zlib.crc32(cell.cell_id.encode("utf-8"))])


def demo_recipe(cell: DemoCell, rng: np.random.Generator) -> CellRecipe:
    """The cell's recipe: the type's baseline, lot spread (capacity +-1 %, R +-5 %), its defect."""
    base = _BASE[cell.cell_type]
    capacity, resistance, loss = (float(v) for v in rng.uniform(-1.0, 1.0, 3))
    recipe = dataclasses.replace(
        base,
        capacity_factor=base.capacity_factor * (1 + 0.01 * capacity),
        resistance_ohm=base.resistance_ohm * (1 + 0.05 * resistance),
        polarisation_ohm=base.polarisation_ohm * (1 + 0.05 * resistance),
        first_cycle_loss_fraction=base.first_cycle_loss_fraction + 0.005 * loss,
        ambient_swing_c=0.3,  # a formation room held within a few tenths of a degree (our own)
    )
    if cell.contact_mohm:  # the channel's, not the cell's: in series with whatever the cell is
        worn = recipe.resistance_ohm + cell.contact_mohm / 1000.0
        recipe = dataclasses.replace(recipe, resistance_ohm=worn)
    match cell.defect:
        case "" | "slow_self_discharge":  # the latter leaks on the shelf (demo_aging_file)
            return recipe
        case "low_capacity":
            return dataclasses.replace(recipe, capacity_factor=0.90)
        case "low_first_cycle_efficiency":
            return dataclasses.replace(recipe, first_cycle_loss_fraction=0.22)
        case "high_dcir":
            factor = _HIGH_DCIR_FACTOR[cell.cell_type]
            return dataclasses.replace(
                recipe,
                resistance_ohm=factor * recipe.resistance_ohm,
                polarisation_ohm=factor * recipe.polarisation_ohm,
            )
        case "internal_short":
            leak_a = self_discharge_for_drift(recipe, SHORT_DRIFT_MV_PER_H)
            return dataclasses.replace(recipe, self_discharge_a=leak_a)
        case "slow_drift":
            leak_a = self_discharge_for_drift(recipe, SLOW_DRIFT_MV_PER_H)
            return dataclasses.replace(recipe, self_discharge_a=leak_a)
        case "sodium_plating":
            return dataclasses.replace(recipe, charge_side_fraction=PLATING_SIDE_FRACTION)
        case "missing_plateau":
            return dataclasses.replace(recipe, sloped_fraction=1.0)
        case "over_temperature":
            heat_w = (OVER_TEMPERATURE_C - recipe.ambient_c) / recipe.thermal_resistance_k_per_w
            return dataclasses.replace(recipe, fault_heat_w=heat_w)
    raise ValueError(f"unknown demo defect {cell.defect!r}")


def demo_metadata(cell: DemoCell) -> dict[str, str]:
    chemistry = _BASE[cell.cell_type].chemistry.split("_")[0]
    return {
        "cell_id": cell.cell_id,
        "lot": cell.lot,
        "cell_type": cell.cell_type,
        "channel": cell.channel,
        "station": STATION,
        "program": f"{chemistry}-formation-grading-v1",
        "started_at": cell.started_at,
    }


def demo_record(cell: DemoCell, seed: int = 2026) -> SimulatedRecord:
    """Simulate one demo cell (pure, deterministic for a seed)."""
    rng = _seed_for(cell, seed)
    return simulate_formation(demo_recipe(cell, rng), rng)


def demo_file_bytes(cell: DemoCell, seed: int = 2026) -> bytes:
    """The bytes of the cell's cycle file (gzip with a zero timestamp, so bytes repeat)."""
    data = to_cycle_file(demo_record(cell, seed), demo_metadata(cell)).encode("utf-8")
    return gzip.compress(data, mtime=0) if cell.compressed else data


def write_demo_lot(
    folder: pathlib.Path, *, seed: int = 2026, cells: tuple[DemoCell, ...] = DEMO_CELLS
) -> list[pathlib.Path]:
    """Write one cycle file per cell into ``folder`` (created if needed); return their paths.

    Each file appears atomically: written as ``.<name>.part``, then renamed.
    """
    folder = pathlib.Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for cell in cells:
        target = folder / cell.file_name
        part = folder / f".{cell.file_name}.part"
        part.write_bytes(demo_file_bytes(cell, seed))
        os.replace(part, target)
        paths.append(target)
    return paths


# The two stages a demo cell's record may be written as, one file each.
FILE_STAGES = ("formation", "grading")


def demo_stage_records(cell: DemoCell, seed: int = 2026) -> StageRecords:
    """The cell's record (:func:`demo_record`) as a formation and a grading record.

    The formation record's storage charge reads the channel with its own generator, so
    the whole record stays what :func:`demo_record` gives.
    """
    rng = np.random.default_rng([seed, zlib.crc32(f"{cell.cell_id} formation".encode())])
    return split_stages(demo_record(cell, seed), rng)


def stage_file_name(cell: DemoCell, stage: str) -> str:
    """The file name of one stage of the cell: ``<lot>_<cell_id>_<stage>.csv`` (no gzip)."""
    return f"{cell.lot}_{cell.cell_id}_{stage}.csv"


def stage_started_at(cell: DemoCell, stage: str) -> str:
    """When the cell's ``stage`` program started: formation at the cell's own start, grading
    after the lot's last aging reading (formation, then aging on the shelf, then grading),
    in the same order of cells."""
    if stage == "formation":
        return cell.started_at
    formed = datetime.datetime.fromisoformat(cell.started_at)
    shelf_end = datetime.datetime.fromisoformat(AGING_START) + datetime.timedelta(days=AGING_DAYS)
    at = shelf_end + datetime.timedelta(hours=GRADING_AFTER_AGING_H, minutes=formed.minute)
    return at.isoformat()


def demo_stage_files(cell: DemoCell, seed: int = 2026) -> dict[str, bytes]:
    """The cell's formation file and grading file, stage -> bytes, each saying its stage and
    when it started (:func:`stage_started_at`)."""
    records = demo_stage_records(cell, seed)
    chemistry = _BASE[cell.cell_type].chemistry.split("_")[0]
    out = {}
    for stage, record in zip(FILE_STAGES, (records.formation, records.grading), strict=True):
        metadata = {**demo_metadata(cell), "program": f"{chemistry}-{stage}-v1",
                    "started_at": stage_started_at(cell, stage)}
        out[stage] = to_cycle_file(record, stage_metadata(metadata, stage)).encode("utf-8")
    return out


def demo_aging_file(cells: tuple[DemoCell, ...] = DEMO_STAGED_CELLS, seed: int = 2026) -> bytes:
    """The lot's tester file: two open-circuit readings of every cell, AGING_DAYS apart.

    Each cell rests at a storage charge of 38-42 % and loses charge through its own small
    leak (pipeline.demo.aging); the slow self-discharger's leak is five times the usual.
    """
    rng = np.random.default_rng([seed, zlib.crc32(b"aging")])
    shelf = []
    for cell in cells:
        leak = NORMAL_SELF_DISCHARGE_MA * float(rng.normal(1.0, 0.1))
        if cell.defect == SLOW_SELF_DISCHARGE:
            leak = NORMAL_SELF_DISCHARGE_MA * SLOW_SELF_DISCHARGE_FACTOR
        shelf.append(
            AgingCell(
                cell_id=cell.cell_id,
                lot=cell.lot,
                cell_type=cell.cell_type,
                curve="nmc811_graphite",
                storage_soc=float(rng.uniform(0.38, 0.42)),
                self_discharge_ma=max(leak, 0.0),
                capacity_ah=_BASE[cell.cell_type].nominal_capacity_ah,
            )
        )
    start = datetime.datetime.fromisoformat(AGING_START)
    return aging_readings(shelf, start=start, days=AGING_DAYS, seed=seed)
