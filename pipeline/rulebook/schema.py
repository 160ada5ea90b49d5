"""The schema of rule files, declared as data: each table and key, its type, unit, default, meaning.

The loader (book.py) checks rule files against these tables and nothing else,
and ``render_docs`` prints docs/rules.md from the same tables, so an accepted key
cannot go undocumented. Cross-key checks (low below high, relative windows,
known cell types) live in the loader; their wording is documented here.

One piece, though longer than one job's module should be: it is one table of every key a
rule file may hold, read top to bottom in the order docs/rules.md prints it; cut in two, a
reader would look for a key in the wrong half, and the docs' order would live in two files.

Regenerate the documentation with ``python -m pipeline.rulebook.schema > docs/rules.md``.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass

from pipeline.acceptance.rules import (
    DECISION_RULES,
    FAMILIES,
    GUARDED_ACCEPTANCE,
    GUARDED_REJECTION,
    RECORD_CHOICES,
    SAFETY_HAZARDS,
    SCREEN_SIDES,
    SIMPLE,
    Hazard,
    Severity,
)
from pipeline.judge.metricdefs import AGING_METRICS, METRICS
from pipeline.model import PlateauSettings

TEXT = "text"
ZERO_OFFSET = ("corrected", "as recorded")
NUMBER = "number"
INTEGER = "integer"
TEXT_LIST = "list of text"

# Metrics that are fractions (0.95 means 95 %), guarded against values typed in percent.
FRACTION_METRICS: tuple[str, ...] = ("first_cycle_efficiency", "grading_coulombic_efficiency")
# A relative or fraction bound above this is almost surely a percentage typed as a number.
FRACTION_LIMIT = 2.0

RELATIVE_REFERENCES: tuple[str, ...] = ("nominal_capacity",)
IF_MISSING: tuple[str, ...] = ("hold", "skip")


@dataclass(frozen=True, slots=True)
class Key:
    """One key of a rule-file table. ``default is None`` with ``required`` False means "not set"."""

    name: str
    kind: str  # TEXT, NUMBER, INTEGER or TEXT_LIST
    meaning: str
    unit: str = ""
    required: bool = False
    default: object = None
    allowed: tuple[str, ...] = ()  # closed set of text values, if any
    allowed_note: str = ""  # how the docs describe the allowed values when not a short list
    minimum: float | None = None
    minimum_exclusive: bool = False
    maximum: float | None = None
    example: str = ""  # a value as written in TOML, for hints; required keys have one


@dataclass(frozen=True, slots=True)
class Table:
    """A table of a rule file; ``named`` tables are families: one ``[name.ID]`` per entry."""

    name: str
    meaning: str
    keys: tuple[Key, ...]
    named: bool = False
    required: bool = False

    def key(self, name: str) -> Key | None:
        return next((k for k in self.keys if k.name == name), None)

    @property
    def header(self) -> str:
        return f"[{self.name}.ID]" if self.named else f"[{self.name}]"


_PLATEAU = PlateauSettings()

TABLES: tuple[Table, ...] = (
    Table(
        "rule_set",
        "Who the file is: shown on every certificate with the file's SHA-256.",
        (
            Key(
                "name",
                TEXT,
                'short name of the rule set, e.g. "lfp-graphite"',
                required=True,
                example='"lfp-graphite"',
            ),
            Key(
                "revision",
                TEXT,
                "revision of the file; raise it whenever a value changes",
                required=True,
                example='"2026-12-01.1"',
            ),
            Key(
                "chemistry",
                TEXT,
                'cathode/anode chemistry in words, e.g. "LFP/graphite"',
                required=True,
                example='"LFP/graphite"',
            ),
            Key(
                "family",
                TEXT,
                "the cells' family, which chooses the transport and storage words of the "
                "general caution on failed cells; unset, the caution speaks of both families",
                allowed=FAMILIES,
                example='"lithium-ion"',
            ),
            Key("description", TEXT, "free text for people", default=""),
        ),
        required=True,
    ),
    Table(
        "plausible",
        "Bounds outside which a voltage sample means the file is wrong (units, "
        "wiring, channel), not the cell. A cell type may override them.",
        (
            Key("min_voltage_V", NUMBER, "lowest plausible terminal voltage", unit="V", default=-0.1),
            Key("max_voltage_V", NUMBER, "highest plausible terminal voltage", unit="V", default=5.0),
        ),
    ),
    Table(
        "cell_type",
        "One table per cell type the rule set covers; ID is the cell type "
        "exactly as data files name it in their `cell_type` line. At least one is required, "
        "and a cell type may be declared in one rule file only.",
        (
            Key(
                "nominal_capacity_Ah",
                NUMBER,
                'rated capacity; windows with relative_to = "nominal_capacity" are fractions of it',
                unit="Ah",
                required=True,
                minimum=0.0,
                minimum_exclusive=True,
                example="20.0",
            ),
            Key("description", TEXT, "free text for people", default=""),
            Key(
                "min_voltage_V",
                NUMBER,
                "overrides [plausible] min_voltage_V for this cell type",
                unit="V",
                allowed_note="defaults to [plausible]",
            ),
            Key(
                "max_voltage_V",
                NUMBER,
                "overrides [plausible] max_voltage_V for this cell type",
                unit="V",
                allowed_note="defaults to [plausible]",
            ),
            Key(
                "stages",
                TEXT_LIST,
                "the stages a final verdict of this cell type needs (its line may differ from "
                "the others')",
                allowed_note="formation, aging, grading; defaults to [stages] needed",
            ),
        ),
        named=True,
        required=True,
    ),
    Table(
        "plateau_detection",
        "How plateaus are found on the grading discharge: its voltage "
        "is resampled against q, the discharged capacity in % of that discharge, smoothed and "
        "differentiated; a plateau is a run of q where |dV/dq| stays at or below the flatness "
        "threshold.",
        (
            Key(
                "flatness_mV_per_pct",
                NUMBER,
                "a plateau is where |dV/dq| stays at or below this",
                unit="mV/%",
                default=_PLATEAU.flatness_mv_per_pct,
                minimum=0.0,
                minimum_exclusive=True,
            ),
            Key(
                "min_length_pct",
                NUMBER,
                "shorter flat runs are not plateaus",
                unit="%",
                default=_PLATEAU.min_length_pct,
                minimum=0.0,
                minimum_exclusive=True,
                maximum=100.0,
            ),
            Key(
                "merge_gap_pct",
                NUMBER,
                "flat runs closer than this merge into one",
                unit="%",
                default=_PLATEAU.merge_gap_pct,
                minimum=0.0,
                maximum=100.0,
            ),
            Key(
                "smoothing_pct",
                NUMBER,
                "smoothing window before differentiating",
                unit="%",
                default=_PLATEAU.smoothing_pct,
                minimum=0.0,
                maximum=50.0,
            ),
            Key(
                "grid_points",
                INTEGER,
                "points of the uniform capacity grid",
                default=_PLATEAU.grid_points,
                minimum=11,
            ),
            Key(
                "ica_bin_mV",
                NUMBER,
                "voltage bin width for dQ/dV",
                unit="mV",
                default=_PLATEAU.ica_bin_mv,
                minimum=0.0,
                minimum_exclusive=True,
            ),
            Key(
                "ica_min_prominence_Ah_per_V",
                NUMBER,
                "smallest dQ/dV peak reported",
                unit="Ah/V",
                default=_PLATEAU.ica_min_prominence_ah_per_v,
                minimum=0.0,
            ),
        ),
    ),
    Table(
        "measurement",
        "How some metrics are measured.",
        (
            Key(
                "dcir_pulse_s",
                NUMBER,
                "DCIR is read this long into the discharge pulse",
                unit="s",
                default=10.0,
                minimum=0.0,
                minimum_exclusive=True,
            ),
            Key(
                "relax_s",
                NUMBER,
                "the start of the final rest left out of the drift fit",
                unit="s",
                default=600.0,
                minimum=0.0,
            ),
            Key(
                "rest_current_C",
                NUMBER,
                "|current| below this many C (nominal capacity per hour) counts as rest",
                unit="C",
                default=0.002,
                minimum=0.0,
                minimum_exclusive=True,
                maximum=1.0,
            ),
            Key(
                "zero_offset",
                TEXT,
                "the channel's zero offset, estimated from the current at rest: taken out of "
                "every row before charge is counted when it stands out of its own scatter "
                "(corrected), or left in the current as the cycler recorded it",
                default="corrected",
                allowed=ZERO_OFFSET,
            ),
            Key(
                "decision",
                TEXT,
                "how a check decides a value near a limit, for the checks that name no "
                "decision of their own (see Decision rules below)",
                default=SIMPLE,
                allowed=DECISION_RULES,
            ),
        ),
    ),
    Table(
        "program",
        "What the rule set knows of the cycler program, so that the cycle graded is the "
        "program's grading cycle and a record cut short is held, never judged on its "
        "formation cycle. A discharge is finished when another step follows it, or when it "
        "stopped within end_tolerance_V of end_of_discharge_V. A record that ends before its "
        "grading discharge is finished is held as \"program incomplete\"; one with more "
        "cycles than the program, or whose grading step is not a discharge, is held too.",
        (
            Key(
                "cycles",
                INTEGER,
                "charge-discharge cycles the program runs, formation and grading; the last "
                "is the grading cycle",
                minimum=1,
                allowed_note="not set: the last finished cycle is graded",
                example="2",
            ),
            Key(
                "grading_step",
                INTEGER,
                "the program's step number of the grading discharge, used in files that carry "
                "a step column (it takes precedence over cycles there)",
                minimum=0,
                example="12",
            ),
            Key(
                "end_of_discharge_V",
                NUMBER,
                "the program's discharge cut-off voltage",
                unit="V",
                example="2.5",
                allowed_note="not set: a discharge that ends the record counts as cut short",
            ),
            Key(
                "end_tolerance_V",
                NUMBER,
                "how far above end_of_discharge_V a discharge that ends the record may stop "
                "and still count as finished",
                unit="V",
                default=0.1,
                minimum=0.0,
            ),
            Key(
                "final_rest_s",
                NUMBER,
                "how long the program's final rest lasts (the rest-drift screen); a record "
                "whose final rest is shorter than 99 % of it was cut during the rest",
                unit="s",
                minimum=0.0,
                minimum_exclusive=True,
                allowed_note="not set: any final rest long enough to measure the drift",
                example="10800",
            ),
        ),
    ),
    Table(
        "check",
        "One table per acceptance check; ID names the check on the certificate. "
        "At least one of low and high; low may not be above high; every cell type must have "
        "at least one check.",
        (
            Key(
                "metric",
                TEXT,
                "the metric judged",
                required=True,
                allowed_note="a metric name from the table below",
                example='"grading_capacity_Ah"',
            ),
            Key(
                "low",
                NUMBER,
                "lowest value in window (inclusive)",
                unit="metric's unit",
                allowed_note="at least one of low, high",
            ),
            Key(
                "high",
                NUMBER,
                "highest value in window (inclusive)",
                unit="metric's unit",
                allowed_note="at least one of low, high",
            ),
            Key(
                "relative_to",
                TEXT,
                "low and high are fractions of this (0.98 = 98 %); only for "
                "metrics marked relative in the table below",
                allowed=RELATIVE_REFERENCES,
            ),
            Key(
                "severity",
                TEXT,
                "reject: out of window fails the cell; review: it holds the cell for a person to decide",
                required=True,
                allowed=tuple(s.value for s in Severity),
                example='"reject"',
            ),
            Key(
                "hazard",
                TEXT,
                "caution printed when this reject check fails (reject checks only)",
                allowed=tuple(h.value for h in Hazard),
            ),
            Key("message", TEXT, "sentence shown when the value is out of window", default=""),
            Key(
                "if_missing",
                TEXT,
                "hold: a value that is missing or blocked by a data-quality "
                "note holds the cell; skip: the check is left out",
                default="hold",
                allowed=IF_MISSING,
            ),
            Key(
                "decision",
                TEXT,
                "how this check decides a value near a limit (see Decision rules below)",
                allowed=DECISION_RULES,
                allowed_note="not set: [measurement] decision",
            ),
            Key(
                "cell_types",
                TEXT_LIST,
                "restrict the check to these cell types of the file; empty: every cell type",
                allowed_note="cell types declared in this file",
                default=(),
            ),
        ),
        named=True,
        required=True,
    ),
    Table(
        "stages",
        "The stages a cell must pass before its verdict is final. A cycle file holds "
        "formation and grading; the aging stage is two or more open-circuit-voltage readings "
        "(an OCV reading file, docs/readings.md). Until every needed stage is in, a cell is "
        "held: waiting for the stage.",
        (
            Key(
                "needed",
                TEXT_LIST,
                "the stages a final verdict needs",
                default=("formation", "grading"),
                allowed_note="formation, aging, grading; a check on an aging metric needs aging",
            ),
            Key(
                "overdue_h",
                NUMBER,
                "a needed stage still missing this long after the cell's first record raises an "
                "alert",
                unit="h",
                minimum=0.0,
                minimum_exclusive=True,
            ),
        ),
    ),
    Table(
        "records",
        "Which record of a stage counts when a cell has several (a retest, a copy sent again, a "
        "record cut short and sent again). A record cut short counts only while the stage has "
        "no complete one.",
        (
            Key(
                "counts",
                TEXT,
                "latest: the stage's latest complete record by analysis time; worst: its worst "
                "complete record (fail before hold before pass)",
                default="latest",
                allowed=RECORD_CHOICES,
            ),
            Key(
                "retests",
                INTEGER,
                "records of one stage after its first that a cell may have; one more holds the "
                "cell (too many retests)",
                minimum=0,
                allowed_note="not set: no limit",
            ),
        ),
    ),
    Table(
        "aging",
        "How a cell's aging readings become its K-value (k_value_mV_per_day): the open-circuit "
        "voltage drop per day from its first to its last reading.",
        (
            Key(
                "min_days",
                NUMBER,
                "readings closer together than this give no K-value (the check is not made)",
                unit="days",
                default=3.0,
                minimum=0.0,
                minimum_exclusive=True,
            ),
            Key(
                "temperature_coefficient_mV_per_K",
                NUMBER,
                "open-circuit voltage change per kelvin; when set, each reading is corrected to "
                "reference_C before the drop is taken, and every reading needs its temperature",
                unit="mV/K",
            ),
            Key("reference_C", NUMBER, "temperature the readings are corrected to", unit="°C",
                default=25.0),
        ),
    ),
    Table(
        "screen",
        "One table per robust lot screen: limits median ± k * 1.4826 * MAD of the lot's "
        "passing cells, which only ever tighten the checks' windows. A passing cell outside "
        "them is held as an outlier in its lot. Screens are applied when the lot is closed.",
        (
            Key(
                "metric",
                TEXT,
                "the metric screened",
                required=True,
                allowed_note="a metric name from the table below",
                example='"k_value_mV_per_day"',
            ),
            Key(
                "k",
                NUMBER,
                "half-width of the limits in robust standard deviations",
                required=True,
                minimum=0.0,
                minimum_exclusive=True,
                example="5.0",
            ),
            Key(
                "min_cells",
                INTEGER,
                "passing cells with a value the lot needs before the screen applies",
                default=30,
                minimum=2,
            ),
            Key(
                "sides",
                TEXT,
                "which side the screen guards",
                default="both",
                allowed=SCREEN_SIDES,
            ),
        ),
        named=True,
    ),
    Table(
        "grade",
        "One table per grade, a named class of passing cells for matching them into packs. "
        "Each line names a metric and its range as an inline table: "
        "`grading_capacity_Ah = { low = 20.2, high = 20.6 }` (low inclusive, high exclusive, "
        "either may be left out). A passing cell gets the first grade, in file order, whose "
        "every range holds.",
        (
            Key("low", NUMBER, "lowest value of the range (inclusive)", unit="metric's unit"),
            Key("high", NUMBER, "the range ends below this value", unit="metric's unit"),
        ),
        named=True,
    ),
    Table(
        "lot",
        "When a lot is closed, so that its screens apply and its report is made.",
        (
            Key(
                "quiet_h",
                NUMBER,
                "a lot with no new cell for this long is closed by the station; not set: only "
                "`formgate lot close` closes it",
                unit="h",
                minimum=0.0,
                minimum_exclusive=True,
            ),
        ),
    ),
    Table(
        "review",
        "A person's review of a held or failed cell (`formgate review`; ISO 9001:2015 clause "
        "8.7, control of nonconforming outputs): release, reject, or retest of one stage. A "
        "failed cell is released only as a concession that names every failed check, and "
        "one whose decision carries a safety hazard only when this table names the hazard; "
        "the hazard and its cautions stay on the released cell's record.",
        (
            Key(
                "release_hazards",
                TEXT_LIST,
                "the safety hazards a concession may release a failed cell over; a cell with "
                "any other safety hazard can only be rejected or retested",
                allowed_note=", ".join(SAFETY_HAZARDS),
                default=(),
            ),
            Key(
                "wait_h",
                NUMBER,
                "a cell waiting this long for a person (a fail, or a hold for a reason other "
                "than a stage still to come, with no review since) raises one alert",
                unit="h",
                minimum=0.0,
                minimum_exclusive=True,
            ),
        ),
    ),
)

BY_TABLE: dict[str, Table] = {t.name: t for t in TABLES}

# Keys renamed since earlier revisions of this format: (table, old key) -> new key.
RENAMED: dict[tuple[str, str], str] = {
    ("check", "min"): "low",
    ("check", "max"): "high",
}

EXAMPLE = """\
[rule_set]
name = "demo"
revision = "2026-01-01.1"
chemistry = "LFP/graphite"

