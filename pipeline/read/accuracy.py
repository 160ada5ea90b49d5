"""The keys that declare a channel's accuracy class, in an import profile's ``[accuracy]`` and
in a station's ``[accuracy.ID]`` tables: one list, so both read and document them alike.

Pure. :func:`accuracy_from` turns a table's values into an AccuracyClass, or says which key
is wrong and why; the caller locates it in its file.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace

from pipeline.model import DEFAULT_ACCURACY, AccuracyClass


@dataclass(frozen=True, slots=True)
class AccuracyKey:
    """One key: its name in a file, the AccuracyClass field it sets, its unit and meaning."""

    name: str
    field: str
    unit: str
    meaning: str


ACCURACY_KEYS: tuple[AccuracyKey, ...] = (
    AccuracyKey("voltage_pct_of_reading", "voltage_pct_of_reading", "%",
                "voltage error that scales with the reading (gain), ± % of the reading"),
    AccuracyKey("voltage_mV", "voltage_mv", "mV", "voltage error that does not (offset), ± mV"),
    AccuracyKey("current_pct_of_reading", "current_pct_of_reading", "%",
                "current error that scales with the reading (gain), ± % of the reading"),
    AccuracyKey("current_pct_of_range", "current_pct_of_range", "%",
                "current error that does not (zero offset), ± % of the channel's range"),
    AccuracyKey("current_range_A", "current_range_a", "A",
                "the channel's current range (full scale); not set: the record's largest current "
                "rounded up to the 1-2-5 series"),
    AccuracyKey("temperature_K", "temperature_k", "K", "temperature error, ± K"),
    AccuracyKey("time_ppm", "time_ppm", "ppm", "time base error, ± parts per million"),
)
ACCURACY_KEY_NAMES: tuple[str, ...] = tuple(k.name for k in ACCURACY_KEYS)


class AccuracyValueError(ValueError):
    """A key of an accuracy table with a value that cannot be used: ``key`` names it."""

    def __init__(self, key: str, problem: str) -> None:
        super().__init__(problem)
        self.key = key


def accuracy_from(values: Mapping[str, object], source: str) -> AccuracyClass:
    """The class a table declares: its keys over the defaults (common practice).

    Raises AccuracyValueError for a value that is not a number, or not one a class can be
    (negative; a range of zero). Unknown keys are the caller's to refuse (it knows the table).
    """
    changes: dict[str, float] = {}
    for key in ACCURACY_KEYS:
        if key.name not in values:
            continue
        value = values[key.name]
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
            raise AccuracyValueError(key.name, f"{key.name} must be a number ({key.unit})")
        if value < 0 or (key.name == "current_range_A" and value == 0):
            bound = "above 0" if key.name == "current_range_A" else "0 or more"
            raise AccuracyValueError(key.name, f"{key.name} = {value:g} must be {bound}")
        changes[key.field] = float(value)
    return replace(DEFAULT_ACCURACY, source=source, **changes)


def describe(key: AccuracyKey) -> str:
    """The default a key takes, as the documentation prints it."""
    default = getattr(DEFAULT_ACCURACY, key.field)
    return "from the record" if default is None else f"{default:g}"
