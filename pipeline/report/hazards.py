"""Caution texts for failed cells: one per hazard, the handling of a hazardous cell, a general
caution, and the data-check notice.

Certificates and mails print these words; this module only holds them. The
wording follows the trade's usual handling of failed formation cells
(common practice); every instruction defers to the site's own procedures,
local codes, the authority having jurisdiction and qualified personnel.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

from pipeline.acceptance.rules import Hazard


@dataclass(frozen=True, slots=True)
class Caution:
    """A caution as printed: a short title and one paragraph."""

    title: str
    text: str


# Handling words shared by every hazard, printed once after the hazards' own cautions: treat as
# possibly unstable, do not reuse, quarantine, label, monitor -- common practice.
HANDLING = (
    "Treat the cell as possibly unstable: do not recharge, reuse, regrade or ship it as good "
    "product. Move it to the site's designated quarantine area, in a non-combustible container "
    "and apart from other cells and combustible material, label it with its cell ID, this "
    "reason and the date, and watch its temperature during the hold period the site procedure "
    "sets."
)

CAUTIONS: Mapping[Hazard, Caution] = MappingProxyType(
    {
        # Micro-shorts show as falling voltage at rest (high K-value), low or falling OCV, heat
        # during rest or low coulombic efficiency; causes include metal particles, burrs and
        # separator defects -- from memory, high certainty. Deep over-discharge
        # of a graphite cell can dissolve copper that later shorts the cell -- from memory, medium.
        Hazard.INTERNAL_SHORT: Caution(
            "Possible internal short circuit",
            "The data show signs of an internal short circuit, such as a voltage that falls during "
            "rest or a deep over-discharge. A cell with an internal short can heat up by itself, "
            "hours or days later, without any charger connected.",
        ),
        # Over-temperature in formation points to an internal short, a high-resistance weld or
        # tab, or a channel fault -- from memory, low certainty for the usual alarm levels.
        Hazard.OVER_TEMPERATURE: Caution(
            "Over-temperature during formation",
            "The cell became hotter during formation than its rule set allows. Heat can come from "
            "an internal short, a poor weld or tab, or a fault of the channel or fixture. "
            "Have the channel and its contacts checked before they are used again.",
        ),
        # Overcharge destabilises the cathode, oxidises the electrolyte, plates lithium and makes
        # gas, with a risk of thermal runaway -- from memory, high certainty; in a sodium-ion
        # cell it plates sodium on the hard carbon -- from memory, medium.
        Hazard.OVER_VOLTAGE: Caution(
            "Charged above its voltage limit",
            "The cell was charged above the voltage its rule set allows. Overcharge can make the "
            "cathode unstable, break down the electrolyte, plate lithium (sodium, in a sodium-ion "
            "cell) and produce gas, and it raises the risk of thermal runaway. Have the channel's "
            "voltage limit and calibration checked.",
        ),
        # Plating comes from charging too fast or too cold, low N/P ratio or misaligned
        # electrodes; plated lithium can grow into dendrites and shorts -- O'Kane et al.,
        # J. Electrochem. Soc. 167 (2020) 090540, and from memory, medium.
        Hazard.LITHIUM_PLATING: Caution(
            "Possible lithium plating",
            "The data suggest that metallic lithium may have plated on the anode, for example "
            "through a low coulombic efficiency. Plated lithium is reactive and can grow into "
            "dendrites that short the cell later.",
        ),
        # The sodium counterpart of lithium plating: hard carbon's low plateau lies within
        # 0.1 V of sodium metal (Stevens & Dahn, J. Electrochem. Soc. 147 (2000) 1271), so
        # charging too fast, too cold or too far can plate sodium on it, which lowers the
        # coulombic efficiency and can grow into dendrites -- from memory, medium. Sodium metal
        # reacts with water and moist air, giving off hydrogen -- from memory, high.
        Hazard.SODIUM_PLATING: Caution(
            "Possible sodium plating",
            "The data suggest that metallic sodium may have plated on the hard-carbon anode, for "
            "example through a low coulombic efficiency. Plated sodium is highly reactive, also "
            "with water and moist air, and can grow into dendrites that short the cell later.",
        ),
        # A capacity far from nominal has no single cause (wrong cell type, assembly defect,
        # lithium loss, short, measurement fault) -- common practice.
        Hazard.ABNORMAL_CAPACITY: Caution(
            "Capacity far from its nominal value",
            "The cell's capacity is far outside what its cell type should deliver. The cause is "
            "unknown: a wrong cell type, an assembly defect, an internal short or a measurement "
            "fault are all possible.",
        ),
    }
)

# Defers to the site (general information only; do not
# puncture, crush or open; eye protection and gloves if leaking; fire response per the site
# plan; special transport rules for damaged or defective cells) -- common practice, and
# from memory, medium, for the transport rules. Sodium-ion batteries have UN numbers of their
# own, UN 3551 and UN 3552, in the UN Recommendations on the Transport of Dangerous Goods,
# Model Regulations, since the 22nd revised edition (2021) -- from memory, medium. The text
# claims no more about them than that, and sends the reader to qualified personnel. The
# transport words follow the rule set's declared family; a rule set that declares none gets
# both, so a sodium-ion cell is never told only the lithium rules.
_CAUTION_HEAD = (
    "Failed cells can be dangerous. This caution is general information only. Handle, store, "
    "transport and dispose of this cell as your site's procedures, local codes and regulations "
    "and the authority having jurisdiction require, and let qualified personnel decide what "
    "happens to it. Do not puncture, crush or open the cell. If it is hot, swelling, leaking, "
    "smoking or smells of solvent, keep clear and follow the site's emergency plan; wear eye "
    "protection and chemical-resistant gloves near a leaking cell and keep the area "
    "ventilated."
)
_TRANSPORT = {
    "lithium-ion": " Damaged or defective lithium-ion cells fall under special transport rules: "
    "ask qualified personnel which transport and storage rules apply.",
    "sodium-ion": " Sodium-ion cells are classed under UN numbers of their own (UN 3551 and "
    "UN 3552), and damaged or defective ones fall under special transport rules: the rules for "
    "lithium cells do not simply carry over, so ask qualified personnel which transport and "
    "storage rules apply.",
    None: " Damaged or defective lithium-ion cells fall under special transport rules. "
    "Sodium-ion cells are classed under UN numbers of their own (UN 3551 and UN 3552), so the "
    "rules for lithium cells do not simply carry over: ask qualified personnel which transport "
    "and storage rules apply to a damaged or defective sodium-ion cell.",
}


def general_caution(family: str | None) -> str:
    """The general caution for a failed (or hazardous held) cell of ``family``.

    ``family`` is the rule set's declared family (``lithium-ion``, ``sodium-ion``) or
    None when it declares none: then the caution speaks of both.
    """
    return _CAUTION_HEAD + _TRANSPORT.get(family, _TRANSPORT[None])


# Both families' words: for a text that is not about one cell (docs, tests of the wording).
GENERAL_CAUTION = general_caution(None)

# The tool reads recorded data; it does not inspect the cell (common practice).
DATA_CHECK_NOTICE = (
    "This certificate records a check of the cycler data against the acceptance windows of "
    "the named rule set. It is a data check, not a safety assessment of the cell, and it does "
    "not replace inspection or testing by qualified personnel."
)
