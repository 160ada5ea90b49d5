"""Accuracy trial: judge the demo lots read through noisy cycler channels, print a table.

Every cell of the invented demo lots is simulated once without measurement errors, then
read through channels of two accuracy classes (current noise 0.05 % and 0.1 % of a 2.5 C
range, zero offset 0.01 % and 0.02 % of range at rest, 1 mV voltage noise, spikes or ramps
at every step change), sampled every 1, 5 or 10 s, with and without the step column. Each
row gives how many verdicts differ from what the cell was built for, and the largest error of
each metric against the same record read through a perfect channel.

    python benchmarks/accuracy.py            # about a minute or two
    python benchmarks/accuracy.py --quick    # one interval, one channel, one layout: seconds

docs/metrics.md quotes its figures from this table.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime
import sys

import numpy as np

from pipeline.acceptance.results import CellResult
from pipeline.demo import cycletext, synth
from pipeline.demo import lots as demo
from pipeline.demo.channel import NOISELESS, Channel
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import judge
from pipeline.shipped import RULES_DIR

ANALYSED_AT = datetime.datetime(2026, 3, 4, tzinfo=datetime.UTC)
CHANNELS = {
    "0.05 % / 0.01 %": (5e-4, 1e-4),
    "0.1 % / 0.02 %": (1e-3, 2e-4),
}
# metric, relative (True) or absolute error, printed scale and unit
COLUMNS = (
    ("grading_capacity_Ah", True, 100.0, "cap %"),
    ("first_cycle_efficiency", False, 1.0, "FCE"),
    ("dcir_mOhm", True, 100.0, "DCIR %"),
    ("rest_voltage_drift_mV_per_h", False, 1.0, "drift mV/h"),
    ("main_plateau_voltage_V", False, 1000.0, "plat mV"),
    ("main_plateau_length_pct", False, 1.0, "plat len %"),
)


def expected(cell: demo.DemoCell) -> str:
    if not cell.defect:
        return "pass"
    return "hold" if cell.defect in demo.REVIEW_CASES else "fail"


def record(cell: demo.DemoCell, interval_s: float) -> synth.SimulatedRecord:
    rng = demo._seed_for(cell, 2026)
    recipe = dataclasses.replace(
        demo.demo_recipe(cell, rng), channel=NOISELESS, sample_interval_s=interval_s
    )
    return synth.simulate_formation(recipe, rng)


def judged(rec: synth.SimulatedRecord, cell: demo.DemoCell, steps: bool, rulebook: object) -> CellResult:
    text = cycletext.to_cycle_file(rec, demo.demo_metadata(cell), include_step_columns=steps)
    return judge(text.encode(), f"{cell.cell_id}.csv", rulebook, analysed_at=ANALYSED_AT)  # type: ignore[arg-type]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one interval and one channel")
    args = parser.parse_args(argv)
    rulebook = load_rules_dir(RULES_DIR)
    cells = demo.ALL_DEMO_CELLS
    intervals = (5.0,) if args.quick else (1.0, 5.0, 10.0)
    channels = dict(list(CHANNELS.items())[:1]) if args.quick else CHANNELS
    header = f"{'interval':>8}  {'channel noise / offset':<22} {'steps':<6} {'wrong':>5}  " + "  ".join(
        f"{c[3]:>10}" for c in COLUMNS
    )
    print(header)
    print("-" * len(header))
    for interval in intervals:
        truths = {c.cell_id: record(c, interval) for c in cells}
        for label, (noise, offset) in channels.items():
            for steps in (True,) if args.quick else (True, False):
                worst = dict.fromkeys((c[0] for c in COLUMNS), 0.0)
                wrong = 0
                for n, cell in enumerate(cells):
                    truth = truths[cell.cell_id]
                    channel = Channel(2.5 * truth.recipe.nominal_capacity_ah, noise, offset)
                    noisy = synth.with_channel(truth, channel, np.random.default_rng([7, n]))
                    got = judged(noisy, cell, steps, rulebook)
                    clean = judged(truth, cell, steps, rulebook)
                    wrong += got.verdict.kind.value != expected(cell)
                    for metric, rel, _, _ in COLUMNS:
                        a, b = got.metrics.values[metric], clean.metrics.values[metric]
                        if a is None or b is None:
                            continue
                        error = abs(a / b - 1.0) if rel else abs(a - b)
                        worst[metric] = max(worst[metric], error)
                row = "  ".join(f"{worst[c[0]] * c[2]:>10.3f}" for c in COLUMNS)
                print(f"{interval:>7g}s  {label:<22} {'yes' if steps else 'no':<6} {wrong:>5}  {row}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
