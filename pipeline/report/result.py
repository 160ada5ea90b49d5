"""The per-cell result document (JSON, schema version 1) and its published JSON Schema.

Pure: a CellResult in, a JSON-ready dict or text out. ``python -m pipeline.report.result``
prints the schema that docs/result.schema.json holds (a test keeps the two equal).
"""

from __future__ import annotations

import json
import math
from typing import Any

from pipeline.acceptance.results import CellResult, CheckResult, Outcome
from pipeline.acceptance.rules import DECISION_RULES, FAMILIES, WHOLE_PROGRAM
from pipeline.judge.evaluate import decision_line
from pipeline.judge.metricdefs import METRICS
from pipeline.model import AccuracyClass, CurrentBand, CycleMetrics, Note, Plateau
from pipeline.read.accuracy import ACCURACY_KEYS as ACCURACY_FILE_KEYS
from pipeline.read.accuracy import accuracy_from

SCHEMA_VERSION = 1
IDENTITY_KEYS = ("cell_id", "lot", "cell_type", "channel", "station", "program", "started_at")


def json_number(value: float | None) -> float | None:
    """A value for a JSON document: a float, or None (null) for a value not measured or not finite."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def _cycle(c: CycleMetrics) -> dict[str, Any]:
    return {
        "cycle": c.index,
        "charge_capacity_Ah": json_number(c.charge_capacity_ah),
        "discharge_capacity_Ah": json_number(c.discharge_capacity_ah),
        "coulombic_efficiency": json_number(c.coulombic_efficiency),
        "discharge_energy_Wh": json_number(c.discharge_energy_wh),
        "mean_discharge_voltage_V": json_number(c.mean_discharge_voltage_v),
        "max_charge_voltage_V": json_number(c.max_charge_voltage_v),
        "min_discharge_voltage_V": json_number(c.min_discharge_voltage_v),
        "cv_duration_s": json_number(c.cv_duration_s),
        "max_temperature_C": json_number(c.max_temperature_c),
    }


def _plateau(p: Plateau) -> dict[str, Any]:
    return {
        "voltage_V": p.voltage_v,
        "start_pct": p.start_pct,
        "end_pct": p.end_pct,
        "length_pct": p.length_pct,
        "length_Ah": p.length_ah,
    }


def _check(c: CheckResult) -> dict[str, Any]:
    return {
        "id": c.rule_id,
        "metric": c.metric,
        "value": json_number(c.value),
        "low": c.window.low,
        "high": c.window.high,
        "outcome": c.outcome.value,
        "severity": c.severity.value,
        "hazard": c.hazard.value if c.hazard else None,
        "message": c.message,
        "U": json_number(c.uncertainty),
        "decision": c.decision,
        "too_close": c.too_close,
    }


def _accuracy(accuracy: AccuracyClass | None) -> dict[str, Any] | None:
    """The channel's accuracy class the uncertainties came from, and where it was declared."""
    if accuracy is None:
        return None
    # the keys a profile or station.toml declares a class with (read/accuracy.py)
    return {
        **{key.name: getattr(accuracy, key.field) for key in ACCURACY_FILE_KEYS},
        "source": accuracy.source,
    }


def _note(n: Note) -> dict[str, Any]:
    return {
        "code": n.code,
        "text": n.text,
        "file": n.where.path if n.where else None,
        "line": n.where.line if n.where else None,
        "blocks": list(n.blocks),
    }