[cell_type.DEMO-CELL-1]
nominal_capacity_Ah = 10.0

[check.grading_capacity]
metric = "grading_capacity_Ah"
low = 1.00
relative_to = "nominal_capacity"
severity = "reject"
hazard = "abnormal_capacity"
message = "Grading capacity below rated capacity."
"""


def _cell(text: str) -> str:
    return text.replace("|", "\\|")


def _default_text(key: Key) -> str:
    if key.required:
        return "required"
    if key.default == ():
        return "`[]`"
    if key.default is None:
        return key.allowed_note if key.allowed_note.startswith("defaults") else "not set"
    if isinstance(key.default, str):
        return f'`"{key.default}"`' if key.default else '`""`'
    return f"`{key.default}`"


def allowed_text(key: Key) -> str:
    parts = []
    if key.allowed:
        parts.append(", ".join(f"`{a}`" for a in key.allowed))
    elif key.allowed_note and not key.allowed_note.startswith("defaults"):
        parts.append(key.allowed_note)
    if key.minimum is not None:
        parts.append(f"{'>' if key.minimum_exclusive else '>='} {key.minimum:g}")
    if key.maximum is not None:
        parts.append(f"<= {key.maximum:g}")
    return "; ".join(parts)


def key_table(table: Table) -> list[str]:
    """The Markdown table of ``table``'s keys (rule files and station settings alike)."""
    rows = [
        "| key | type | unit | allowed values | default | meaning |",
        "|---|---|---|---|---|---|",
    ]
    for key in table.keys:
        rows.append(
            f"| `{key.name}` | {key.kind} | {_cell(key.unit)} | {_cell(allowed_text(key))} "
            f"| {_cell(_default_text(key))} | {_cell(key.meaning)} |"
        )
    return rows


