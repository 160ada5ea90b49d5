"""Cut a trace into rest / charge / discharge steps (CC or CV) and group them into cycles.

Pure: a Trace, the rule set's rest current and the cell's 1 C current in, a
Segmentation out. Real channels show noise and a zero offset at rest and spikes at
step changes, so rest is current inside the file's own rest band (its offset plus or
minus a multiple of its noise, at least the rule set's rest current), recorded in the
result. When the file carries the cycler's own ``step`` column its boundaries are
kept and each step's kind comes from its median current; otherwise steps come from
current and voltage alone, with hysteresis and a least duration and charge per step,
so noise can never make a step. A *cycle* is the charge steps since the previous
discharge followed by the discharge steps up to the next charge. Measuring is left
to metrics.py; which cycle is graded, to program.py.
"""

from __future__ import annotations

import numpy as np

from pipeline.judge.medians import median
from pipeline.judge.rest_band import (
    band_notes,
    clean_kinds,
    estimate_band,
    program_step_kinds,
    row_kinds,
    runs,
)
from pipeline.model import (
    CurrentBand,
    Cycle,
    FloatArray,
    Note,
    Segmentation,
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
# Without a step column, the first row after a step change may be taken while the channel
# switches (an overshoot, or a current still on its way to the new level: common practice to
# expect). After a CV tail such a row can still carry enough current to join the charge, with
# its voltage already out of the hold. At most this many trailing rows are looked at as
# switch rows: a row out of the hold, or whose current falls below SWITCH_DROP of what the
# tail's own decay from the rows before it gives (a CV current decays smoothly; a switch
# takes it most of the way to the next step's at once). Our own sizes: the channel model's
# switch leaves at most 30 % of the change to go in its one row.
SWITCH_ROWS = 2
SWITCH_DROP = 0.5

def sample_weights(time_s: FloatArray) -> FloatArray:
    """Per-row time weights (s) such that sum(w * y) is the trapezoid integral of y dt.

    Row i owns half of the interval before it and half of the one after, so
    integrals over consecutive row ranges add up exactly to the whole.

    >>> sample_weights(np.array([0.0, 10.0, 30.0])).tolist()
    [5.0, 15.0, 10.0]
    """
    n = len(time_s)
    if n < 2:
        return np.zeros(n)
    half = np.diff(time_s)
    half *= 0.5
    w = np.empty(n)
    np.add(half[1:], half[:-1], out=w[1:-1])
    w[0], w[-1] = half[0], half[-1]
    # Each weight is 0.0 + its halves, as when it was summed into an array of zeros: the
    # same numbers, -0.0 included (0.0 + -0.0 is 0.0), with two fewer arrays of the size
    # of the record.
    w += 0.0
    return w


def weights_between(time_s: FloatArray, start: int, stop: int) -> FloatArray:
    """``sample_weights(time_s)[start:stop]``, from the rows around them alone.

    A row's weight depends only on its neighbours' times, so the weights of a part of a
    long record are found without those of the whole (the same numbers).

    >>> t = np.array([0.0, 10.0, 30.0, 60.0])
    >>> weights_between(t, 1, 3).tolist() == sample_weights(t)[1:3].tolist()
    True
    """
    lo = max(start - 1, 0)
    return sample_weights(time_s[lo : stop + 1])[start - lo : stop - lo]


def _switch_rows(held: np.ndarray, amps: FloatArray) -> int:
    """How many of the last rows of a step were taken during the switch to the next step.

    ``held`` and ``amps``: whether each of the step's last rows (SWITCH_ROWS + 2 of them,
    or fewer) has its voltage within the hold, and its |I|. A last row is a switch row when
    it is out of the hold, or when its current is below SWITCH_DROP times the one the decay
    of the two rows before it leads to; at most SWITCH_ROWS are, and two rows stay.
    """
    count = 0
    while count < SWITCH_ROWS and len(amps) - count >= 3:
        last = len(amps) - 1 - count
        before, before2 = float(amps[last - 1]), float(amps[last - 2])
        # the decay from row to row before it (at most 1: a current that rises is no decay)
        decay = min(1.0, before / before2) if before2 > 0 else 1.0
        if held[last] and float(amps[last]) >= SWITCH_DROP * decay * before:
            break
        count += 1
    return count


def _split_cv(
    voltage_v: FloatArray,
    current_a: FloatArray,
    time_s: FloatArray,
    start: int,
    stop: int,
    sign: int,
    switch_rows: bool = False,
) -> tuple[int, int] | None:
    """(first, stop) rows of the constant-voltage tail inside rows [start, stop), or None.

    The tail is the final run of rows whose voltage stays within CV_BAND_V of the
    step's extreme (highest for charge, lowest for discharge); within it, CV starts
    where |I| first falls below CV_CURRENT_FRACTION of the constant current. With
    ``switch_rows`` (the record has no step column) the step's last rows may be taken
    during the switch to the next step (_switch_rows): the tail is looked for before them,
    and ends where they begin; otherwise it ends with the step (``stop``).
    """
    v = voltage_v[start:stop]
    if len(v) < 3:
        return None
    # held: V * sign >= max(V * sign) - CV_BAND_V, compared without copies of the step
    # (for a discharge, -V >= -min(V) - band is V <= min(V) + band, exactly: negation is)
    extreme = int(v.argmax() if sign > 0 else v.argmin())
    held = v >= v[extreme] - CV_BAND_V if sign > 0 else v <= v[extreme] + CV_BAND_V
    if switch_rows and len(v) > SWITCH_ROWS + 2:
        last = SWITCH_ROWS + 2
        end = len(v) - _switch_rows(held[-last:], np.abs(current_a[stop - last : stop]))
        if end < len(v):
            v = v[:end]
            if extreme >= end:  # the extreme was a switch row's: the hold is the rows' before
                extreme = int(v.argmax() if sign > 0 else v.argmin())
                held = v >= v[extreme] - CV_BAND_V if sign > 0 else v <= v[extreme] + CV_BAND_V
            else:
                held = held[:end]
    # after the last row that is not held, so the tail is held throughout (the first
    # False from the end, found without a list of every row not held)
    tail = 0 if held.all() else len(held) - int(np.argmin(held[::-1]))
    if tail >= len(v):
        return None
    # the constant current: the median before the held tail (of at most about 2,000 evenly
    # spaced rows: the same level to within the current's noise, without sorting hours of
    # samples for every step), or, for a program step that is CV throughout, the current
    # the step opened with
    # (|I| of those rows and of the tail alone, not of the whole step)
    stride = max(1, -(-tail // 2048))  # ceiling division
    i = current_a[start : start + len(v)]
    i_cc = median(np.abs(i[:tail:stride])) if tail > 0 else abs(float(i[0]))
    decaying = np.flatnonzero(np.abs(i[tail:]) < CV_CURRENT_FRACTION * i_cc)
    if len(decaying) == 0:
        return None
    # a block held at constant voltage from its first row is CV throughout
    cv_start = start if tail == 0 else start + tail + int(decaying[0])
    stop = start + len(v)
    end_t = time_s[stop] if stop < len(time_s) else time_s[stop - 1]
    if end_t - time_s[cv_start] < MIN_CV_S:
        return None
    return cv_start, stop


def _make_step(
    trace: Trace, w: FloatArray, index: int, kind: StepKind, mode: StepMode, start: int, stop: int
) -> Step:
    t, v, i = trace.time_s, trace.voltage_v, trace.current_a
    charge_as = energy_ws = 0.0
    if kind is not StepKind.REST:  # a rest carries no charge: no |I| to find
        a = np.abs(i[start:stop])
        # einsum, not np.dot: a 1-D dot product through a multi-threaded BLAS costs
        # milliseconds of thread hand-over on a busy machine for microseconds of arithmetic
        charge_as = float(np.einsum("i,i->", a, w[start:stop]))
        energy_ws = float(np.einsum("i,i,i->", a, v[start:stop], w[start:stop]))
    amps = i[start:stop]
    # np.mean's own arithmetic (the pairwise sum over the count), without its checks of
    # axes and types, which cost more than the sum for the short steps
    mean = float(np.add.reduce(amps)) / len(amps) if len(amps) else float(np.mean(amps))
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
        mean_current_a=mean,
        program_step=program,
    )


_KIND = {1: StepKind.CHARGE, -1: StepKind.DISCHARGE, 0: StepKind.REST}
def split_steps(
    trace: Trace, rest_current_a: float, one_c_a: float, band: CurrentBand | None = None
) -> Segmentation:
    """Segment ``trace`` into steps and cycles.

    ``rest_current_a`` (A) is the rule set's rest current, the least half-width of the
    rest band; ``one_c_a`` (A) is the cell's nominal capacity per hour. The band is
    centred on the file's own zero offset and widened to its noise (estimate_band).
    Charge and discharge steps are split into a CC part and a CV tail where the
    voltage is held while the current decays. ``band``: the band estimated already (and
    the offset taken out of ``trace`` when it says so: rest_band.take_out_offset).
    """
    if band is None:
        band = estimate_band(trace.current_a, rest_current_a, one_c_a)
    w = sample_weights(trace.time_s)
    notes = band_notes(trace, band, one_c_a)
    if trace.step is not None:
        blocks, more = program_step_kinds(trace, band, w, one_c_a)
        notes += more
    else:
        charge_as = np.abs(trace.current_a - band.centre_a) * w
        kinds = clean_kinds(row_kinds(trace.current_a, band), w, charge_as, one_c_a)
        blocks = [(a, b, int(kinds[a])) for a, b in runs(kinds)]
    steps: list[Step] = []
    handed = None  # rows a CV tail's switch rows hand on to the rest that follows
    for n, (a, b, k) in enumerate(blocks):
        if handed is not None:
            a, handed = handed, None
        kind = _KIND[k]
        if kind is StepKind.REST:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.NONE, a, b))
            continue
        cv = _split_cv(
            trace.voltage_v, trace.current_a, trace.time_s, a, b, k, switch_rows=trace.step is None
        )
        if cv is None:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.CC, a, b))
            continue
        cv_start, cv_stop = cv
        # the switch rows after the tail are the next step's first rows, as a step column
        # has them, when that step is a rest; before a step of current (or the record's
        # end) they stay where they are
        if cv_stop < b and n + 1 < len(blocks) and blocks[n + 1][2] == 0:
            handed = cv_stop
        else:
            cv_stop = b
        if cv_start > a:
            steps.append(_make_step(trace, w, len(steps), kind, StepMode.CC, a, cv_start))
        steps.append(_make_step(trace, w, len(steps), kind, StepMode.CV, cv_start, cv_stop))
    cycles = group_cycles(steps, trace)
    notes.extend(_check_cycle_column(trace, cycles, steps))
    return Segmentation(tuple(steps), tuple(cycles), tuple(notes), band)


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
                    trace.where(first.start),
                )
            )
    return notes
