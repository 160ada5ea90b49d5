"""The cell JSON document (schema version 1): a cell's standing decision over its stages.

Pure: a CellSummary in, a JSON-ready dict or text out. Beside each stage record's own
result document (result.py) the station publishes one of these per cell, at
``results/<lot>/<cell>~cell.json``; its SHA-256 is the verification code printed on the
cell certificate. ``python -m pipeline.report.cellresult`` prints the schema that
docs/cell.schema.json holds (a test keeps the two equal).
"""

from __future__ import annotations

import datetime
import json
from typing import Any

from pipeline.acceptance.rules import FAMILIES, STAGES
from pipeline.report.cellsummary import (
    AgingEntry,
    CellSummary,
    CheckEntry,
    DecisionEntry,
    ReviewEntry,
    ScreenEntry,
    StageEntry,
    standing_why,
)
from pipeline.report.result import json_number

SCHEMA_VERSION = 1
VERDICTS = ("pass", "fail", "hold")
CAUSES = ("record", "readings", "lot closed", "rules", "review")
SCREEN_OUTCOMES = ("outlier", "not held", "not applied")
OUTCOMES = ("in_window", "out_of_window", "not_judged", "skipped")


def _time(moment: datetime.datetime) -> str:
    return moment.astimezone(datetime.UTC).isoformat(timespec="seconds")


def _decision(d: DecisionEntry) -> dict[str, Any]:
    return {
        "decision_id": d.id,
        "verdict": d.verdict,
        "reasons": list(d.reasons),
        "hazards": list(d.hazards),
        "grade": d.grade,
        "cause": d.cause,
        "decided_at": _time(d.decided_at),
        "review_id": d.review_id,
    }


def _record(r: StageEntry) -> dict[str, Any]:
    return {
        "stages": list(r.stages),
        "counts_for": list(r.counts_for),
        "input": {"name": r.file, "sha256": r.sha256},
        "verdict": r.verdict,
        "decision": r.decision,
        "hazards": list(r.hazards),
        "analysed_at": _time(r.analysed_at),
        "rule_set": r.rule_set,
        "metrics": {name: json_number(value) for name, value in r.metrics},
        "result_file": r.json_name,
        "certificate_file": r.certificate_name,
    }


def _check(c: CheckEntry) -> dict[str, Any]:
    return {
        "rule_id": c.rule_id,
        "metric": c.metric,
        "value": json_number(c.value),
        "low": json_number(c.low),
        "high": json_number(c.high),
        "severity": c.severity,
        "outcome": c.outcome,
        "U": json_number(c.uncertainty),
    }


def _aging(a: AgingEntry | None) -> dict[str, Any] | None:
    if a is None:
        return None
    return {
        "verdict": a.verdict,
        "decision": a.decision,
        "k_value_mV_per_day": json_number(a.k_value_mV_per_day),
        "days": json_number(a.days),
        "note": a.k_note,
        "readings": [
            {
                "at": _time(r.at),
                "ocv_V": r.ocv_v,
                "acir_mOhm": json_number(r.acir_mohm),
                "temperature_C": json_number(r.temperature_c),
                "input": {"name": r.file, "sha256": r.sha256},
            }
            for r in a.readings
        ],
        "checks": [_check(c) for c in a.checks],
    }


def _screen(s: ScreenEntry) -> dict[str, Any]:
    return {
        "id": s.id,
        "metric": s.metric,
        "k": s.k,
        "sides": s.sides,
        "value": json_number(s.value),
        "outcome": s.outcome,
        "detail": s.detail,
    }


def _review(r: ReviewEntry) -> dict[str, Any]:
    return {
        "review_id": r.id,
        "action": r.action,
        "stage": r.stage,
        "accepts": list(r.accepts),
        "reviewer": r.reviewer,
        "reason": r.reason,
        "reviewed_at": _time(r.reviewed_at),
        "answered_decision_id": r.answered,
    }


def to_document(summary: CellSummary) -> dict[str, Any]:
    """The cell document as a JSON-ready dict (no clock: the same summary, the same dict)."""
    s = summary
    rs = s.rule_set
    return {
        "schema_version": SCHEMA_VERSION,
        "kind": "cell",
        "cell": {
            "cell_id": s.cell_id,
            "lot": s.lot,
            "cell_type": s.cell_type,
            "nominal_capacity_Ah": json_number(s.nominal_capacity_ah),
        },
        "rule_set": {"name": rs.name, "revision": rs.revision, "sha256": rs.sha256,
                     "source": rs.source, "family": rs.family},
        "station": s.station,
        "software": {"name": "formgate", "version": s.software_version},
        "standing": {**_decision(s.decision), "why": list(standing_why(s))},
        "needed_stages": list(s.needed),
        "missing_stages": list(s.missing),
        "records": [_record(r) for r in s.records],
        "aging": _aging(s.aging),
        "screens": [_screen(x) for x in s.screens],
        "reviews": [_review(r) for r in s.reviews],
        "history": [_decision(d) for d in s.history],
        "files": {"result": s.json_name, "certificate": s.certificate_name},
    }


def to_json(summary: CellSummary) -> str:
    """The cell document as stable, indented JSON text ending in a newline."""
    return json.dumps(to_document(summary), indent=2, ensure_ascii=False) + "\n"