def to_document(result: CellResult) -> dict[str, Any]:
    """The schema-v1 result of one cell as plain JSON types."""
    meta = dict(result.metadata)
    return {
        "schema_version": SCHEMA_VERSION,
        "cell": {key: meta.get(key) for key in IDENTITY_KEYS},
        # the stages of the cell's making the file covers: its ``stage`` metadata, in words
        "stages": list(result.stages),
        "record": None
        if result.record is None
        else {
            "number": result.record.number,
            "of": result.record.of,
            "supersedes": {
                "name": result.record.supersedes_file,
                "verdict": result.record.supersedes_verdict,
                "analysed_at": result.record.supersedes_at.isoformat(),
            },
        },
        "other_metadata": {
            k: v for k, v in meta.items() if k not in IDENTITY_KEYS and k != "stage"
        },
        "input": {"name": result.source_name, "sha256": result.input_sha256},
        "rule_set": {
            "name": result.rule_set.name,
            "revision": result.rule_set.revision,
            "sha256": result.rule_set.sha256,
            "source": result.rule_set.source,
            "family": result.rule_set.family,
        },
        "cell_type": {
            "name": result.cell_type.name,
            "nominal_capacity_Ah": result.cell_type.nominal_capacity_ah,
        },
        "software": {"name": "formgate", "version": result.software_version},
        "analysed_at": result.analysed_at.isoformat(),
        "verdict": result.verdict.kind.value,
        "hazards": [h.value for h in result.verdict.hazards],
        "reasons": list(result.verdict.reasons),
        "decision": decision_line(result.verdict, result.notes),
        "metrics": {m.name: json_number(result.metrics.values.get(m.name)) for m in METRICS},
        # each metric's expanded uncertainty U (k = 2); null: not measured, or none (a count)
        "metrics_U": {
            m.name: json_number(result.metrics.uncertainty.get(m.name)) for m in METRICS
        },
        "accuracy": _accuracy(result.accuracy),
        "cycles": [_cycle(c) for c in result.metrics.cycles],
        "plateaus": [_plateau(p) for p in result.metrics.plateaus],
        "ica_peaks_V": list(result.metrics.ica_peaks_v),
        "checks": [_check(c) for c in result.verdict.checks],
        "checks_not_made": [
            c.rule_id
            for c in result.verdict.checks
            if c.outcome in (Outcome.NOT_JUDGED, Outcome.SKIPPED)
        ],
        "current_band": _band(result.current_band),
        "notes": [_note(n) for n in result.notes],
    }


def _band(band: CurrentBand | None) -> dict[str, Any] | None:
    """How rest was told from current: the file's offset and noise, the threshold used."""
    if band is None:
        return None
    return {
        "offset_A": band.offset_a,
        "noise_A": band.noise_a,
        "threshold_A": band.threshold_a,
        "rule_floor_A": band.floor_a,
        "rows_near_zero": band.rows,
        # the offset estimate's standard uncertainty, and whether it was taken out of the
        # current before charge was counted (rest_band.take_out_offset)
        "offset_u_A": band.offset_u_a,
        "offset_corrected": band.corrected,
    }


def to_json(result: CellResult) -> str:
    """The result document as stable, indented JSON text ending in a newline."""
    return json.dumps(to_document(result), indent=2, ensure_ascii=False) + "\n"


_NUM = {"type": ["number", "null"]}
_STR = {"type": ["string", "null"]}


ACCURACY_KEYS: tuple[str, ...] = tuple(_accuracy(AccuracyClass()) or {})


def accuracy_of(result_json: str | None) -> AccuracyClass | None:
    """The accuracy class a result document was judged with (None: none recorded), so that a
    regrade judges the bytes again with the channel's class and only the rules changed."""
    if result_json is None:
        return None
    found = json.loads(result_json).get("accuracy")
    if not isinstance(found, dict):
        return None
    # read back as a file declares it; a range not known is left out, as in a file
    declared = {k: v for k, v in found.items() if k != "source" and v is not None}
    return accuracy_from(declared, str(found["source"]))


