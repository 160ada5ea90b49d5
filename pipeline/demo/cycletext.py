"""Write a simulated record as cycle-file text, or as the Trace a reader would make of that text.

Pure: a record and its metadata in, text out, in the fixed formats of cycle file version 1
(``# key: value`` lines, a header row, one row per sample). Simulating the record is left
to :mod:`pipeline.demo.synth`, writing files to lots.py; reading them back is the reader's
(:mod:`pipeline.read.cyclefile`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Protocol

from pipeline.demo.synth import SimulatedRecord
from pipeline.model import FloatArray, IntArray, Trace

COLUMNS = ("time_s", "voltage_V", "current_A", "temperature_C")
STEP_COLUMNS = ("step", "cycle")


class Columns(Protocol):
    """What a cycle file is written from: a SimulatedRecord, or any record with these arrays."""

    @property
    def time_s(self) -> FloatArray: ...
    @property
    def voltage_v(self) -> FloatArray: ...
    @property
    def current_a(self) -> FloatArray: ...
    @property
    def temperature_c(self) -> FloatArray: ...
    @property
    def step(self) -> IntArray: ...
    @property
    def cycle(self) -> IntArray: ...


def to_cycle_file(record: Columns, metadata: Mapping[str, str], *,
                  include_step_columns: bool = True) -> str:
    """Cycle file version 1 text: ``# key: value`` lines, a header row, one row per sample.

    Fixed formats: time %.1f s, voltage %.5f V, current %.5f A, temperature %.2f degC.

    >>> import numpy as np
    >>> from pipeline.demo.cellmodel import CellRecipe
    >>> from pipeline.demo.synth import simulate_formation
    >>> rec = simulate_formation(CellRecipe(), np.random.default_rng(1))
    >>> to_cycle_file(rec, {"cell_id": "X1"}).splitlines()[:2]
    ['# cell_id: X1', 'time_s,voltage_V,current_A,temperature_C,step,cycle']
    """
    lines = []
    for key, value in metadata.items():
        if not key or any(c in key for c in ":\r\n") or key != key.strip():
            raise ValueError(f"metadata key {key!r} cannot be written as '# key: value'")
        if any(c in value for c in "\r\n"):
            raise ValueError(f"metadata value of {key!r} contains a line break")
        lines.append(f"# {key}: {value}")
    header = COLUMNS + (STEP_COLUMNS if include_step_columns else ())
    lines.append(",".join(header))
    columns = [
        [f"{v:.1f}" for v in record.time_s.tolist()],
        [f"{v:.5f}" for v in record.voltage_v.tolist()],
        [f"{v:.5f}" for v in record.current_a.tolist()],
        [f"{v:.2f}" for v in record.temperature_c.tolist()],
    ]
    if include_step_columns:
        columns += [[str(v) for v in record.step.tolist()], [str(v) for v in record.cycle.tolist()]]
    lines.extend(",".join(row) for row in zip(*columns, strict=True))
    return "\n".join(lines) + "\n"


def to_trace(
    record: SimulatedRecord, metadata: Mapping[str, str], source: str = "simulated"
) -> Trace:
    """The record as the shared Trace a reader would produce from its cycle file."""
    return Trace(
        source=source,
        metadata=metadata,
        time_s=record.time_s,
        voltage_v=record.voltage_v,
        current_a=record.current_a,
        temperature_c=record.temperature_c,
        step=record.step,
        cycle=record.cycle,
        first_data_line=len(metadata) + 2,
    )
