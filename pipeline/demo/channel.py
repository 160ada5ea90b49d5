"""A simulated cycler channel: what it records of a cell's true voltage, current and temperature.

Pure: true arrays, a Channel and a seeded numpy Generator in, recorded arrays out. Real
channels show current noise and a zero offset at rest, voltage and temperature noise, and a
spike or a ramp at every step change; the demo lots and the tests read simulated cells
through a Channel so that formgate is judged on records like a line's. The cell model is
cellmodel.py's, the program that drives it synth.py's.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.model import FloatArray, IntArray


@dataclass(frozen=True, slots=True)
class Channel:
    """The measurement errors of one cycler channel, as a real record carries them.

    ``range_a`` is the channel's full-scale current range. Current noise (rms) and the zero
    offset are fractions of it: a channel of a 0.05 % accuracy class shows noise of about
    0.01-0.1 % of full scale and an offset of a few mA (from memory, medium; no single
    published source). The offset is a zero error of the current measurement, so it is in
    every row, while current flows as at rest: measured = true + offset, and it is counted
    into every charge and discharge (formgate estimates it at rest and takes it out:
    rest_band.take_out_offset). Voltage noise of 0.5-2 mV rms (from memory, medium). At each
    step change the first row shows the switch under way: the current overshoots the new
    level or is still ramping towards it, by up to ``step_change_fraction`` of the change,
    and the voltage spikes by up to ``step_change_v`` (common practice to expect; sizes our
    own).
    """

    range_a: float
    current_noise_fraction: float = 5e-4
    offset_fraction: float = 1e-4
    voltage_noise_v: float = 1e-3
    temperature_noise_c: float = 0.05
    step_change_fraction: float = 0.3
    step_change_v: float = 0.005

    def __post_init__(self) -> None:
        if not self.range_a > 0:
            raise ValueError("Channel.range_a must be positive")
        noises = (self.current_noise_fraction, self.voltage_noise_v, self.temperature_noise_c,
                  self.step_change_fraction, self.step_change_v)
        if min(noises) < 0:
            raise ValueError("Channel noise levels cannot be negative")

    @classmethod
    def for_cell(cls, nominal_capacity_ah: float) -> Channel:
        """A channel with a range of 2.5 C for the cell (a 20 Ah cell on a 50 A channel)."""
        return cls(range_a=2.5 * nominal_capacity_ah)


# A channel that measures perfectly: for tests that need the model's own values.
NOISELESS = Channel(1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0)


def add_channel_errors(
    voltage_v: FloatArray,
    current_a: FloatArray,
    temperature_c: FloatArray,
    step: IntArray,
    channel: Channel,
    rng: np.random.Generator,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """What ``channel`` records of the true voltage, current and temperature (new arrays).

    ``step`` numbers the program steps row by row: the first row of each step after the
    first shows the switch under way (Channel). Every row carries the zero offset and
    noise: at rest (true current exactly zero) that is all the record shows.
    """
    n = len(voltage_v)
    volts = voltage_v + rng.normal(0.0, channel.voltage_noise_v, n)
    offset = channel.offset_fraction * channel.range_a
    amps = current_a + rng.normal(offset, channel.current_noise_fraction * channel.range_a, n)
    firsts = np.flatnonzero(np.diff(step) != 0) + 1
    if len(firsts) and (channel.step_change_fraction > 0 or channel.step_change_v > 0):
        change = current_a[firsts] - current_a[firsts - 1]
        # half the switches overshoot the new level, half are still on their way to it
        overshoot = rng.random(len(firsts)) < 0.5
        size = channel.step_change_fraction * rng.random(len(firsts))
        amps[firsts] += np.where(overshoot, size, -size) * change
        volts[firsts] += np.sign(change) * channel.step_change_v * rng.random(len(firsts))
    temps = temperature_c + rng.normal(0.0, channel.temperature_noise_c, n)
    return volts, amps, temps
