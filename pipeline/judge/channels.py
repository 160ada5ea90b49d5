"""Channel health: each cycler channel's record of cells, and the screen that finds a suspect channel.

A failed cell is not always the cell's fault: a worn contact or a drifting calibration on one
channel adds resistance, loses charge or cuts programs short, and every cell that channel
tests after it fails the same way. This module looks at the records of a line by the channel
that tested them. Pure: records in, summaries and evidence out; no ledger, no clock.

The screen has three parts, each a test of the hypothesis "this channel is like the others",
each against the *other* channels of the line (so a bad channel never hides in the baseline
it is compared with):

- **rate**: the channel's recent fail-or-hold count against the others' rate, by the exact
  binomial test (one-sided, greater);
- **run**: the channel's last records all failed the same check; under the hypothesis the
  chance of the last ``r`` records all being out is at most ``q**r``, ``q`` the others' rate;
- **bias**: the median of a key metric over the channel's passing cells, each taken relative
  to its own lot (its lot's median and robust SD, so lots of other cells never mix), stands
  off the others' median by more than the spread of a median allows and by at least
  ``min_bias_sd`` lot SDs (robust spread: 1.4826·MAD; the
  standard error of a median of normal data is sqrt(pi/2)·sigma/sqrt(n), common practice),
  judged on Student's t with the degrees of freedom the others' MAD is worth.

The stated false-alarm rate ``false_alarm`` is for one evaluation of a whole line: it is
split evenly over the three parts, and within a part over the channels screened (and the
metrics, for bias) by Bonferroni's inequality, so the chance that a line with no bad channel
flags any channel is at most ``false_alarm`` (for bias, under normal spread; the others'
rates are estimated with Laplace's rule of succession, (k + 1) / (n + 2), so a line with no
failure at all still has a rate above zero). A channel with fewer than ``min_records``
records is never screened.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Final, Literal

import numpy as np

from pipeline.judge.lotspread import NORMAL_MAD_SCALE
from pipeline.model import frozen_mapping

OUT: Final = ("fail", "hold")  # a record out of its windows (an error is the file's, not the channel's)
# the standard error of a median of n normal values is sqrt(pi/2)*sigma/sqrt(n) for large n
# (common practice; e.g. Kendall & Stuart, The Advanced Theory of Statistics, vol. 1)
MEDIAN_SE_FACTOR: Final = math.sqrt(math.pi / 2.0)
KEY_METRICS: Final = (
    "grading_capacity_Ah",
    "dcir_mOhm",
    "first_cycle_efficiency",
    "grading_coulombic_efficiency",
    "rest_voltage_drift_mV_per_h",
    "max_temperature_C",
)
Kind = Literal["rate", "run", "bias"]
MIN_LOT_CELLS: Final = 10  # a lot's median and robust SD need this many passed cells (common practice)


@dataclass(frozen=True, slots=True)
class ChannelRecord:
    """One judged record (one cycle file) as its channel saw it.

    ``order`` sorts the records of a line in test order (an ISO 8601 start time, or any
    text that sorts the same way); ``checks_out`` the checks out of window (failed or held).
    """

    station: str
    channel: str
    order: str
    cell_id: str
    lot: str
    verdict: str
    checks_out: tuple[str, ...] = ()
    values: Mapping[str, float | None] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "values", frozen_mapping(dict(self.values)))

    @property
    def key(self) -> tuple[str, str]:
        return (self.station, self.channel)


def record_of_result(doc: Mapping[str, Any]) -> ChannelRecord:
    """A result JSON document (docs/result.schema.json) as its channel saw it: the channel
    and station its file names ("" when it names none), ordered by the program's start (its
    analysis time when the file gives none), the checks out of window or not judged."""
    cell = doc.get("cell", {})
    out = tuple(str(c["id"]) for c in doc.get("checks", ())
                if c.get("outcome") in ("out_of_window", "not_judged"))
    metrics = doc.get("metrics", {})
    return ChannelRecord(
        str(cell.get("station") or ""), str(cell.get("channel") or ""),
        str(cell.get("started_at") or doc.get("analysed_at") or ""), str(cell.get("cell_id") or ""),
        str(cell.get("lot") or ""), str(doc.get("verdict") or ""), out,
        {k: (float(v) if isinstance(v, int | float) else None) for k, v in metrics.items()},
    )


def channel_label(key: tuple[str, str]) -> str:
    """How a channel is named in words: ``channel 3-04 at demo-line-1``."""
    station, channel = key
    return f"channel {channel} at {station}" if station else f"channel {channel}"


@dataclass(frozen=True, slots=True)
class ChannelScreen:
    """What the suspect-channel screen tests, and how often it may be wrong.

    ``false_alarm``: the chance that one evaluation of a line with no bad channel flags any
    channel; ``recent``: the rate test looks at the channel's last this many records;
    ``min_records``: fewer records and the channel is not screened; ``min_run``: the
    shortest run of one failed check that counts; ``min_cells``: the bias test needs this
    many passing cells on the channel, and ``min_line_cells`` on the other channels (fewer
    give a noisy robust spread: about 30, common practice); ``min_bias_sd``: a bias smaller
    than this many of its lot's robust SDs is not worth an alert however sure it is;
    ``metrics``: the key metrics the bias test looks at. Metric values are compared relative
    to their own lot (median and robust SD of the lot's passed cells).
    """

    false_alarm: float = 0.01
    recent: int = 20
    min_records: int = 5
    min_run: int = 3
    min_cells: int = 8
    min_line_cells: int = 30
    min_bias_sd: float = 0.5
    metrics: tuple[str, ...] = KEY_METRICS

    def __post_init__(self) -> None:
        if not 0.0 < self.false_alarm < 1.0:
            raise ValueError(f"false_alarm must be between 0 and 1, not {self.false_alarm!r}")
        for name in ("recent", "min_records", "min_run", "min_cells", "min_line_cells"):
            if getattr(self, name) < 1:
                raise ValueError(f"{name} must be at least 1, not {getattr(self, name)!r}")


@dataclass(frozen=True, slots=True)
class Evidence:
    """One reason a channel is suspect: the test, its words, its p-value and the level it beat."""

    kind: Kind
    text: str
    p_value: float
    level: float


@dataclass(frozen=True, slots=True)
class Suspect:
    """A channel the screen flags, with every piece of evidence and what to check."""

    key: tuple[str, str]
    evidence: tuple[Evidence, ...]
    records: int

    @property
    def label(self) -> str:
        return channel_label(self.key)

    @property
    def advice(self) -> str:
        kinds = {e.kind for e in self.evidence}
        parts = ["Check the channel's contacts, cables and fixture and its calibration"]
        if "bias" in kinds or "run" in kinds:
            parts.append("retest one of its failed cells on another channel")
        return "; ".join(parts) + " before it tests more cells."


@dataclass(frozen=True, slots=True)
class MetricBias:
    """A key metric on one channel: the median of its passing cells against the others'."""

    metric: str
    n: int
    median: float
    line_median: float
    robust_sd: float
    z: float  # (median - line median) / the standard error of the difference


@dataclass(frozen=True, slots=True)
class ChannelSummary:
    """One channel's record: cells tested, fails and holds by check, the last verdicts, biases."""

    key: tuple[str, str]
    records: int
    passed: int
    failed: int
    held: int
    errors: int
    out_by_check: Mapping[str, int]
    recent: tuple[str, ...]  # its last verdicts, oldest first
    biases: tuple[MetricBias, ...]
    first: str
    last: str

    @property
    def label(self) -> str:
        return channel_label(self.key)


# -- the exact binomial tail ----------------------------------------------------------------


def binomial_tail(k: int, n: int, p: float) -> float:
    """P(X >= k) for X ~ Binomial(n, p): the exact one-sided binomial test's p-value.

    Summed term by term in logarithms (each term from lgamma), largest first, so it stays
    exact to a few ulps for any n a line has.

    >>> round(binomial_tail(3, 6, 0.05), 6), binomial_tail(0, 5, 0.3)
    (0.00223, 1.0)
    """
    if k < 0 or n < 0:
        raise ValueError("k and n must not be negative")
    if k <= 0:
        return 1.0
    if k > n:
        return 0.0
    if p <= 0.0:
        return 0.0
    if p >= 1.0:
        return 1.0
    log_p, log_q = math.log(p), math.log1p(-p)
    base = math.lgamma(n + 1)
    logs = [base - math.lgamma(i + 1) - math.lgamma(n - i + 1) + i * log_p + (n - i) * log_q
            for i in range(k, n + 1)]
    top = max(logs)
    return min(1.0, math.exp(top) * math.fsum(math.exp(v - top) for v in logs))


def laplace_rate(out: int, total: int) -> float:
    """Laplace's rule of succession, (out + 1) / (total + 2): a rate never 0 nor 1."""
    return (out + 1) / (total + 2)


# -- per channel ------------------------------------------------------------------------------


def _by_channel(records: Sequence[ChannelRecord]) -> dict[tuple[str, str], list[ChannelRecord]]:
    grouped: dict[tuple[str, str], list[ChannelRecord]] = {}
    for record in sorted(records, key=lambda r: (r.order, r.cell_id)):
        if record.channel:
            grouped.setdefault(record.key, []).append(record)
    return grouped


def _relative(grouped: Mapping[tuple[str, str], Sequence[ChannelRecord]], metric: str,
              min_lot_cells: int = MIN_LOT_CELLS) -> dict[tuple[str, str], np.ndarray]:
    """Each channel's passed cells' ``metric`` relative to their own lot: (x - the lot's median)
    / the lot's robust SD (1.4826·MAD over the lot's passed cells, every channel). Cells of
    different types and lots are told apart by their lot, so a channel is never compared with
    cells of another kind; a lot with fewer than ``min_lot_cells`` values, or no spread, is
    left out."""
    by_lot: dict[str, list[float]] = {}
    for rs in grouped.values():
        for r in rs:
            v = r.values.get(metric)
            if r.verdict == "pass" and v is not None and math.isfinite(v):
                by_lot.setdefault(r.lot, []).append(v)
    centre: dict[str, tuple[float, float]] = {}
    for lot, values in by_lot.items():
        x = np.asarray(values, dtype=np.float64)
        if x.size >= min_lot_cells:
            med = float(np.median(x))
            sd = NORMAL_MAD_SCALE * float(np.median(np.abs(x - med)))
            if sd > 0.0:
                centre[lot] = (med, sd)
    out = {}
    for key, rs in grouped.items():
        rel = [(v - centre[r.lot][0]) / centre[r.lot][1] for r in rs
               if r.verdict == "pass" and r.lot in centre
               and (v := r.values.get(metric)) is not None and math.isfinite(v)]
        out[key] = np.asarray(rel, dtype=np.float64)
    return out


def metric_bias(mine: np.ndarray, others: np.ndarray, metric: str) -> MetricBias | None:
    """The channel's median against the others' (None when either side has no value or the
    others show no spread). The screen gives it values relative to their lots (in lot SDs)."""
    if mine.size == 0 or others.size < 2:
        return None
    line_median = float(np.median(others))
    sd = NORMAL_MAD_SCALE * float(np.median(np.abs(others - line_median)))
    if not sd > 0.0:
        return None
    median = float(np.median(mine))
    se = MEDIAN_SE_FACTOR * sd * math.sqrt(1.0 / mine.size + 1.0 / others.size)
    return MetricBias(metric, int(mine.size), median, line_median, sd, (median - line_median) / se)


def channel_summaries(
    records: Sequence[ChannelRecord], metrics: Sequence[str] = KEY_METRICS, recent: int = 20
) -> tuple[ChannelSummary, ...]:
    """Every channel's summary, sorted by station and channel (records without a channel
    are left out: they cannot be told apart)."""
    grouped = _by_channel(records)
    relative = {m: _relative(grouped, m) for m in metrics}
    out = []
    for key, mine in sorted(grouped.items()):
        verdicts = Counter(r.verdict for r in mine)
        by_check = Counter(c for r in mine if r.verdict in OUT for c in dict.fromkeys(r.checks_out))
        biases = tuple(
            b for m in metrics
            if (b := metric_bias(relative[m][key], _others(relative[m], key), m)) is not None
        )
        out.append(ChannelSummary(
            key, len(mine), verdicts["pass"], verdicts["fail"], verdicts["hold"], verdicts["error"],
            frozen_mapping(dict(sorted(by_check.items()))), tuple(r.verdict for r in mine[-recent:]),
            biases, mine[0].order, mine[-1].order,
        ))
    return tuple(out)


def _others(values: Mapping[tuple[str, str], np.ndarray], key: tuple[str, str]) -> np.ndarray:
    rest = [x for k, x in values.items() if k != key]
    return np.concatenate(rest) if rest else np.empty(0)


# -- the screen -----------------------------------------------------------------------------


def _run_of_one_check(mine: Sequence[ChannelRecord]) -> tuple[int, str]:
    """The length of the run of out-of-window records at the end that share one check, and it."""
    best = (0, "")
    if not mine or mine[-1].verdict not in OUT:
        return best
    for check in dict.fromkeys(mine[-1].checks_out):
        length = 0
        for record in reversed(mine):
            if record.verdict in OUT and check in record.checks_out:
                length += 1
            else:
                break
        best = max(best, (length, check))
    return best


def _t_tail(z: float, others: int) -> float:
    """The two-sided p-value of the bias test's ``z``: Student's t with as many degrees of
    freedom as the others' robust spread is worth (the MAD has about 37 % of the standard
    deviation's efficiency on normal data, Huber 1981, Robust Statistics, section 5.1, so n
    values weigh as about 0.37 n)."""
    from scipy.stats import t  # lazily: only a screen with a bias test needs scipy

    return float(2.0 * t.sf(abs(z), max(1.0, 0.37 * others)))


def screen_channels(
    records: Sequence[ChannelRecord], spec: ChannelScreen = ChannelScreen()
) -> tuple[Suspect, ...]:
    """The suspect channels of a line, each with its evidence (see the module's docstring).

    ``records``: every judged record of the line with its channel (any order: they are put
    in test order here). Records with verdict "error" count for neither side.
    """
    grouped = {k: [r for r in rs if r.verdict != "error"] for k, rs in _by_channel(records).items()}
    screened = [k for k, rs in grouped.items() if len(rs) >= spec.min_records]
    if len(grouped) < 2 or not screened:
        return ()
    part = spec.false_alarm / 3.0
    level = part / len(screened)
    bias_tail = part / (2.0 * len(screened) * max(1, len(spec.metrics)))
    out_by_key = {k: sum(r.verdict in OUT for r in rs) for k, rs in grouped.items()}
    total_out, total = sum(out_by_key.values()), sum(len(rs) for rs in grouped.values())
    passing = {m: _relative(grouped, m) for m in spec.metrics}
    suspects = []
    for key in sorted(screened):
        mine = grouped[key]
        q = laplace_rate(total_out - out_by_key[key], total - len(mine))
        evidence: list[Evidence] = []
        window = mine[-spec.recent:]
        k = sum(r.verdict in OUT for r in window)
        p = binomial_tail(k, len(window), q)
        if k and p < level:
            evidence.append(Evidence(
                "rate", f"{k} of its last {len(window)} cells failed or were held, against "
                f"{100.0 * q:.1f} % on the line's other channels (exact binomial test, p = {p:.2g})",
                p, level))
        run, check = _run_of_one_check(mine)
        if run >= spec.min_run and (p_run := q ** run) < level:
            evidence.append(Evidence(
                "run", f"its last {run} cells all failed check {check} (chance {p_run:.2g} on a "
                "channel like the others)", p_run, level))
        for metric in spec.metrics:
            mine_x = passing[metric][key]
            if mine_x.size < spec.min_cells:
                continue
            others_x = _others(passing[metric], key)
            if others_x.size < spec.min_line_cells:
                continue
            bias = metric_bias(mine_x, others_x, metric)
            if bias is None or abs(bias.median - bias.line_median) < spec.min_bias_sd * bias.robust_sd:
                continue  # too small a bias to matter, however sure (common practice)
            if (p_bias := _t_tail(bias.z, others_x.size)) < 2.0 * bias_tail:
                side = "above" if bias.z > 0 else "below"
                shift = abs(bias.median - bias.line_median)
                evidence.append(Evidence(
                    "bias", f"the median {metric} of its {bias.n} passed cells stands {shift:.1f} lot "
                    f"SDs {side} the other channels' ({abs(bias.z):.1f} standard errors)",
                    p_bias, 2.0 * bias_tail))
        if evidence:
            suspects.append(Suspect(key, tuple(evidence), len(mine)))
    return tuple(suspects)


__all__ = [
    "KEY_METRICS",
    "ChannelRecord",
    "ChannelScreen",
    "ChannelSummary",
    "Evidence",
    "MetricBias",
    "Suspect",
    "binomial_tail",
    "channel_label",
    "channel_summaries",
    "laplace_rate",
    "metric_bias",
    "record_of_result",
    "screen_channels",
]
