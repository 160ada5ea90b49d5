"""Turns a cell's standing decision (a CellSummary) into its cell certificate's HTML.

Pure: a CellSummary and its verification code in, text out; no clock (the only times
shown are recorded ones). Every value reaches the page formatted and autoescaped, through
the certificate's own Jinja2 environment, stylesheet and font (certificate.py, pdf.py).
The cautions of a failed cell, and of a held one, are the stage certificate's words
(hazards.py); a cell a person released over a hazard keeps that hazard's caution, the
handling and the general caution.
"""

from __future__ import annotations

import datetime
import math

from pipeline.acceptance.rules import Hazard, only_waiting
from pipeline.judge.quantities import DASH, format_uncertain, format_value, significant
from pipeline.report import hazards, verification
from pipeline.report.cellsummary import (
    AgingEntry,
    CellSummary,
    CheckEntry,
    StageEntry,
    release_of,
    released_over,
    standing_why,
)
from pipeline.report.certificate import HAZARD_WORDS, environment, stage_words

TEMPLATE_NAME = "cell-certificate.html.j2"
VERDICT_WORDS = {"pass": "PASS", "fail": "FAIL", "hold": "HOLD"}
HEADLINES = {
    "pass": "The cell passes: every stage it needs has passed, and no screen or review holds it.",
    "fail": "Rejected: the cell failed. Do not release it; handle it with care.",
    "hold": "Held: this cell must not be released until a person has reviewed it.",
}
# A cell a person released although its record shows a hazard: it passes, but not clean.
RELEASED_OVER_HAZARD_HEADLINE = (
    "Released by a person's review although its record shows a hazard: this is no clean "
    "pass. The hazard stays with the cell, and so does its caution below."
)
WAITING_HEADLINE = (
    "Not released yet: the cell waits for a stage it needs. It may be released only once "
    "every stage has passed."
)
CAUSE_WORDS = {
    "record": "a stage record was judged",
    "readings": "aging readings came in",
    "lot closed": "its lot was closed",
    "rules": "the rules changed",
    "review": "a person's review",
}
OUTCOME_WORDS = {
    "in_window": "in window",
    "out_of_window": "OUT OF WINDOW",
    "not_judged": "not judged",
    "skipped": "not made (allowed)",
}
SCREEN_WORDS = {"outlier": "OUTLIER", "not held": "not held", "not applied": "not applied"}
ACTION_WORDS = {"release": "released", "reject": "rejected", "retest": "retest"}
# The key metrics' names as a stage record's row shows them (the JSON keeps the metric keys).
METRIC_LABELS = {
    "first_cycle_efficiency": "first-cycle efficiency",
    "irreversible_capacity_Ah": "irreversible capacity",
    "grading_capacity_Ah": "grading capacity",
    "grading_energy_Wh": "grading energy",
    "dcir_mOhm": "DC resistance",
    "rest_voltage_drift_mV_per_h": "rest voltage drift",
    "max_temperature_C": "highest temperature",
}


def _time(moment: datetime.datetime) -> str:
    return moment.astimezone(datetime.UTC).strftime("%Y-%m-%d %H:%M UTC")


def _window(metric: str, low: float | None, high: float | None) -> str:
    if low is not None and high is not None:
        return f"{format_value(metric, low)} \N{EN DASH} {format_value(metric, high)}"
    if low is not None:
        return f"\N{GREATER-THAN OR EQUAL TO} {format_value(metric, low)}"
    if high is not None:
        return f"\N{LESS-THAN OR EQUAL TO} {format_value(metric, high)}"
    return "any value"


def _record_row(r: StageEntry) -> dict[str, object]:
    if r.counts_for:
        role = "counts for " + stage_words(r.counts_for)
    else:
        role = "superseded by a later record"
    return {
        "stage": stage_words(r.stages),
        "role": role,
        "file": r.file,
        "sha256": r.sha256,
        "verdict": VERDICT_WORDS.get(r.verdict, r.verdict.upper()),
        "verdict_class": r.verdict,
        "decision": r.decision,
        "hazards": ", ".join(_hazard_words(h) for h in r.hazards),
        "judged": _time(r.analysed_at),
        "rule_set": r.rule_set,
        "metrics": [
            (METRIC_LABELS.get(name, name), format_value(name, value)) for name, value in r.metrics
        ],
        "certificate": r.certificate_name or DASH,
        "counts": bool(r.counts_for),
    }


