"""The channel's zero offset, estimated at rest and taken out of the current before charge is counted.

A channel's zero error is in every row it records (measured = true + offset), so it is
integrated into every charge and discharge; formgate estimates it from the rows at rest
(rest_band.estimate_band) and subtracts it when it stands out of its own scatter. Checked
on the physics-simulated reference lot (PyBaMM SPMe: Marquis et al., J. Electrochem. Soc.
166 (2019) A3693; parameter sets Chen et al., J. Electrochem. Soc. 167 (2020) 080534, and
Prada et al., J. Electrochem. Soc. 160 (2013) A616) read through the project's channel model
with offsets of ±0.05 % of the channel's range, against the model's noiseless truths.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest

from pipeline.demo import cycletext
from pipeline.judge.rest_band import SIGNIFICANT_Z, estimate_band, take_out_offset
from pipeline.model import Trace
from pipeline.rulebook.book import RuleBook, load_rule_set
from pipeline.runner import judge
from pipeline.shipped import RULES_DIR
from tests.reference.lot import REFERENCE_CELLS, ReferenceRecord, load_truth
from tests.test_physics_lot import ANALYSED_AT, EXPECTED, RULE_CHANGES, read_through

# An accuracy class of 0.05 % of range is a common one for formation channels (common
# practice); the offset of such a channel is within it.
OFFSETS = (5e-4, -5e-4)


@functools.cache
def rulebook(zero_offset: str) -> RuleBook:
    texts = {path.name: path.read_text(encoding="utf-8") for path in RULES_DIR.glob("*.toml")}
    for name, shipped, changed in RULE_CHANGES:
        texts[name] = texts[name].replace(shipped, changed)
    sets = []
    for name, text in sorted(texts.items()):
        if zero_offset != "corrected":
            assert text.count("[measurement]\n") == 1, name
            text = text.replace("[measurement]\n", f'[measurement]\nzero_offset = "{zero_offset}"\n')
        sets.append(load_rule_set(text, name))
    return RuleBook(tuple(sets))


def through(name: str, zero: float) -> ReferenceRecord:
    """The reference cell as a channel with noise of 0.05 % and a zero error of ``zero`` x its
    range records it (the channel model's offset is in every row)."""
    return read_through(name, 5e-4, zero, seed=1)


def judged(record: ReferenceRecord, zero_offset: str):  # -> CellResult
    text = cycletext.to_cycle_file(record, record.metadata, include_step_columns=False)
    return judge(text.encode("utf-8"), f"{record.name}.csv", rulebook(zero_offset),
                 analysed_at=ANALYSED_AT)


def errors(result, name: str) -> tuple[float, float, float]:
    """Relative capacity error, and the two efficiencies' absolute errors, against the truth."""
    truth = load_truth()["cells"][name]["truth"]
    got = result.metrics.values
    return (
        got["grading_capacity_Ah"] / truth["grading_capacity_Ah"] - 1.0,
        got["first_cycle_efficiency"] - truth["first_cycle_efficiency"],
        got["grading_coulombic_efficiency"] - truth["grading_coulombic_efficiency"],
    )


@pytest.mark.slow
@pytest.mark.parametrize("zero", OFFSETS, ids=["+0.05%", "-0.05%"])
def test_the_zero_offset_taken_out_gives_capacity_and_efficiencies_of_the_noiseless_truth(
    zero: float,
) -> None:
    for name in REFERENCE_CELLS:
        result = judged(through(name, zero), "corrected")
        assert (result.verdict.kind, result.verdict.hazards) == EXPECTED[name], name
        band = result.current_band
        assert band is not None and band.corrected, name
        range_a = 2.5 * result.cell_type.nominal_capacity_ah
        assert band.offset_a == pytest.approx(zero * range_a, abs=4 * band.offset_u_a + 1e-4), name
        capacity, first, grading = errors(result, name)
        assert abs(capacity) <= 5e-4, (name, capacity)  # within 0.05 %
        assert abs(first) <= 1e-3 and abs(grading) <= 1e-3, (name, first, grading)


@pytest.mark.slow
def test_left_in_the_offset_moves_capacity_and_efficiencies_beyond_those_bounds() -> None:
    """The same records with the offset left as recorded: the test above sees the offset."""
    worst = [0.0, 0.0, 0.0]
    for name in ("nmc_normal_1", "lfp_normal_1"):
        for zero in OFFSETS:
            for k, error in enumerate(errors(judged(through(name, zero), "as recorded"), name)):
                worst[k] = max(worst[k], abs(error))
    assert worst[0] > 1e-3 and worst[2] > 2e-3, worst


def test_an_offset_within_its_own_scatter_is_left_in() -> None:
    rng = np.random.default_rng(5)
    current = np.concatenate([rng.normal(0.0002, 0.01, 400), np.full(400, 5.0)])
    trace = Trace("c.csv", {}, np.arange(800.0), np.full(800, 3.3), current)
    band = estimate_band(trace.current_a, 0.04, 20.0)
    assert abs(band.offset_a) <= SIGNIFICANT_Z * band.offset_u_a  # 0.2 mA in 10 mA of noise
    same, kept = take_out_offset(trace, band)
    assert same is trace and not kept.corrected and kept.centre_a == band.offset_a


def test_an_offset_standing_out_of_its_scatter_is_taken_out_of_every_row() -> None:
    rng = np.random.default_rng(6)
    current = np.concatenate([rng.normal(0.006, 0.005, 400), 5.006 + rng.normal(0, 0.005, 400)])
    trace = Trace("c.csv", {}, np.arange(800.0), np.full(800, 3.3), current)
    band = estimate_band(trace.current_a, 0.04, 20.0)
    # the offset is the mean of the 400 rows at rest, and its standard uncertainty a mean's,
    # sigma / sqrt(n) (JCGM 100:2008 4.2.3), sigma the rest band's robust noise estimate
    assert band.rows == 400
    assert band.offset_a == pytest.approx(float(np.mean(current[:400])), rel=1e-12)
    assert band.offset_u_a == pytest.approx(band.noise_a / np.sqrt(400), rel=1e-12)
    # against the noise drawn, 5 mA: 1.4826 x the median absolute deviation of 400 normal
    # values scatters by about 6 % (its efficiency is 37 % of the standard deviation's,
    # Rousseeuw and Croux 1993, J. Am. Stat. Assoc. 88, 1273; from memory), 2.5 of those
    assert band.offset_u_a == pytest.approx(0.005 / np.sqrt(400), rel=0.15)
    fixed, marked = take_out_offset(trace, band)
    assert marked.corrected and marked.centre_a == 0.0
    np.testing.assert_allclose(fixed.current_a, current - band.offset_a)
    assert float(np.median(fixed.current_a[400:])) == pytest.approx(5.0, abs=1e-3)