def schema() -> dict[str, Any]:
    """JSON Schema (2020-12) of the result document, version 1."""
    cycle_keys = list(_cycle(CycleMetrics(1, 0.0, None, None, None, None, None, None, 0.0, None)))
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": "formgate:result:v1",
        "title": "formgate cell result, schema version 1",
        "type": "object",
        "additionalProperties": False,
        "required": [
            "schema_version",
            "cell",
            "stages",
            "other_metadata",
            "input",
            "rule_set",
            "cell_type",
            "software",
            "analysed_at",
            "verdict",
            "hazards",
            "reasons",
            "decision",
            "metrics",
            "cycles",
            "plateaus",
            "ica_peaks_V",
            "checks",
            "checks_not_made",
            "current_band",
            "notes",
        ],
        "properties": {
            "schema_version": {"const": SCHEMA_VERSION},
            "cell": {
                "type": "object",
                "additionalProperties": False,
                "required": list(IDENTITY_KEYS),
                "properties": {k: _STR for k in IDENTITY_KEYS},
            },
            "stages": {
                "description": "the stages of the cell's making the cycle file covers: one of "
                "them when its metadata gives a stage, both when it holds the whole program",
                "type": "array",
                "items": {"enum": list(WHOLE_PROGRAM)},
                "minItems": 1,
                "uniqueItems": True,
            },
            "record": {
                "description": "which record of its cell and stage this file is, and the one it "
                "supersedes; null when the station knew no earlier record of them",
                "type": ["object", "null"],
                "additionalProperties": False,
                "required": ["number", "of", "supersedes"],
                "properties": {
                    "number": {"type": "integer", "minimum": 2},
                    "of": {"type": "integer", "minimum": 2},
                    "supersedes": {
                        "type": "object",
                        "additionalProperties": False,
                        "required": ["name", "verdict", "analysed_at"],
                        "properties": {
                            "name": {"type": "string"},
                            "verdict": {"enum": ["pass", "fail", "hold"]},
                            "analysed_at": {"type": "string", "format": "date-time"},
                        },
                    },
                },
            },
            "other_metadata": {"type": "object", "additionalProperties": {"type": "string"}},
            "input": {
                "type": "object",
                "additionalProperties": False,
                "required": ["name", "sha256"],
                "properties": {
                    "name": {"type": "string"},
                    "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
                },
            },
            "rule_set": {
                "type": "object",
                "additionalProperties": False,
                "required": ["name", "revision", "sha256", "source"],
                "properties": {
                    "name": {"type": "string"},
                    "revision": {"type": "string"},
                    "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
                    "source": {"type": "string"},
                    "family": {"enum": [*FAMILIES, None]},
                },
            },
            "cell_type": {
                "type": "object",
                "additionalProperties": False,
                "required": ["name", "nominal_capacity_Ah"],
                "properties": {
                    "name": {"type": "string"},
                    "nominal_capacity_Ah": {"type": "number", "exclusiveMinimum": 0},
                },
            },
            "software": {
                "type": "object",
                "additionalProperties": False,
                "required": ["name", "version"],
                "properties": {"name": {"const": "formgate"}, "version": {"type": "string"}},
            },
            "analysed_at": {"type": "string", "format": "date-time"},
            "verdict": {"enum": ["pass", "fail", "hold"]},
            "hazards": {
                "type": "array",
                "items": {
                    "enum": [
                        "internal_short",
                        "over_temperature",
                        "over_voltage",
                        "lithium_plating",
                        "sodium_plating",
                        "abnormal_capacity",
                    ]
                },
            },
            "reasons": {"type": "array", "items": {"type": "string"}},
            "decision": {"type": "string"},
            "metrics": {
                "type": "object",
                "additionalProperties": False,
                "required": [m.name for m in METRICS],
                "properties": {m.name: {**_NUM, "description": m.meaning} for m in METRICS},
            },
            "cycles": {
                "type": "array",
                "items": {
                    "type": "object",
                    "additionalProperties": False,
                    "required": cycle_keys,
                    "properties": {
                        k: ({"type": "integer", "minimum": 1} if k == "cycle" else _NUM)
                        for k in cycle_keys
                    },
                },
            },
            "plateaus": {
                "type": "array",
                "items": {
                    "type": "object",
                    "additionalProperties": False,
                    "required": ["voltage_V", "start_pct", "end_pct", "length_pct", "length_Ah"],
                    "properties": {
                        "voltage_V": {"type": "number"},
                        "start_pct": {"type": "number", "minimum": 0, "maximum": 100},
                        "end_pct": {"type": "number", "minimum": 0, "maximum": 100},
                        "length_pct": {"type": "number", "minimum": 0, "maximum": 100},
                        "length_Ah": {"type": "number", "minimum": 0},
                    },
                },
            },
            "ica_peaks_V": {"type": "array", "items": {"type": "number"}},
            "checks": {
                "type": "array",
                "items": {
                    "type": "object",
                    "additionalProperties": False,
                    "required": [
                        "id",
                        "metric",
                        "value",
                        "low",
                        "high",
                        "outcome",
                        "severity",
                        "hazard",
                        "message",
                    ],
                    "properties": {
                        "id": {"type": "string"},
                        "metric": {"enum": [m.name for m in METRICS]},
                        "value": _NUM,
                        "low": _NUM,
                        "high": _NUM,
                        "outcome": {
                            "enum": ["in_window", "out_of_window", "not_judged", "skipped"]
                        },
                        "severity": {"enum": ["reject", "review"]},
                        "hazard": _STR,
                        "message": {"type": "string"},
                        # not required: absent from results written before uncertainties were recorded
                        "U": {"type": ["number", "null"], "minimum": 0},
                        "decision": {"enum": list(DECISION_RULES)},
                        "too_close": {"type": "boolean"},
                    },
                },
            },
            "checks_not_made": {"type": "array", "items": {"type": "string"}},
            # not required: absent from results written before uncertainties were recorded
            "metrics_U": {
                "type": "object",
                "additionalProperties": False,
                "properties": {
                    m.name: {"type": ["number", "null"], "minimum": 0} for m in METRICS
                },
            },
            "accuracy": {
                "oneOf": [
                    {"type": "null"},
                    {
                        "type": "object",
                        "additionalProperties": False,
                        "required": list(ACCURACY_KEYS),
                        "properties": {
                            **{k: {"type": "number", "minimum": 0} for k in ACCURACY_KEYS},
                            "current_range_A": {"type": ["number", "null"], "exclusiveMinimum": 0},
                            "source": {"type": "string"},
                        },
                    },
                ]
            },
            "current_band": {
                "oneOf": [
                    {"type": "null"},
                    {
                        "type": "object",
                        "additionalProperties": False,
                        "required": [
                            "offset_A",
                            "noise_A",
                            "threshold_A",
                            "rule_floor_A",
                            "rows_near_zero",
                            "offset_u_A",
                            "offset_corrected",
                        ],
                        "properties": {
                            "offset_A": {"type": "number"},
                            "noise_A": {"type": "number", "minimum": 0},
                            "threshold_A": {"type": "number", "exclusiveMinimum": 0},
                            "rule_floor_A": {"type": "number", "exclusiveMinimum": 0},
                            "rows_near_zero": {"type": "integer", "minimum": 0},
                            "offset_u_A": {"type": "number", "minimum": 0},
                            "offset_corrected": {"type": "boolean"},
                        },
                    },
                ]
            },
            "notes": {
                "type": "array",
                "items": {
                    "type": "object",
                    "additionalProperties": False,
                    "required": ["code", "text", "file", "line", "blocks"],
                    "properties": {
                        "code": {"type": "string"},
                        "text": {"type": "string"},
                        "file": _STR,
                        "line": {"type": ["integer", "null"]},
                        "blocks": {"type": "array", "items": {"type": "string"}},
                    },
                },
            },
        },
    }


def schema_text() -> str:
    return json.dumps(schema(), indent=2, ensure_ascii=False) + "\n"


if __name__ == "__main__":  # pragma: no cover
    print(schema_text(), end="")
