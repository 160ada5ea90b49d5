"""How fast a station screens its channels: the pure screen, and reading the records back.

The screen (``pipeline.judge.channels.screen_channels``) runs on invented lines of 2,000
records (the default ``[channels] window``) over 20, 100 and 400 channels, about 4 % of the
records failed or held, with capacity and DCIR values; the best of several calls is shown.
Building the line is not timed. A station runs it after every failed or held record and
after every ``PASSES_PER_SCREEN`` passed ones (pipeline/station/channelwatch.py).

    .venv/bin/python benchmarks/channel_screen.py
    .venv/bin/python benchmarks/channel_screen.py --records 5000 --repeats 9
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from pipeline.judge.channels import ChannelRecord, ChannelScreen, screen_channels

CHANNELS = (20, 100, 400)


def make_line(records: int, channels: int, seed: int = 7) -> list[ChannelRecord]:
    """An invented line: records spread over the channels in turn, 4 % out of window."""
    rng = np.random.default_rng(seed)
    line = []
    for i in range(records):
        out = bool(rng.random() < 0.04)
        line.append(ChannelRecord(
            "bench-line", f"C{i % channels:03d}",
            f"2026-03-02T{i // 3600:02d}:{i // 60 % 60:02d}:{i % 60:02d}",
            f"B-{i:05d}", f"LOT-{i // 500}", "fail" if out else "pass", ("capacity",) if out else (),
            {"grading_capacity_Ah": float(rng.normal(20.0, 0.08)), "dcir_mOhm": float(rng.normal(1.5, 0.05))},
        ))
    return line


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=2000)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    spec = ChannelScreen()
    print(f"{'channels':>8} {'records':>8} {'best ms':>8}")
    for channels in CHANNELS:
        line = make_line(args.records, channels)
        best = float("inf")
        for _ in range(args.repeats):
            start = time.perf_counter()
            screen_channels(line, spec)
            best = min(best, time.perf_counter() - start)
        print(f"{channels:>8} {args.records:>8} {best * 1000:>8.1f}")


if __name__ == "__main__":
    main()