def normal_cdf(x: float) -> float:
    """The standard normal distribution function, Phi(x)."""
    return 0.5 * (1.0 + math.erf(x / math.sqrt(2.0)))


# The worst-case probability of false acceptance each decision rule gives: the chance that
# a value accepted at the edge of the acceptance zone lies truly outside the window, for a
# normal distribution of standard deviation U / 2 (JCGM 106:2012 9.3, "specific risk").
def worst_false_acceptance(rule: str) -> float:
    guard = {SIMPLE: 0.0, GUARDED_ACCEPTANCE: 2.0, GUARDED_REJECTION: -2.0}[rule]  # in units of u
    return 1.0 - normal_cdf(guard)


def decision_docs() -> list[str]:
    """The "Decision rules" section of docs/rules.md."""
    pfa = {rule: f"{100 * worst_false_acceptance(rule):.1f} %" for rule in DECISION_RULES}
    return [
        "## Decision rules",
        "",
        "Every metric is measured with an expanded uncertainty U (k = 2, about 95 % for a "
        "normal distribution), from the channel's accuracy class and the data's own scatter "
        "(docs/metrics.md, Uncertainty). How a check decides a value within U of one of its "
        "limits is its decision rule (`decision` of the check, or of `[measurement]`), as "
        "ILAC-G8:09/2019 (Guidelines on decision rules and statements of conformity), "
        "ISO 14253-1:2017 (decision rules for verifying conformity or nonconformity with "
        "specifications) and JCGM 106:2012 (the role of measurement uncertainty in "
        "conformity assessment) describe them:",
        "",
        "| decision | in window | within U inside a limit | within U outside a limit | "
        "out by more than U | worst-case false acceptance |",
        "|---|---|---|---|---|---|",
        f"| `{SIMPLE}` | accepted | accepted | out of window | out of window | {pfa[SIMPLE]} |",
        f"| `{GUARDED_ACCEPTANCE}` | accepted | held: too close to the limit to decide "
        f"| out of window | out of window | {pfa[GUARDED_ACCEPTANCE]} |",
        f"| `{GUARDED_REJECTION}` | accepted | accepted | accepted | out of window "
        f"| {pfa[GUARDED_REJECTION]} |",
        "",
        "The worst-case false acceptance is the probability that a value accepted at the edge "
        "of what the rule accepts lies truly outside the window, for a normal distribution of "
        "standard deviation U / 2 (JCGM 106:2012, 9.3). Guarded acceptance suits a reject "
        "check that protects the customer or a hazard (a held cell goes to a person, who may "
        "retest it); guarded rejection suits a check whose fail costs a good cell and whose "
        "acceptance carries no hazard. A metric without an uncertainty (a count) is always "
        "judged as measured. A held \"too close\" cell's certificate says "
        "\"too close to the limit to decide: 18.98 ± 0.03 Ah against ≥ 19.00 Ah\".",
    ]


