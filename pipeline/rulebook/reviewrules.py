"""The [review] table of a rule file: which safety hazards a concession may release, checked by line.

Its keys and value types pass the schema first (tables.py); here each name in
``release_hazards`` is checked: a safety hazard, named once. An abnormal capacity is not
a safety hazard (pipeline.acceptance.rules.SAFETY_HAZARDS): a concession releases it without being
named, so naming it is refused as a sign of a misunderstanding.
"""

from __future__ import annotations

from collections.abc import Sequence

from pipeline.acceptance.rules import SAFETY_HAZARDS, Hazard
from pipeline.rulebook.tables import Collector, Values, did_you_mean

_PATH = ("review",)
_KEY = "release_hazards"


def release_hazards(out: Collector, values: Values) -> tuple[str, ...]:
    """The checked ``[review] release_hazards``; every problem goes to ``out`` with its line."""
    listed = values.get(_KEY, ())
    names: Sequence[str] = [str(n) for n in listed] if isinstance(listed, tuple) else []
    for name in names:
        if name == Hazard.ABNORMAL_CAPACITY.value:
            out.add(
                f'[review] release_hazards holds "{name}", which is not a safety hazard',
                _PATH,
                _KEY,
                "A concession releases an abnormal capacity without it being named here: "
                f"remove it. Safety hazards: {', '.join(SAFETY_HAZARDS)}.",
            )
        elif name not in SAFETY_HAZARDS:
            out.add(
                f'[review] release_hazards holds "{name}", which is not a hazard',
                _PATH,
                _KEY,
                did_you_mean(name, SAFETY_HAZARDS) + f"Safety hazards: {', '.join(SAFETY_HAZARDS)}.",
            )
    if len(set(names)) != len(names):
        out.add("[review] release_hazards names a hazard twice", _PATH, _KEY, "Name each hazard once.")
    return tuple(dict.fromkeys(n for n in names if n in SAFETY_HAZARDS))
