"""Small builders for test traces: a formation program as a list of phases, sampled and noised.

Independent of pipeline.demo.synth on purpose: the segmentation and metrics tests must not
share their model of a cell with the demo generator they are meant to check.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.model import Trace

META = {"cell_id": "T-0001", "lot": "TEST-LOT", "cell_type": "TEST-CELL"}


@dataclass(frozen=True)
class Phase:
    """A program phase: duration (s), current I(t) in A (+ charge), voltage V(t, q_ah) in V.

    ``t`` is time since the phase started; ``q_ah`` the charge passed since the phase
    started (signed like the current).
    """

    duration_s: float
    current: Callable[[np.ndarray], np.ndarray]
    voltage: Callable[[np.ndarray, np.ndarray], np.ndarray]


def const(value: float) -> Callable[[np.ndarray], np.ndarray]:
    return lambda t: np.full_like(t, value, dtype=float)


def build_trace(
    phases: Sequence[Phase],
    dt_s: float = 10.0,
    *,
    noise_v: float = 0.0,
    seed: int = 0,
    temperature_c: float | None = 25.0,
    source: str = "test.csv",
    metadata: dict[str, str] | None = None,
) -> Trace:
    """Sample ``phases`` back to back every ``dt_s`` seconds (each phase starts on a sample)."""
    rng = np.random.default_rng(seed)
    ts, vs, cs = [], [], []
    t0 = 0.0
    for phase in phases:
        n = max(int(round(phase.duration_s / dt_s)), 1)
        t = np.arange(n) * dt_s
        i = phase.current(t)
        q = np.concatenate(([0.0], np.cumsum(0.5 * (i[1:] + i[:-1]) * np.diff(t)))) / 3600.0
        ts.append(t0 + t)
        vs.append(phase.voltage(t, q))
        cs.append(i)
        t0 += n * dt_s
    time = np.concatenate(ts)
    volt = np.concatenate(vs) + (rng.normal(0.0, noise_v, len(time)) if noise_v else 0.0)
    temp = None if temperature_c is None else np.full(len(time), temperature_c)
    return Trace(source, metadata or META, time, volt, np.concatenate(cs), temp)


def rest(duration_s: float, v: float | Callable[[np.ndarray], np.ndarray]) -> Phase:
    volt = (
        (lambda t, q: np.full_like(t, v, dtype=float))
        if isinstance(v, float)
        else (lambda t, q: v(t))
    )
    return Phase(duration_s, const(0.0), volt)


def cc(duration_s: float, current_a: float, v: Callable[[np.ndarray], np.ndarray]) -> Phase:
    """Constant current; ``v`` is voltage against charge passed (Ah, signed)."""
    return Phase(duration_s, const(current_a), lambda t, q: v(q))


def cv(duration_s: float, voltage_v: float, i0_a: float, tau_s: float) -> Phase:
    """Constant voltage with exponentially decaying current (charge if i0_a > 0)."""
    return Phase(
        duration_s, lambda t: i0_a * np.exp(-t / tau_s), lambda t, q: np.full_like(t, voltage_v)
    )


def simple_formation(
    capacity_ah: float = 2.0,
    *,
    ice: float = 0.9,
    r_ohm: float = 0.05,
    rate_c: float = 0.5,
    final_rest_s: float = 4 * 3600.0,
    drift_v_per_h: float = 0.0,
    ocv: Callable[[np.ndarray], np.ndarray] | None = None,
) -> list[Phase]:
    """Rest, CC-CV charge, rest, discharge (cycle 1); charge, rest, grading discharge; final rest.

    ``ocv(soc)`` defaults to a gently sloped line 3.0-3.6 V. The first charge puts in
    ``capacity / ice``; discharges deliver ``capacity``.
    """
    f = ocv or (lambda soc: 3.0 + 0.6 * soc)
    i = rate_c * capacity_ah
    t_full = capacity_ah / i * 3600.0
    t_first = t_full / ice
    # first charge: extra charge is lost to side reactions, so the SOC rises by the
    # reversible part only
    first = cc(t_first * 0.98, i, lambda q: f(np.clip(q * ice / capacity_ah, 0, 1)) + i * r_ohm)
    v_top = float(f(np.array(0.98)) + i * r_ohm)
    phases = [
        rest(600.0, float(f(np.array(0.0)))),
        first,
        cv(t_first * 0.02 * 5, v_top, i, t_first * 0.02),
        rest(1800.0, float(f(np.array(1.0)))),
        cc(t_full, -i, lambda q: f(np.clip(1 + q / capacity_ah, 0, 1)) - i * r_ohm),
        rest(1800.0, float(f(np.array(0.0)))),
        cc(t_full * 0.98, i, lambda q: f(np.clip(q / capacity_ah, 0, 1)) + i * r_ohm),
        cv(t_full * 0.02 * 5, v_top, i, t_full * 0.02),
        rest(1800.0, float(f(np.array(1.0)))),
        cc(t_full, -i, lambda q: f(np.clip(1 + q / capacity_ah, 0, 1)) - i * r_ohm),
        rest(final_rest_s, lambda t: float(f(np.array(0.0))) + drift_v_per_h * t / 3600.0),
    ]
    return phases
