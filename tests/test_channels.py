"""Channel health: the exact binomial test against scipy, the screen's false-alarm rate on random
lines with no bad channel, and a bad channel found.

Invented lines: station "bench-3", channels "R1-C01".., lots "L-CH-...", checks "capacity",
"resistance", "self_discharge".
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.judge.channels import (
    ChannelRecord,
    ChannelScreen,
    binomial_tail,
    channel_summaries,
    laplace_rate,
    screen_channels,
)

CAP, DCIR = "grading_capacity_Ah", "dcir_mOhm"
CHECKS = ("capacity", "resistance", "self_discharge")


@settings(max_examples=300, deadline=None)
@given(n=st.integers(0, 400), data=st.data(), p=st.floats(1e-6, 1 - 1e-6))
def test_binomial_tail_is_the_exact_binomial_tests_p_value(n: int, data: st.DataObject, p: float) -> None:
    # outside check: scipy.stats.binomtest, alternative "greater" (the exact one-sided test)
    k = data.draw(st.integers(0, n))
    ours = binomial_tail(k, n, p)
    theirs = scipy.stats.binomtest(k, n, p, alternative="greater").pvalue if n else 1.0
    if theirs < 1e-250:  # near the smallest doubles both lose digits; no screen meets such a p
        assert ours < 1e-240
        return
    assert ours == pytest.approx(theirs, rel=1e-9)


def test_binomial_tail_at_its_edges() -> None:
    assert binomial_tail(0, 0, 0.5) == 1.0 and binomial_tail(4, 3, 0.5) == 0.0
    assert binomial_tail(1, 3, 0.0) == 0.0 and binomial_tail(3, 3, 1.0) == 1.0
    assert laplace_rate(0, 0) == 0.5 and laplace_rate(0, 98) == 0.01


def random_line(rng: np.random.Generator, channels: int, per_channel: int, rate: float,
                bad: dict[int, tuple[float, float]] | None = None) -> list[ChannelRecord]:
    """A line: every channel tests ``per_channel`` cells in turn, each out of window with
    ``rate`` on a random check; capacity ~ N(20, 0.08), DCIR ~ N(1.5, 0.05). ``bad``: channel
    index -> (its fail rate, its DCIR offset), from the middle of the line on."""
    records = []
    for c in range(channels):
        for i in range(per_channel):
            late = bad is not None and c in bad and i >= per_channel // 2
            r, offset = bad[c] if late and bad is not None else (rate, 0.0)
            out = bool(rng.random() < r)
            verdict = ("fail" if rng.random() < 0.7 else "hold") if out else "pass"
            check = ("resistance",) if out and late else ((CHECKS[int(rng.integers(3))],) if out else ())
            records.append(ChannelRecord(
                "bench-3", f"R1-C{c + 1:02d}", f"2026-03-02T{8 + i // 60:02d}:{i % 60:02d}:{c:02d}",
                f"C{c:02d}-{i:03d}", "L-CH-01", verdict, check,
                {CAP: float(rng.normal(20.0, 0.08)), DCIR: float(rng.normal(1.5, 0.05)) + offset},
            ))
    return records


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(channels=st.integers(2, 16), per_channel=st.integers(5, 30), rate=st.floats(0.0, 0.2),
       seed=st.integers(0, 2**32 - 1))
def test_a_line_with_no_bad_channel_is_flagged_no_more_often_than_the_screen_states(
    channels: int, per_channel: int, rate: float, seed: int
) -> None:
    """On 150 random lines of one shape, every channel alike, the share of lines with a flagged
    channel stays within the stated false-alarm rate (with room for the count's own chance: a
    count above the binomial's 99.99th percentile fails)."""
    spec = ChannelScreen(false_alarm=0.05, min_cells=5, metrics=(CAP, DCIR))
    rng = np.random.default_rng(seed)
    lines = 150
    flagged = sum(bool(screen_channels(random_line(rng, channels, per_channel, rate), spec)) for _ in range(lines))
    # outside check: scipy.stats.binom, the count of false alarms among independent lines
    assert flagged <= scipy.stats.binom.ppf(0.9999, lines, spec.false_alarm), flagged


def test_the_false_alarm_rate_over_many_lines_is_below_the_stated_one() -> None:
    """2,000 lines of 12 channels x 20 cells at a 4 % fail rate: the flagged share is below 1 %."""
    rng = np.random.default_rng(2026)
    spec = ChannelScreen(false_alarm=0.01, metrics=(CAP, DCIR))
    flagged = sum(bool(screen_channels(random_line(rng, 12, 20, 0.04), spec)) for _ in range(2000))
    assert flagged <= scipy.stats.binom.ppf(0.9999, 2000, 0.01)


def test_a_channel_whose_contact_wears_half_way_is_flagged_with_its_evidence() -> None:
    rng = np.random.default_rng(7)
    line = random_line(rng, 8, 12, 0.02, bad={3: (1.0, 0.6)})
    suspects = screen_channels(line, ChannelScreen(metrics=(CAP, DCIR)))
    assert [s.key for s in suspects] == [("bench-3", "R1-C04")]
    kinds = {e.kind for e in suspects[0].evidence}
    assert {"rate", "run"} <= kinds
    run = next(e for e in suspects[0].evidence if e.kind == "run")
    assert "failed check resistance" in run.text
    assert suspects[0].label == "channel R1-C04 at bench-3"
    assert "contacts" in suspects[0].advice


def test_a_channel_biased_high_on_resistance_that_still_passes_is_flagged_for_its_bias() -> None:
    rng = np.random.default_rng(11)
    line = random_line(rng, 8, 20, 0.0, bad={5: (0.0, 0.3)})
    suspects = screen_channels(line, ChannelScreen(metrics=(CAP, DCIR)))
    assert [s.key[1] for s in suspects] == ["R1-C06"]
    (bias,) = suspects[0].evidence
    assert bias.kind == "bias" and f"median {DCIR}" in bias.text and "above" in bias.text


def test_too_few_records_are_never_screened() -> None:
    rng = np.random.default_rng(3)
    line = random_line(rng, 24, 1, 0.1)  # one cell per channel, as a lot spread over a whole rack
    line += [ChannelRecord("bench-3", "R1-C01", "2026-03-02T09:00:00", f"X-{i}", "L-CH-01", "fail",
                           ("resistance",)) for i in range(3)]
    assert screen_channels(line) == ()


def test_summaries_count_verdicts_checks_and_biases() -> None:
    rng = np.random.default_rng(5)
    line = random_line(rng, 4, 10, 0.0, bad={2: (1.0, 0.0)})
    summaries = {s.key[1]: s for s in channel_summaries(line, metrics=(CAP, DCIR), recent=4)}
    third = summaries["R1-C03"]
    assert third.records == 10 and third.failed + third.held == 5 and third.passed == 5
    assert dict(third.out_by_check) == {"resistance": 5}
    assert third.recent[-1] in ("fail", "hold") and len(third.recent) == 4
    first = summaries["R1-C01"]
    cap_bias = first.biases[0]
    # values relative to the lot: its median and robust SD over every passed cell, outside
    # check: scipy.stats.median_abs_deviation with scale="normal" (the MAD's consistency
    # factor 1.4826 for normal data: Rousseeuw and Croux 1993, J. Am. Stat. Assoc. 88(424))
    lot = np.array([r.values[CAP] for r in line if r.verdict == "pass"])
    centre, spread = np.median(lot), scipy.stats.median_abs_deviation(lot, scale="normal")
    others = np.array([(r.values[CAP] - centre) / spread for r in line if r.channel != "R1-C01" and r.verdict == "pass"])
    mine = np.array([(r.values[CAP] - centre) / spread for r in line if r.channel == "R1-C01" and r.verdict == "pass"])
    sd = scipy.stats.median_abs_deviation(others, scale="normal")
    assert cap_bias.robust_sd == pytest.approx(sd, rel=1e-9)
    se = math.sqrt(math.pi / 2) * sd * math.sqrt(1 / mine.size + 1 / others.size)
    assert cap_bias.z == pytest.approx((np.median(mine) - np.median(others)) / se, rel=1e-9)


def test_a_bias_is_judged_within_each_lot_not_across_lots_of_other_cells() -> None:
    """Two lots of different cells (capacity 20 Ah and 5 Ah) on the same channels: a channel that
    tested more of the 20 Ah lot is not biased high on capacity."""
    rng = np.random.default_rng(21)
    line = random_line(rng, 6, 20, 0.0)
    small = [dataclasses.replace(r, lot="L-CH-02", values={**r.values, CAP: r.values[CAP] / 4.0})
             for r in line if r.channel != "R1-C01"]
    mixed = [r for r in line if r.channel == "R1-C01"] + small
    assert screen_channels(mixed, ChannelScreen(metrics=(CAP, DCIR))) == ()