_NUM = {"type": ["number", "null"]}
_STR = {"type": "string"}
_TIME = {"type": "string", "format": "date-time"}
_SHA = {"type": "string", "pattern": "^[0-9a-f]{64}$"}
_FILE = {
    "type": "object",
    "additionalProperties": False,
    "required": ["name", "sha256"],
    "properties": {"name": _STR, "sha256": {"type": "string", "pattern": "^([0-9a-f]{64})?$"}},
}


def _obj(properties: dict[str, Any], description: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {
        "type": "object",
        "additionalProperties": False,
        "required": list(properties),
        "properties": properties,
    }
    return {"description": description, **out} if description else out


def _decision_schema(extra: dict[str, Any] | None = None) -> dict[str, Any]:
    return _obj({
        "decision_id": {"type": "integer", "minimum": 1, "description": "its ledger row"},
        "verdict": {"enum": list(VERDICTS)},
        "reasons": {"type": "array", "items": _STR},
        "hazards": {"type": "array", "items": _STR},
        "grade": {"type": ["string", "null"]},
        "cause": {"enum": list(CAUSES)},
        "decided_at": _TIME,
        "review_id": {"type": ["integer", "null"]},
        **(extra or {}),
    })


def schema() -> dict[str, Any]:
    """JSON Schema (2020-12) of the cell document, version 1."""
    stage_list = {"type": "array", "items": {"enum": list(STAGES)}, "uniqueItems": True}
    check = _obj({
        "rule_id": _STR,
        "metric": _STR,
        "value": _NUM,
        "low": _NUM,
        "high": _NUM,
        "severity": {"enum": ["reject", "review"]},
        "outcome": {"enum": list(OUTCOMES)},
        "U": {"type": ["number", "null"], "minimum": 0},
    })
    document = _obj({
        "schema_version": {"const": SCHEMA_VERSION},
        "kind": {"const": "cell"},
        "cell": _obj({
            "cell_id": _STR,
            "lot": _STR,
            "cell_type": _STR,
            "nominal_capacity_Ah": _NUM,
        }),
        "rule_set": _obj({
            "name": _STR,
            "revision": _STR,
            "sha256": _SHA,
            "source": _STR,
            "family": {"enum": [*FAMILIES, None]},
        }, "the rule set in force when the cell was decided"),
        "station": _STR,
        "software": _obj({"name": {"const": "formgate"}, "version": _STR}),
        "standing": _decision_schema({
            "why": {
                "description": "why the cell stands where it stands, the deciding cause first: "
                "a review, a stage record and its check, the aging readings, a lot screen, a "
                "stage still to come",
                "type": "array",
                "items": _STR,
            },
        }) | {"description": "the cell's standing decision: its latest in the ledger"},
        "needed_stages": stage_list,
        "missing_stages": stage_list,
        "records": {
            "description": "every cycle-file record of the cell, oldest first; counts_for names "
            "the stages it is the record that counts for (empty: superseded)",
            "type": "array",
            "items": _obj({
                "stages": stage_list,
                "counts_for": stage_list,
                "input": _FILE,
                "verdict": {"enum": list(VERDICTS)},
                "decision": _STR,
                "hazards": {"type": "array", "items": _STR},
                "analysed_at": _TIME,
                "rule_set": _STR,
                "metrics": {"type": "object", "additionalProperties": _NUM},
                "result_file": _STR,
                "certificate_file": {"type": ["string", "null"]},
            }),
        },
        "aging": {
            "description": "the aging stage judged on every reading of the cell; null: no reading",
            "oneOf": [
                {"type": "null"},
                _obj({
                    "verdict": {"enum": list(VERDICTS)},
                    "decision": _STR,
                    "k_value_mV_per_day": _NUM,
                    "days": _NUM,
                    "note": _STR,
                    "readings": {
                        "type": "array",
                        "items": _obj({
                            "at": _TIME,
                            "ocv_V": {"type": "number"},
                            "acir_mOhm": _NUM,
                            "temperature_C": _NUM,
                            "input": _FILE,
                        }),
                    },
                    "checks": {"type": "array", "items": check},
                }),
            ],
        },
        "screens": {
            "description": "the lot's screens as they apply to this cell",
            "type": "array",
            "items": _obj({
                "id": _STR,
                "metric": _STR,
                "k": {"type": "number"},
                "sides": _STR,
                "value": _NUM,
                "outcome": {"enum": list(SCREEN_OUTCOMES)},
                "detail": _STR,
            }),
        },
        "reviews": {
            "description": "every person's review of the cell, oldest first",
            "type": "array",
            "items": _obj({
                "review_id": {"type": "integer", "minimum": 1},
                "action": {"enum": ["release", "reject", "retest"]},
                "stage": {"type": ["string", "null"]},
                "accepts": {"type": "array", "items": _STR},
                "reviewer": _STR,
                "reason": _STR,
                "reviewed_at": _TIME,
                "answered_decision_id": {"type": "integer", "minimum": 1},
            }),
        },
        "history": {
            "description": "every decision on the cell, oldest first, the standing one last",
            "type": "array",
            "minItems": 1,
            "items": _decision_schema(),
        },
        "files": _obj({
            "result": _STR,
            "certificate": {"type": ["string", "null"]},
        }, "the names of this document and of the cell certificate published with it"),
    })
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": "formgate:cell:v1",
        "title": "formgate cell decision, schema version 1",
        **document,
    }


def schema_text() -> str:
    return json.dumps(schema(), indent=2, ensure_ascii=False) + "\n"


if __name__ == "__main__":  # pragma: no cover
    print(schema_text(), end="")
