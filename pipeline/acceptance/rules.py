"""The records of a rule set: the acceptance checks a cell must meet, and what the set knows
of the cells it covers.

Data only, frozen, like the model's records: the decision rules a check may be made by,
severities and hazards, cell types, windows and rules, the cycler program, the stages of a
cell's making and the families of cells, aging, the lot's screens and grades, and the
RuleSet that holds them. The rule book loads them from rule files (pipeline.rulebook); the
judge applies them (pipeline.judge).
"""

from __future__ import annotations

import enum
from collections.abc import Mapping
from dataclasses import dataclass, field

from pipeline.model import PlateauSettings, SourceRef, frozen_mapping

# How a check decides a value near a limit (ILAC-G8:09/2019 "Guidelines on decision rules
# and statements of conformity"; ISO 14253-1:2017; JCGM 106:2012): simple acceptance
# judges the value as measured; guarded acceptance accepts only values inside the window
# by more than their expanded uncertainty U, and holds those within U of a limit; guarded
# rejection rejects only values outside by more than U.
SIMPLE, GUARDED_ACCEPTANCE, GUARDED_REJECTION = (
    "simple acceptance", "guarded acceptance", "guarded rejection",
)
DECISION_RULES: tuple[str, ...] = (SIMPLE, GUARDED_ACCEPTANCE, GUARDED_REJECTION)


class Severity(enum.Enum):
    REJECT = "reject"
    REVIEW = "review"


class Hazard(enum.Enum):
    INTERNAL_SHORT = "internal_short"
    OVER_TEMPERATURE = "over_temperature"
    OVER_VOLTAGE = "over_voltage"
    LITHIUM_PLATING = "lithium_plating"
    SODIUM_PLATING = "sodium_plating"
    ABNORMAL_CAPACITY = "abnormal_capacity"


# The hazards that can make a cell dangerous to handle (an abnormal capacity by itself is
# not one): a person's release of a failed cell carrying one of them is refused unless its
# rule set's [review] release_hazards names it (pipeline/judge/review.py).
SAFETY_HAZARDS: tuple[str, ...] = tuple(
    h.value for h in Hazard if h is not Hazard.ABNORMAL_CAPACITY
)


@dataclass(frozen=True, slots=True)
class CellType:
    """A cell type a rule set covers. Voltages bound what is physically plausible for it."""

    name: str
    nominal_capacity_ah: float
    min_voltage_v: float
    max_voltage_v: float
    description: str = ""
    where: SourceRef | None = None
    stages: tuple[str, ...] | None = None  # None: the rule set's [stages] needed


@dataclass(frozen=True, slots=True)
class Window:
    """Acceptance window [low, high]; either bound may be open (None).

    When ``relative_to`` is ``"nominal_capacity"`` the bounds are fractions of the
    cell type's nominal capacity and :meth:`resolve` turns them into absolute values.
    """

    low: float | None
    high: float | None
    relative_to: str | None = None

    def resolve(self, cell_type: CellType) -> Window:
        if self.relative_to is None:
            return self
        if self.relative_to == "nominal_capacity":
            scale = cell_type.nominal_capacity_ah
        else:  # pragma: no cover - the rulebook refuses anything else
            raise ValueError(f"unknown reference {self.relative_to!r}")
        return Window(
            None if self.low is None else self.low * scale,
            None if self.high is None else self.high * scale,
        )

    def contains(self, value: float) -> bool:
        if self.low is not None and value < self.low:
            return False
        if self.high is not None and value > self.high:
            return False
        return True


@dataclass(frozen=True, slots=True)
class Rule:
    """One acceptance check: a metric, its window, what failing it means."""

    id: str
    metric: str
    window: Window
    severity: Severity
    hazard: Hazard | None = None
    message: str = ""
    if_missing: str = "hold"  # "hold" (not judged) or "skip"
    decision: str | None = None  # one of DECISION_RULES; None: the rule set's
    cell_types: tuple[str, ...] = ()  # empty = applies to every cell type of the set
    where: SourceRef | None = None


@dataclass(frozen=True, slots=True)
class Program:
    """What the rule set knows of the cycler program, to find the grading cycle and a cut record.

    ``cycles``: charge-discharge cycles the program runs, the last being the grading
    cycle (None: not stated, the last complete cycle is graded). ``grading_step``: the
    program step number of the grading discharge in files with a step column.
    ``end_of_discharge_v``: the discharge cut-off; a discharge that is the last step of
    a record and stopped more than ``end_tolerance_v`` above it was cut short.
    ``final_rest_s``: how long the program's final rest lasts; a record whose final
    rest is shorter was cut during it (None: any final rest long enough to measure).
    """

    cycles: int | None = None
    grading_step: int | None = None
    end_of_discharge_v: float | None = None
    end_tolerance_v: float = 0.1
    final_rest_s: float | None = None


