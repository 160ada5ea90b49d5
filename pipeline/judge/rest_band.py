"""Tell rest from current on a real cycler channel: the file's own rest band, and each row's kind.

Pure: numbers in, numbers out. At rest a channel's current shows noise of about
0.01-0.1 % of its range and a zero offset of a few mA, and spikes or a ramp at step
changes; a threshold fixed in C-rate alone takes that noise for current. So the
band is centred on the file's own offset and is at least a multiple of its own noise
(estimate_band); rows are typed with hysteresis (row_kinds) and runs too short, too
brief or too small to be a step are given to their surroundings (clean_kinds); a
program step of the file's step column is typed by its median (program_step_kinds).
Cutting the record into steps and cycles is segmentation.py's job.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from pipeline.judge.medians import median, median_side
from pipeline.model import CurrentBand, FloatArray, IntArray, Note, SourceRef, Trace

# Telling rest from current on a real channel (docs/metrics.md, "Rest band").
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
# The offset is taken out of the current when it stands out of its own scatter by more than
# this many standard uncertainties (z = 3: a two-sided normal tail of 0.27 %, computed with
# scipy.stats.norm; the multiple itself is common practice for a significance test). Where
# the offset is a median of n samples, its standard uncertainty is sqrt(pi / 2) = 1.2533
# times that of a mean, sigma / sqrt(n) (the median's asymptotic variance, Kenney and
# Keeping 1962).
SIGNIFICANT_Z = 3.0
MEDIAN_EFFICIENCY = 1.2533
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


def estimate_band(current_a: FloatArray, floor_a: float, one_c_a: float) -> CurrentBand:
    """The file's rest band: zero offset and noise of the current at rest, and the threshold.

    ``floor_a`` (A) is the rule set's rest current, ``one_c_a`` (A) the nominal capacity
    per hour. Offset and noise come from the rows near zero: the median, and 1.4826 times
    the median absolute deviation (a consistent estimate of the standard deviation for
    normal noise: Iglewicz and Hoaglin 1993), refined once on the rows inside the first
    band so that a slow CV tail does not widen it. The offset is then the mean of every row
    of the record inside the band, with its standard uncertainty (``offset_u_a``).

    >>> band = estimate_band(np.array([0.003] * 30 + [5.0] * 30), 0.04, 20.0)
    >>> round(band.offset_a, 9), band.threshold_a
    (0.003, 0.04)
    """
    cap_a = MAX_REST_BAND_C * one_c_a
    # at most about 8,000 evenly spaced rows: the same estimate to well within its own
    # scatter, without sorting hours of samples twice
    every = current_a[:: max(1, -(-len(current_a) // ESTIMATE_ROWS))]
    near = every[np.abs(every) <= NEAR_ZERO_C * one_c_a]
    offset = noise = width = 0.0
    used = 0
    for _ in range(2):
        if len(near) < MIN_NOISE_ROWS:
            break
        used = len(near)
        offset = median(near)
        noise = 1.4826 * median(np.abs(near - offset))
        width = min(max(floor_a, NOISE_MULTIPLE * noise), cap_a)
        near = every[np.abs(every - offset) <= 2.0 * width]
    threshold = min(max(floor_a, NOISE_MULTIPLE * noise), max(cap_a, floor_a))
    offset_u = 0.0
    if used:
        # the offset itself from every row of the record at rest, not the sample: its
        # uncertainty falls with the square root of the rows, and it is subtracted from every
        # row of every charge and discharge (take_out_offset). The mean of the rows inside the
        # band (outliers are outside it), its standard uncertainty sigma / sqrt(n) for
        # independent samples (JCGM 100:2008, 4.2.3), sigma the robust noise: the plain
        # standard deviation of those rows would also count the last of a constant-voltage
        # tail, a current that is there, not noise on the offset.
        inside = current_a[np.abs(current_a - offset) <= width]
        if len(inside) >= MIN_NOISE_ROWS:
            offset, used = float(inside.mean()), len(inside)
            offset_u = noise / np.sqrt(used)
        else:
            offset_u = MEDIAN_EFFICIENCY * noise / np.sqrt(used)
    return CurrentBand(offset, noise, threshold, floor_a, used, float(offset_u))


def take_out_offset(trace: Trace, band: CurrentBand) -> tuple[Trace, CurrentBand]:
    """The trace with the channel's zero offset taken out of every row of its current, and
    its band marked so (centred on zero), when the offset stands out of its scatter.

    A channel's zero offset is in every row it records, while current flows as at rest
    (its accuracy class gives it as a share of the range), so it is counted into every
    charge and discharge: 5 mA over a 2 h discharge is 0.01 Ah. Where the rest rows tell
    the offset apart from zero (more than SIGNIFICANT_Z standard uncertainties), it is
    subtracted; otherwise the current stays as recorded (the offset is then within its own
    uncertainty of zero). The band's ``offset_u_a`` is what remains uncertain either way.

    >>> t = Trace("c.csv", {}, np.arange(60.0), np.full(60, 3.3),
    ...           np.array([0.005] * 30 + [5.005] * 30))
    >>> band = estimate_band(t.current_a, 0.04, 20.0)
    >>> fixed, marked = take_out_offset(t, dataclasses.replace(band, noise_a=1e-4, offset_u_a=2e-5))
    >>> marked.corrected, round(float(fixed.current_a[-1]), 9)
    (True, 5.0)
    """
    if not band.rows or abs(band.offset_a) <= SIGNIFICANT_Z * band.offset_u_a:
        return trace, band
    current = trace.current_a - band.offset_a
    current.setflags(write=False)  # frozen now: the Trace keeps it, not a copy (model.frozen_array)
    corrected = dataclasses.replace(trace, current_a=current)
    return corrected, dataclasses.replace(band, corrected=True)


def row_kinds(current_a: FloatArray, band: CurrentBand) -> IntArray:
    """+1 charge, -1 discharge, 0 rest for each row, with hysteresis around the band.

    A row counts as current when |I - offset| exceeds the threshold; a row between the
    release level (RELEASE_FRACTION of the threshold) and the threshold keeps the state
    of the row before it.
    """
    moved = current_a - band.centre_a
    size = np.abs(moved)
    state = np.where(size > band.threshold_a, 1, np.where(size <= RELEASE_FRACTION * band.threshold_a, 0, -1))
    # rows in between take the last decided state (forward fill of the decided rows)
    decided = np.where(state >= 0, np.arange(len(state)), 0)
    np.maximum.accumulate(decided, out=decided)
    state = np.where(state >= 0, state, state[decided])
    state[state < 0] = 0  # a leading undecided row is rest
    return (np.sign(moved).astype(np.int64) * state).astype(np.int64)


def runs(labels: IntArray) -> list[tuple[int, int]]:
    """(start, stop) of each maximal run of equal labels."""
    if len(labels) == 0:
        return []
    # where a label differs from the one before (whole numbers: what a nonzero difference
    # says, without an array of differences the size of the record)
    edges = np.flatnonzero(labels[1:] != labels[:-1]) + 1
    starts = np.concatenate(([0], edges))
    stops = np.concatenate((edges, [len(labels)]))
    return list(zip(starts.tolist(), stops.tolist(), strict=True))


def clean_kinds(kinds: IntArray, w: FloatArray, charge_as: FloatArray, one_c_a: float) -> IntArray:
    """Row kinds without drop-outs inside steps and without steps made of noise or spikes.

    ``charge_as`` is |I - offset| x w per row (A s). First a short rest between two rows
    of one kind joins that kind; then a charge or discharge run too short, too brief or
    holding too little charge to be a step becomes rest, unless it sits inside a step of
    the other kind, which then takes it over.
    """
    out = kinds.copy()
    spans = runs(out)
    for n, (start, stop) in enumerate(spans):
        if out[start] != 0 or n == 0 or n == len(spans) - 1:
            continue
        before, after = out[spans[n - 1][0]], out[spans[n + 1][0]]
        if before == after and (stop - start == 1 or float(w[start:stop].sum()) < MIN_REST_S):
            out[start:stop] = before
    min_as = MIN_STEP_CHARGE_C * one_c_a * 3600.0
    spans = runs(out)
    for n, (start, stop) in enumerate(spans):
        if out[start] == 0:
            continue
        if (
            stop - start >= MIN_STEP_ROWS
            and float(w[start:stop].sum()) >= MIN_STEP_S
            and float(charge_as[start:stop].sum()) >= min_as
        ):
            continue
        before = out[spans[n - 1][0]] if n > 0 else 0
        after = out[spans[n + 1][0]] if n < len(spans) - 1 else 0
        out[start:stop] = before if before == after else 0
    return out


_WORD = {1: "a charge", -1: "a discharge", 0: "a rest"}


def program_step_kinds(
    trace: Trace, band: CurrentBand, w: FloatArray, one_c_a: float
) -> tuple[list[tuple[int, int, int]], list[Note]]:
    """(start, stop, kind) of each program step of the file's step column, and notes.

    A step's kind comes from its median current against the rest band, never from
    single rows; a note names a step that really carries current against its kind
    (at least MIN_STEP_ROWS rows beyond the band holding MIN_STEP_CHARGE_C), not noise.
    """
    assert trace.step is not None
    # the current as it is when the band is centred on zero (the offset taken out of it):
    # x - 0.0 is x, so no copy of the record's current is made for nothing
    centre = band.centre_a
    moved = trace.current_a if centre == 0.0 else trace.current_a - centre
    # rows beyond the band above it and below it (for a band at least 0 wide, every row
    # beyond it is one of them; NaN is neither): counted per step, they spare most steps
    # the search for rows against their kind
    counted = band.threshold_a >= 0.0
    up, down = moved > band.threshold_a, moved < -band.threshold_a
    beyond = None  # |moved| > threshold, made when a step needs it
    min_as = MIN_STEP_CHARGE_C * one_c_a * 3600.0
    blocks, notes = [], []
    for a, b in runs(trace.step):
        # the side of the band the median current falls on (medians.median_side: the one
        # float(np.median(...)) would give, found by counting)
        kind = median_side(moved[a : b : max(1, -(-(b - a) // ESTIMATE_ROWS))], band.threshold_a)
        # rows beyond the band on the other side than the kind: too few to matter?
        if counted and (
            (0 if kind == 1 else int(np.count_nonzero(up[a:b])))
            + (0 if kind == -1 else int(np.count_nonzero(down[a:b])))
            < MIN_STEP_ROWS
        ):
            blocks.append((a, b, kind))
            continue
        if beyond is None:  # without an array of magnitudes when the band is at least 0 wide
            beyond = up | down if counted else np.abs(moved) > band.threshold_a
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
                    f"{b - a} rows (first on {trace.place(first)})",
                    trace.where(first),
                )
            )
        blocks.append((a, b, kind))
    # Neighbouring program steps of one kind (e.g. a CC step then a CV step) stay
    # separate steps: the program's own boundaries are kept.
    return blocks, notes


def band_notes(trace: Trace, band: CurrentBand, one_c_a: float) -> list[Note]:
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
