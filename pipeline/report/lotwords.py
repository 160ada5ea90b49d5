"""The lot report's figures in words: numbers with their units, windows, yield, Cpk and its note.

Pure formatting of what :mod:`pipeline.judge.lotspread` and :mod:`pipeline.judge.lotstats`
work out: a value, a spread and a window are written as the certificates and letters write
them (:mod:`pipeline.judge.quantities`: a fraction as %, a value not measured as an em
dash), a Cpk below the usual minimum says so, and one check's capability becomes one row
of the report's table. Which of these the page shows, and where, is left to
:mod:`pipeline.report.lotreport`.
"""

from __future__ import annotations

from typing import Final

from pipeline.acceptance.rules import Window
from pipeline.judge.lotspread import Capability
from pipeline.judge.lotstats import WindowSpec
from pipeline.judge.quantities import DASH, format_spread, format_value, format_window

# Cpk below 1.33 is the usual minimum for an established process (common practice).
CPK_MINIMUM: Final = 1.33


def window_text(metric: str, low: float | None, high: float | None) -> str:
    """A metric's window as a certificate writes it: "low to high" (en dash), "≥ low",
    "≤ high" (with unit, a fraction as %) or "any value"."""
    return format_window(metric, Window(low, high))


def yield_text(passed: int, total: int) -> str:
    """The yield as a percentage to one decimal, e.g. "91.7 %"; an em dash for an empty lot.

    >>> yield_text(55, 60), yield_text(0, 0)
    ('91.7 %', '—')
    """
    return f"{100.0 * passed / total:.1f} %" if total else DASH


def cpk_text(capability: Capability) -> tuple[str, str]:
    """Cpk to two decimals and a note: "below 1.33", or why no Cpk could be worked out.

    >>> from pipeline.judge.lotspread import capability
    >>> cpk_text(capability([9.0, 10.0, 11.0], 7.0, 16.0))
    ('1.00', 'below 1.33')
    >>> cpk_text(capability([5.0], 0.0, 10.0))
    ('—', 'fewer than 2 values')
    """
    if capability.cpk is None:
        return DASH, capability.why
    shown = f"{capability.cpk:.2f}".replace("-", "\N{MINUS SIGN}")
    return shown, "below 1.33" if capability.cpk < CPK_MINIMUM else ""


def capability_row(check: WindowSpec, cap: Capability) -> dict[str, str]:
    """One check's row of the capability table: its window, n, mean, sd, Cpk and note, in words
    (each in the metric's own unit, as quantities.py writes it)."""
    cpk, note = cpk_text(cap)
    return {
        "check": check.key,
        "metric": check.metric,
        "severity": check.severity,
        "window": window_text(check.metric, check.low, check.high),
        "n": str(cap.n),
        "mean": format_value(check.metric, cap.mean),
        "sd": format_spread(check.metric, cap.sd),
        "cpk": cpk,
        "note": note,
        "below": "below" if note == "below 1.33" else "",
    }


__all__ = ["CPK_MINIMUM", "capability_row", "cpk_text", "window_text", "yield_text"]
