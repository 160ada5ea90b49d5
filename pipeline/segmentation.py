"""Cut a trace into rest / charge / discharge steps (CC or CV) and group them into cycles.

Pure: a Trace and a rest-current threshold in, a Segmentation out. When the file
carries the cycler's own ``step`` column its boundaries are used, and the current
is checked against them; otherwise steps come from current and voltage alone.
A *cycle* is the charge steps since the previous discharge followed by the
discharge steps up to the next charge (DESIGN.md). Measuring is left to metrics.py.
"""

from __future__ import annotations

import numpy as np

from pipeline.model import (
    Cycle,
    FloatArray,
    IntArray,
    Note,
    Segmentation,
    SourceRef,
    Step,
    StepKind,
    StepMode,
    Trace,
)

# Voltage band below the step's highest (charge) or above its lowest (discharge)
# voltage that counts as "held" in constant-voltage control, and the fraction of the
# constant current under which the current counts as decaying. Common practice:
# cyclers hold CV within a few mV; 5 % current decay is well clear of CC noise.
CV_BAND_V = 0.010
CV_CURRENT_FRACTION = 0.95
# Shortest constant-voltage tail that counts as a CV step (s): shorter is CC ripple.
MIN_CV_S = 30.0
# A step-column step whose rows disagree with its own kind on more than this
# fraction of rows earns a data-quality note (common practice, a proposal).
DISAGREE_FRACTION = 0.05


def sample_weights(time_s: FloatArray) -> FloatArray:
    """Per-row time weights (s) such that sum(w * y) is the trapezoid integral of y dt.

    Row i owns half of the interval before it and half of the one after, so
    integrals over consecutive row ranges add up exactly to the whole.

    >>> sample_weights(np.array([0.0, 10.0, 30.0])).tolist()
    [5.0, 15.0, 10.0]
    """
    n = len(time_s)
    w = np.zeros(n)
    if n < 2:
        return w
    dt = np.diff(time_s)
    w[:-1] += 0.5 * dt
    w[1:] += 0.5 * dt
    return w


def row_kinds(current_a: FloatArray, rest_current_a: float) -> IntArray:
    """+1 charge, -1 discharge, 0 rest for each row (|I| <= rest_current_a is rest)."""
    kinds = np.sign(current_a).astype(np.int64)
    kinds[np.abs(current_a) <= rest_current_a] = 0
    return kinds


def _runs(labels: IntArray) -> list[tuple[int, int]]:
    """(start, stop) of each maximal run of equal labels."""
    if len(labels) == 0:
        return []
    edges = np.flatnonzero(np.diff(labels)) + 1
    starts = np.concatenate(([0], edges))
    stops = np.concatenate((edges, [len(labels)]))
    return list(zip(starts.tolist(), stops.tolist(), strict=True))


def _absorb_blips(kinds: IntArray, time_s: FloatArray, min_s: float) -> IntArray:
    """Give runs lasting under ``min_s`` (and a single row) to the run before them.

    A single noisy sample around the rest threshold must not split a step in two.
    Runs of two rows or more are kept: at coarse sampling a real short pulse may
    be only a couple of rows long.
    """
    out = kinds.copy()
    for start, stop in _runs(kinds):
        if start == 0 or stop - start > 1:
            continue
        end_t = time_s[stop] if stop < len(time_s) else time_s[stop - 1]
        if end_t - time_s[start] < min_s:
            out[start:stop] = out[start - 1]
    return out


