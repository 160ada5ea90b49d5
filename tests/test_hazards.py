"""The caution words for failed cells cover sodium-ion cells without weakening what they say of lithium."""

from __future__ import annotations

from pipeline.model import Hazard
from pipeline.report import hazards


def test_sodium_plating_has_its_own_caution() -> None:
    caution = hazards.CAUTIONS[Hazard.SODIUM_PLATING]
    assert caution.title == "Possible sodium plating"
    assert "sodium" in caution.text and "dendrites" in caution.text
    assert "lithium" not in caution.text.lower()


def test_general_caution_keeps_the_lithium_rule_and_names_sodium_ion_numbers() -> None:
    text = hazards.GENERAL_CAUTION
    # what it said of lithium-ion cells stands, word for word
    assert "Damaged or defective lithium-ion cells fall under special transport rules." in text
    # sodium-ion batteries: UN 3551 and UN 3552 in the UN Model Regulations since the 22nd
    # revised edition, 2021 (from memory, medium); the caution sends the reader to qualified
    # personnel rather than stating those rules
    assert "UN 3551" in text and "UN 3552" in text
    sodium = text[text.index("Sodium-ion"):]
    assert "qualified personnel" in sodium


def test_overcharge_caution_names_sodium_plating_too() -> None:
    text = hazards.CAUTIONS[Hazard.OVER_VOLTAGE].text
    assert "plate lithium" in text and "sodium" in text