def render_docs() -> str:
    """Return the whole of docs/rules.md, generated from TABLES, RENAMED and the metrics table."""
    out = [
        "_Generated by `python -m pipeline.rulebook.schema > docs/rules.md` from "
        "pipeline/rulebook/schema.py and pipeline/judge/metricdefs.py; do not edit by hand._",
        "",
        "# Rule files",
        "",
        "A rule file is a TOML file in `rules/` for one chemistry family. It names the cell "
        "types it covers, how plateaus are found, and the acceptance checks. Acceptance values "
        "come only from rule files, never from data files. The file's SHA-256 and its revision "
        "go on every certificate. Check a folder of rule files with `formgate rules check`.",
        "",
        "Verdict: **fail** if a `reject` check is out of window; otherwise **hold** if a "
        "`review` check is out of window or a check could not be judged (value missing, or "
        'blocked by a data-quality note, with `if_missing = "hold"`); otherwise **pass**. '
        "The hazards of failed `reject` checks add their cautions to the certificate.",
        "",
        "Unknown tables and keys are errors (a misspelt key must never skip a check).",
        "",
    ]
    for table in TABLES:
        title = table.header + (" (required)" if table.required else "")
        out += [f"## {title}", "", table.meaning, ""]
        out += [*key_table(table), ""]
    out += [
        "## Metrics",
        "",
        "The names a check's `metric` may take (the JSON keys of the result file). "
        "Fractions are written as fractions: 0.95, not 95.",
        "",
        "| metric | unit | relative to nominal capacity | meaning |",
        "|---|---|---|---|",
    ]
    for m in METRICS:
        out.append(
            f"| `{m.name}` | {_cell(m.unit)} | {'yes' if m.relative_ok else ''} "
            f"| {_cell(m.meaning)} |"
        )
    out += [
        "",
        "Measured on a cell's open-circuit-voltage readings during aging (an OCV reading file), "
        "not in a cycle file; a check on one of these needs `aging` under `[stages] needed`:",
        "",
        "| metric | unit | relative to nominal capacity | meaning |",
        "|---|---|---|---|",
    ]
    for m in AGING_METRICS:
        out.append(f"| `{m.name}` | {_cell(m.unit)} | | {_cell(m.meaning)} |")
    out += ["", *decision_docs()]
    out += ["", "## Renamed keys", "", "| table | old key | new key |", "|---|---|---|"]
    for (table_name, old), new in sorted(RENAMED.items()):
        out.append(f"| `{BY_TABLE[table_name].header}` | `{old}` | `{new}` |")
    out += ["", "## Smallest valid file", "", "```toml", EXAMPLE.rstrip("\n"), "```", ""]
    return "\n".join(out)


if __name__ == "__main__":
    sys.stdout.write(render_docs())