def _split_cv(
    voltage_v: FloatArray,
    current_a: FloatArray,
    time_s: FloatArray,
    start: int,
    stop: int,
    sign: int,
) -> int | None:
    """Row where a constant-voltage tail begins inside rows [start, stop), or None.

    The tail is the final run of rows whose voltage stays within CV_BAND_V of the
    step's extreme (highest for charge, lowest for discharge); within it, CV starts
    where |I| first falls below CV_CURRENT_FRACTION of the constant current.
    """
    v = voltage_v[start:stop] * sign
    i = np.abs(current_a[start:stop])
    if len(v) < 3:
        return None
    held = v >= v.max() - CV_BAND_V
    # last row that is not held, so the tail after it is held throughout
    not_held = np.flatnonzero(~held)
    tail = 0 if len(not_held) == 0 else int(not_held[-1]) + 1
    if tail >= len(v):
        return None
    # the constant current: the median before the held tail (of at most about 2,000 evenly
    # spaced rows: the same level to within the current's noise, without sorting hours of
    # samples for every step), or, for a program step that is CV throughout, the current
    # the step opened with
    stride = max(1, -(-tail // 2048))  # ceiling division
    i_cc = float(np.median(i[:tail:stride])) if tail > 0 else float(i[0])
    decaying = np.flatnonzero(i[tail:] < CV_CURRENT_FRACTION * i_cc)
    if len(decaying) == 0:
        return None
    # a block held at constant voltage from its first row is CV throughout
    cv_start = start if tail == 0 else start + tail + int(decaying[0])
    end_t = time_s[stop] if stop < len(time_s) else time_s[stop - 1]
    if end_t - time_s[cv_start] < MIN_CV_S:
        return None
    return cv_start


def _make_step(
    trace: Trace, w: FloatArray, index: int, kind: StepKind, mode: StepMode, start: int, stop: int
) -> Step:
    t, v, i = trace.time_s, trace.voltage_v, trace.current_a
    a = np.abs(i[start:stop])
    # einsum, not np.dot: a 1-D dot product through a multi-threaded BLAS costs milliseconds
    # of thread hand-over on a busy machine for microseconds of arithmetic
    charge_as = float(np.einsum("i,i->", a, w[start:stop])) if kind is not StepKind.REST else 0.0
    energy_ws = (
        float(np.einsum("i,i,i->", a, v[start:stop], w[start:stop]))
        if kind is not StepKind.REST
        else 0.0
    )
    program = None
    if trace.step is not None:
        program = int(trace.step[start])
    return Step(
        index=index,
        kind=kind,
        mode=mode,
        start=start,
        stop=stop,
        start_s=float(t[start]),
        end_s=float(t[stop] if stop < len(t) else t[stop - 1]),
        capacity_ah=charge_as / 3600.0,
        energy_wh=energy_ws / 3600.0,
        mean_current_a=float(np.mean(i[start:stop])),
        program_step=program,
    )


_KIND = {1: StepKind.CHARGE, -1: StepKind.DISCHARGE, 0: StepKind.REST}


def _kind_of_block(kinds: IntArray) -> int:
    """The kind a block of rows mostly has: rest only if no row carries current."""
    moving = kinds[kinds != 0]
    if len(moving) == 0:
        return 0
    return 1 if np.count_nonzero(moving > 0) >= np.count_nonzero(moving < 0) else -1


def _blocks(trace: Trace, kinds: IntArray) -> tuple[list[tuple[int, int, int]], list[Note]]:
    """(start, stop, kind) blocks, from the step column if present, else from the current."""
    notes: list[Note] = []
    if trace.step is None:
        smoothed = _absorb_blips(kinds, trace.time_s, min_s=5.0)
        return [(a, b, int(smoothed[a])) for a, b in _runs(smoothed)], notes
    blocks = []
    for a, b in _runs(trace.step):
        kind = _kind_of_block(kinds[a:b])
        disagree = np.count_nonzero((kinds[a:b] != kind) & (kinds[a:b] != 0))
        if disagree > DISAGREE_FRACTION * (b - a):
            notes.append(
                Note(
                    "step_column_disagrees",
                    f"program step {int(trace.step[a])} holds both charge and discharge "
                    f"current ({disagree} of {b - a} rows go against its main direction)",
                    SourceRef(trace.source, trace.line_of(a)),
                )
            )
        blocks.append((a, b, kind))
    # Neighbouring program steps of one kind (e.g. a CC step then a CV step) stay
    # separate steps: the program's own boundaries are kept.
    return blocks, notes


def split_steps(trace: Trace, rest_current_a: float) -> Segmentation:
    """Segment ``trace`` into steps and cycles.

    ``rest_current_a`` (A): rows with |I| at or below it are rest. Charge and
    discharge blocks are split into a CC part and a CV tail where the voltage is
    held while the current decays.
    """
    kinds = row_kinds(trace.current_a, rest_current_a)
    w = sample_weights(trace.time_s)
    blocks, notes = _blocks(trace, kinds)
    steps: list[Step] = []
    for a, b, k in blocks:
        kind = _KIND[k]
        if kind is StepKind.REST:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.NONE, a, b))
            continue
        cv = _split_cv(trace.voltage_v, trace.current_a, trace.time_s, a, b, k)
        if cv is None:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.CC, a, b))
        elif cv == a:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.CV, a, b))
        else:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.CC, a, cv))
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.CV, cv, b))
    cycles = group_cycles(steps, trace)
    notes.extend(_check_cycle_column(trace, cycles, steps))
    return Segmentation(tuple(steps), tuple(cycles), tuple(notes))


def group_cycles(steps: list[Step] | tuple[Step, ...], trace: Trace | None = None) -> list[Cycle]:
    """Group steps into cycles: charges since the last discharge, then the discharges that follow.

    Discharges before the first charge (a cell delivered partly charged) belong to
    no cycle; a trailing charge with no discharge forms an incomplete last cycle.
    """
    cycles: list[Cycle] = []
    charges: list[int] = []
    discharges: list[int] = []

    def close() -> None:
        if charges:
            program = None
            if trace is not None and trace.cycle is not None:
                last = steps[(discharges or charges)[-1]]
                program = int(trace.cycle[last.start])
            cycles.append(Cycle(len(cycles) + 1, tuple(charges), tuple(discharges), program))

    for step in steps:
        if step.kind is StepKind.CHARGE:
            if discharges:
                close()
                charges, discharges = [], []
            charges.append(step.index)
        elif step.kind is StepKind.DISCHARGE and charges:
            discharges.append(step.index)
    close()
    return cycles


def _check_cycle_column(trace: Trace, cycles: list[Cycle], steps: list[Step]) -> list[Note]:
    """A note when the file's cycle numbers split one of our cycles' discharge in two."""
    if trace.cycle is None:
        return []
    notes = []
    for cycle in cycles:
        numbers: set[int] = set()
        for s in cycle.discharge_steps:
            column = trace.cycle[steps[s].start : steps[s].stop]
            if column.size and column.min() == column.max():  # the usual case: one number
                numbers.add(int(column[0]))
            else:
                numbers.update(np.unique(column).tolist())
        if len(numbers) > 1:
            first = steps[cycle.discharge_steps[0]]
            notes.append(
                Note(
                    "cycle_column_disagrees",
                    f"the file's cycle column changes ({sorted(numbers)}) inside the discharge "
                    f"of cycle {cycle.index} as formgate counts it (a charge followed by a "
                    f"discharge); formgate's count is used",
                    SourceRef(trace.source, trace.line_of(first.start)),
                )
            )
    return notes