def _hazard(name: str) -> Hazard | None:
    return next((h for h in Hazard if h.value == name), None)


def _hazard_words(name: str) -> str:
    hazard = _hazard(name)
    return HAZARD_WORDS[hazard] if hazard is not None else name


def _check_row(c: CheckEntry) -> dict[str, str]:
    return {
        "id": c.rule_id,
        "metric": c.metric,
        "value": format_uncertain(c.metric, c.value, c.uncertainty),
        "window": _window(c.metric, c.low, c.high),
        "severity": c.severity,
        "outcome": OUTCOME_WORDS.get(c.outcome, c.outcome),
        "outcome_class": c.outcome.replace("_", "-"),
    }


def _aging(a: AgingEntry | None) -> dict[str, object] | None:
    if a is None:
        return None
    k = a.k_value_mV_per_day
    k_text = f"{significant(k, 3)} mV/day" if k is not None and math.isfinite(k) else DASH
    if a.days is not None:
        k_text += f" over {a.days:.1f} days"
    return {
        "verdict": VERDICT_WORDS.get(a.verdict, a.verdict.upper()),
        "verdict_class": a.verdict,
        "decision": a.decision,
        "k_value": k_text,
        "note": a.k_note,
        "readings": [
            {
                "at": _time(r.at),
                "ocv": f"{r.ocv_v:.4f} V",
                "acir": format_value("dcir_mOhm", r.acir_mohm).replace("mOhm", "m\N{OHM SIGN}")
                if r.acir_mohm is not None else DASH,
                "temperature": format_value("max_temperature_C", r.temperature_c),
                "file": r.file,
            }
            for r in a.readings
        ],
        "checks": [_check_row(c) for c in a.checks],
    }


def _only_waiting(summary: CellSummary) -> bool:
    """Held only while a stage it needs is still to come: no caution, no person needed."""
    d = summary.decision
    return d.verdict == "hold" and only_waiting("; ".join(d.reasons))


def _cautions(summary: CellSummary) -> dict[str, object]:
    """The caution box: a failed cell's (and a hazardous held cell's) hazard cautions and
    handling, and for every fail or hold for a real reason the general caution. A cell
    released over a hazard keeps them all: a release never clears a hazard."""
    d = summary.decision
    waiting_only = _only_waiting(summary)
    named = [h for h in (_hazard(n) for n in d.hazards) if h is not None]
    note = ""
    if d.verdict == "pass" and released_over(summary):
        review = release_of(summary)
        how = "as a concession " if review is not None and review.accepts else ""
        title = f"Caution: this cell was released {how}over a hazard its record shows"
        note = (
            "A person released this cell although its record shows the hazard named here. "
            "The release allows its use only as your site's procedures for concessions say: "
            "it does not make the cell good or safe. Where this caution and the release "
            "disagree, your site's procedures and qualified personnel decide."
        )
    elif d.verdict == "pass" or waiting_only:
        return {"general_caution": "", "cautions": [], "handling": "", "caution_title": "",
                "caution_note": ""}
    elif d.verdict == "fail":
        title = "Caution: this cell failed and may be hazardous"
    elif named:
        title = "Caution: this cell is held, and its record shows a hazard"
    else:
        title = "Caution: this cell is held and must not be released until reviewed"
    return {
        "caution_title": title,
        "cautions": [
            {"title": hazards.CAUTIONS[h].title, "text": hazards.CAUTIONS[h].text} for h in named
        ],
        "handling": hazards.HANDLING if named else "",
        "general_caution": hazards.general_caution(summary.rule_set.family),
        "caution_note": note,
    }


