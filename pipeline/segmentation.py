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

from pipeline.model import (
    CurrentBand,
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

# Telling rest from current on a real channel (docs/metrics.md, "Rest and current").
# Rows within NEAR_ZERO_C of zero are where the channel's offset and noise at rest are
# estimated: below the lowest formation current, 0.02 C (common practice).
NEAR_ZERO_C = 0.01
MIN_NOISE_ROWS = 20  # fewer rows near zero give no estimate; the rule set's floor alone is used
ESTIMATE_ROWS = 8192
# The rest band is this many robust standard deviations wide on each side: for normal
# noise a row strays beyond 5 sigma with probability 5.7e-7 (two-sided normal tail,
# computed with scipy.stats.norm; the multiple itself is common practice).
NOISE_MULTIPLE = 5.0
# The band is never wider than this (in C): beyond it the channel is too noisy to tell a
# CV tail's end from rest, and a note says so (common practice, a proposal).
MAX_REST_BAND_C = 0.02
# Hysteresis: a row joins a current step above the threshold and leaves it only below
# this fraction of it, so rows that hover near the threshold do not chatter.
RELEASE_FRACTION = 0.5
# A charge or discharge step needs at least this many rows, this long (s) and this much
# charge (fraction of nominal capacity): noise at rest and spikes at step changes are one
# or two rows and hold far less (common practice, a proposal). A real 10 s DCIR pulse at
# 1 C holds 0.28 % of capacity.
MIN_STEP_ROWS = 2
MIN_STEP_S = 5.0
MIN_STEP_CHARGE_C = 0.0005
# A rest shorter than this (s), or of a single row, between two rows of the same kind of
# step is a drop-out inside that step, not a rest.
MIN_REST_S = 5.0
MOST = 0.5  # a program step is a rest when its median current lies inside the rest band


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


def estimate_band(current_a: FloatArray, floor_a: float, one_c_a: float) -> CurrentBand:
    """The file's rest band: zero offset and noise of the current at rest, and the threshold.

    ``floor_a`` (A) is the rule set's rest current, ``one_c_a`` (A) the nominal capacity
    per hour. Offset and noise come from the rows near zero: the median, and 1.4826 times
    the median absolute deviation (a consistent estimate of the standard deviation for
    normal noise: Iglewicz and Hoaglin 1993), refined once on the rows inside the first
    band so that a slow CV tail does not widen it.

    >>> band = estimate_band(np.array([0.003] * 30 + [5.0] * 30), 0.04, 20.0)
    >>> band.offset_a, band.threshold_a
    (0.003, 0.04)
    """
    cap_a = MAX_REST_BAND_C * one_c_a
    # at most about 8,000 evenly spaced rows: the same estimate to well within its own
    # scatter, without sorting hours of samples twice
    every = current_a[:: max(1, -(-len(current_a) // ESTIMATE_ROWS))]
    near = every[np.abs(every) <= NEAR_ZERO_C * one_c_a]
    offset = noise = 0.0
    used = 0
    for _ in range(2):
        if len(near) < MIN_NOISE_ROWS:
            break
        used = len(near)
        offset = float(np.median(near))
        noise = 1.4826 * float(np.median(np.abs(near - offset)))
        width = min(max(floor_a, NOISE_MULTIPLE * noise), cap_a)
        near = every[np.abs(every - offset) <= 2.0 * width]
    threshold = min(max(floor_a, NOISE_MULTIPLE * noise), max(cap_a, floor_a))
    return CurrentBand(offset, noise, threshold, floor_a, used)


def row_kinds(current_a: FloatArray, band: CurrentBand) -> IntArray:
    """+1 charge, -1 discharge, 0 rest for each row, with hysteresis around the band.

    A row counts as current when |I - offset| exceeds the threshold; a row between the
    release level (RELEASE_FRACTION of the threshold) and the threshold keeps the state
    of the row before it.
    """
    moved = current_a - band.offset_a
    size = np.abs(moved)
    state = np.where(size > band.threshold_a, 1, np.where(size <= RELEASE_FRACTION * band.threshold_a, 0, -1))
    # rows in between take the last decided state (forward fill of the decided rows)
    decided = np.where(state >= 0, np.arange(len(state)), 0)
    np.maximum.accumulate(decided, out=decided)
    state = np.where(state >= 0, state, state[decided])
    state[state < 0] = 0  # a leading undecided row is rest
    return (np.sign(moved).astype(np.int64) * state).astype(np.int64)


def _runs(labels: IntArray) -> list[tuple[int, int]]:
    """(start, stop) of each maximal run of equal labels."""
    if len(labels) == 0:
        return []
    edges = np.flatnonzero(np.diff(labels)) + 1
    starts = np.concatenate(([0], edges))
    stops = np.concatenate((edges, [len(labels)]))
    return list(zip(starts.tolist(), stops.tolist(), strict=True))


def _clean_kinds(kinds: IntArray, w: FloatArray, charge_as: FloatArray, one_c_a: float) -> IntArray:
    """Row kinds without drop-outs inside steps and without steps made of noise or spikes.

    ``charge_as`` is |I - offset| x w per row (A s). First a short rest between two rows
    of one kind joins that kind; then a charge or discharge run too short, too brief or
    holding too little charge to be a step becomes rest, unless it sits inside a step of
    the other kind, which then takes it over.
    """
    out = kinds.copy()
    runs = _runs(out)
    for n, (start, stop) in enumerate(runs):
        if out[start] != 0 or n == 0 or n == len(runs) - 1:
            continue
        before, after = out[runs[n - 1][0]], out[runs[n + 1][0]]
        if before == after and (stop - start == 1 or float(w[start:stop].sum()) < MIN_REST_S):
            out[start:stop] = before
    min_as = MIN_STEP_CHARGE_C * one_c_a * 3600.0
    runs = _runs(out)
    for n, (start, stop) in enumerate(runs):
        if out[start] == 0:
            continue
        if (
            stop - start >= MIN_STEP_ROWS
            and float(w[start:stop].sum()) >= MIN_STEP_S
            and float(charge_as[start:stop].sum()) >= min_as
        ):
            continue
        before = out[runs[n - 1][0]] if n > 0 else 0
        after = out[runs[n + 1][0]] if n < len(runs) - 1 else 0
        out[start:stop] = before if before == after else 0
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
_WORD = {1: "a charge", -1: "a discharge", 0: "a rest"}


def _program_steps(
    trace: Trace, band: CurrentBand, w: FloatArray, one_c_a: float
) -> tuple[list[tuple[int, int, int]], list[Note]]:
    """(start, stop, kind) of each program step of the file's step column, and notes.

    A step's kind comes from its median current against the rest band, never from
    single rows; a note names a step that really carries current against its kind
    (at least MIN_STEP_ROWS rows beyond the band holding MIN_STEP_CHARGE_C), not noise.
    """
    assert trace.step is not None
    moved = trace.current_a - band.offset_a
    beyond = np.abs(moved) > band.threshold_a
    min_as = MIN_STEP_CHARGE_C * one_c_a * 3600.0
    blocks, notes = [], []
    for a, b in _runs(trace.step):
        median = float(np.median(moved[a : b : max(1, -(-(b - a) // ESTIMATE_ROWS))]))
        kind = 0 if abs(median) <= band.threshold_a else (1 if median > 0 else -1)
        against = beyond[a:b] & (np.sign(moved[a:b]) != kind)
        rows = int(np.count_nonzero(against))
        charge_as = float(np.abs(moved[a:b][against]) @ w[a:b][against]) if rows else 0.0
        if rows >= MIN_STEP_ROWS and charge_as >= min_as:
            what = "current" if kind == 0 else f"{'discharge' if kind > 0 else 'charge'} current"
            first = a + int(np.argmax(against))
            notes.append(
                Note(
                    "step_column_disagrees",
                    f"program step {int(trace.step[a])} is {_WORD[kind]} by its median current "
                    f"but carries {charge_as / 3600.0:.3g} Ah of {what} in {rows} of its "
                    f"{b - a} rows (first on line {trace.line_of(first)})",
                    SourceRef(trace.source, trace.line_of(first)),
                )
            )
        blocks.append((a, b, kind))
    # Neighbouring program steps of one kind (e.g. a CC step then a CV step) stay
    # separate steps: the program's own boundaries are kept.
    return blocks, notes


def _band_notes(trace: Trace, band: CurrentBand, one_c_a: float) -> list[Note]:
    if band.threshold_a >= MAX_REST_BAND_C * one_c_a and NOISE_MULTIPLE * band.noise_a > band.threshold_a:
        return [
            Note(
                "current_noise_high",
                f"the current at rest scatters by {band.noise_a * 1000:.3g} mA rms, so rest is "
                f"told at {band.threshold_a * 1000:.3g} mA ({MAX_REST_BAND_C:g} C), less than "
                f"{NOISE_MULTIPLE:g} times that scatter; check the channel's current range",
                SourceRef(trace.source),
            )
        ]
    return []


def split_steps(trace: Trace, rest_current_a: float, one_c_a: float) -> Segmentation:
    """Segment ``trace`` into steps and cycles.

    ``rest_current_a`` (A) is the rule set's rest current, the least half-width of the
    rest band; ``one_c_a`` (A) is the cell's nominal capacity per hour. The band is
    centred on the file's own zero offset and widened to its noise (estimate_band).
    Charge and discharge steps are split into a CC part and a CV tail where the
    voltage is held while the current decays.
    """
    band = estimate_band(trace.current_a, rest_current_a, one_c_a)
    w = sample_weights(trace.time_s)
    notes = _band_notes(trace, band, one_c_a)
    if trace.step is not None:
        blocks, more = _program_steps(trace, band, w, one_c_a)
        notes += more
    else:
        charge_as = np.abs(trace.current_a - band.offset_a) * w
        kinds = _clean_kinds(row_kinds(trace.current_a, band), w, charge_as, one_c_a)
        blocks = [(a, b, int(kinds[a])) for a, b in _runs(kinds)]
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
                    SourceRef(trace.source, trace.line_of(first.start)),
                )
            )
    return notes