# Families of cells a rule set may declare: their transport and storage rules differ.
FAMILIES: tuple[str, ...] = ("lithium-ion", "sodium-ion")
# The stages of a cell's making that formgate judges: a cycle file holds formation and
# grading; the aging stage is the open-circuit-voltage readings between them.
STAGES: tuple[str, ...] = ("formation", "aging", "grading")
# What a cycle file's ``stage`` metadata may say, and the stages each value covers. A file
# without it holds the whole program, formation and grading.
WHOLE_PROGRAM: tuple[str, ...] = ("formation", "grading")
# A cell held only while a stage it needs is still to come says so in each part of its
# reason ("waiting for stage aging; waiting for stage grading"): no person is needed then,
# its record decides it. The deciding, the ledger's list of cells waiting for a person,
# the letters and the cell certificate all read a reason by these two names.
WAITING_FOR_STAGE = "waiting for stage"


def only_waiting(reason: str) -> bool:
    """True when a hold's every reason is a stage still to come.

    >>> only_waiting("waiting for stage aging; waiting for stage grading (retest asked by A)")
    True
    >>> only_waiting("waiting for stage aging; outlier in lot: dcir_mOhm 31 > lot limit 25")
    False
    """
    return all(part.startswith(WAITING_FOR_STAGE) for part in reason.split("; ") if part)


CYCLE_FILE_STAGES: Mapping[str, tuple[str, ...]] = frozen_mapping(
    {
        "formation": ("formation",),
        "grading": ("grading",),
        "formation+grading": WHOLE_PROGRAM,
    }
)
SCREEN_SIDES: tuple[str, ...] = ("both", "low", "high")
RECORD_CHOICES: tuple[str, ...] = ("latest", "worst")


@dataclass(frozen=True, slots=True)
class AgingSettings:
    """How a cell's aging readings become its K-value (the [aging] table of a rule file)."""

    min_days: float = 3.0  # readings closer together than this give no K-value
    temperature_coefficient_mv_per_k: float | None = None  # None: no temperature correction
    reference_c: float = 25.0


@dataclass(frozen=True, slots=True)
class Screen:
    """A robust lot screen: median ± k·1.4826·MAD of the lot's passing cells ([screen.ID])."""

    id: str
    metric: str
    k: float
    min_cells: int
    sides: str = "both"  # one of SCREEN_SIDES
    where: SourceRef | None = field(default=None, compare=False)


@dataclass(frozen=True, slots=True)
class Grade:
    """A named class of passing cells by metric ranges ([grade.NAME]): low inclusive, high not."""

    name: str
    bounds: tuple[tuple[str, float | None, float | None], ...]  # (metric, low, high)
    where: SourceRef | None = field(default=None, compare=False)


@dataclass(frozen=True, slots=True)
class RuleSet:
    """One chemistry family's rules, as loaded from one TOML file."""

    name: str
    revision: str
    chemistry: str
    sha256: str
    source: str
    cell_types: tuple[CellType, ...]
    plateau: PlateauSettings
    rules: tuple[Rule, ...]
    dcir_pulse_s: float = 10.0
    relax_s: float = 600.0
    rest_current_fraction: float = 0.002  # |I| below this x nominal capacity (A/Ah) is rest
    zero_offset: str = "corrected"  # or "as recorded": the channel's zero offset left in
    decision: str = SIMPLE  # the decision rule of checks that name none ([measurement])
    description: str = ""
    program: Program = field(default_factory=Program)
    family: str | None = None  # one of FAMILIES; None: not declared
    stages: tuple[str, ...] = ("formation", "grading")  # what a final verdict needs
    stage_overdue_h: float | None = None  # a needed stage later than this is alerted
    aging: AgingSettings = field(default_factory=AgingSettings)
    screens: tuple[Screen, ...] = ()
    grades: tuple[Grade, ...] = ()
    lot_quiet_h: float | None = None  # a lot closes by itself after this long without a cell
    record_counts: str = "latest"  # which record of a stage counts: "latest" or "worst"
    retests: int | None = None  # most records of one stage after its first; None: no limit
    release_hazards: tuple[str, ...] = ()  # safety hazards a concession may release ([review])
    review_wait_h: float | None = None  # a cell waiting for a person longer than this is alerted

    def cell_type(self, name: str) -> CellType | None:
        for ct in self.cell_types:
            if ct.name == name:
                return ct
        return None