def build_context(summary: CellSummary, *, code: str) -> dict[str, object]:
    """Everything the cell certificate shows, formatted. ``code``: the verification code of
    the cell JSON published with it (report/verification.py)."""
    s, d = summary, summary.decision
    word = VERDICT_WORDS[d.verdict]
    waiting = _only_waiting(summary)
    headline = WAITING_HEADLINE if waiting else HEADLINES[d.verdict]
    if released_over(summary):
        headline = RELEASED_OVER_HAZARD_HEADLINE
    nominal = (
        f" (nominal {significant(s.nominal_capacity_ah, 4)} Ah)"
        if s.nominal_capacity_ah is not None else ""
    )
    rs = s.rule_set
    review_of = {r.id: r for r in s.reviews}
    return {
        "title": f"Cell certificate for cell {s.cell_id}: {word}",
        "description": (
            f"Cell certificate, cell {s.cell_id}, lot {s.lot}, cell type {s.cell_type}: {word}"
        ),
        # the code in the PDF's metadata too, as a stage certificate's (`formgate verify`)
        "keywords": f"cell certificate, formation, aging, grading, {word}, "
        f"verification code {code}",
        "generator": f"formgate {s.software_version}",
        "created": d.decided_at.astimezone(datetime.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "cell_id": s.cell_id,
        "scope": (
            f"This certificate covers cell {s.cell_id} as a whole: its standing decision over "
            f"every stage it needs ({stage_words(s.needed)}), its aging readings, its lot's "
            "screens and every review. It is rewritten whenever that decision changes. Each "
            "stage record below has a certificate of its own, which judges that stage alone."
        ),
        "verdict": {
            "kind": d.verdict,
            "word": word,
            "headline": headline,
            "why": list(standing_why(s)),
            "channel_notes": list(s.channel_notes),
            "grade": d.grade or "",
        },
        **_cautions(s),
        "identity": [
            ("Cell ID", s.cell_id),
            ("Lot", s.lot),
            ("Cell type", f"{s.cell_type}{nominal}"),
            ("Stages needed", stage_words(s.needed)),
            ("Stages missing", stage_words(s.missing) or "none"),
            ("Grade", d.grade or DASH),
            ("Decided", _time(d.decided_at)),
            ("Because", CAUSE_WORDS.get(d.cause, d.cause)),
            ("Decision", f"ledger decision {d.id}"),
            ("Station", s.station),
        ],
        "records": [_record_row(r) for r in s.records],
        "aging": _aging(s.aging),
        "aging_needed": "aging" in s.needed,
        "screens": [
            {
                "id": x.id,
                "metric": x.metric,
                "rule": f"median \N{PLUS-MINUS SIGN} {x.k:g} \N{MULTIPLICATION SIGN} scaled MAD"
                f" ({x.sides})",
                "value": format_value(x.metric, x.value),
                "outcome": SCREEN_WORDS.get(x.outcome, x.outcome),
                "outcome_class": x.outcome.replace(" ", "-"),
                "detail": x.detail,
            }
            for x in s.screens
        ],
        "reviews": [
            {
                "id": str(r.id),
                "when": _time(r.reviewed_at),
                "who": r.reviewer,
                "action": ACTION_WORDS.get(r.action, r.action)
                + (f" (stage {r.stage})" if r.stage else "")
                + (f", accepting {', '.join(r.accepts)}" if r.accepts else ""),
                "why": r.reason,
                "answered": f"decision {r.answered}",
            }
            for r in s.reviews
        ],
        "history": [
            {
                "id": str(h.id),
                "when": _time(h.decided_at),
                "verdict": VERDICT_WORDS.get(h.verdict, h.verdict)
                + (f", grade {h.grade}" if h.grade else ""),
                "verdict_class": h.verdict,
                "cause": CAUSE_WORDS.get(h.cause, h.cause)
                + (f" ({review_of[h.review_id].reviewer})" if h.review_id in review_of else ""),
                "reason": h.reason or DASH,
                "standing": h.id == d.id,
            }
            for h in s.history
        ],
        "data_check_notice": hazards.DATA_CHECK_NOTICE,
        "traceability": [
            [("Cell JSON", s.json_name)],
            [("Rule set", f"{rs.name}, revision {rs.revision}"), ("Rule set file", rs.source)],
            [("Rule set SHA-256", rs.sha256)],
            [("Software", f"formgate {s.software_version}"), ("Decided at", _time(d.decided_at))],
        ],
        "verification": {"code": code, "spaced": verification.spaced(code)},
    }


def render_html(summary: CellSummary, *, code: str) -> str:
    """The cell certificate as an HTML document (a str); ``code``: its verification code."""
    context = build_context(summary, code=code)
    return environment().get_template(TEMPLATE_NAME).render(context)
