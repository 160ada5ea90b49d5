"""The caution words for failed cells cover sodium-ion cells without weakening what they say of lithium."""

from __future__ import annotations

from pipeline.acceptance.rules import Hazard
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


def test_the_general_caution_speaks_of_the_rule_sets_family_only() -> None:
    lithium = hazards.general_caution("lithium-ion")
    sodium = hazards.general_caution("sodium-ion")
    both = hazards.general_caution(None)
    assert "lithium-ion cells fall under special transport rules" in lithium
    assert "sodium" not in lithium.lower() and "UN 3551" not in lithium
    # UN 3551 and UN 3552: sodium-ion batteries in the UN Recommendations on the Transport of
    # Dangerous Goods, Model Regulations, 22nd revised edition, 2021 (from memory, medium)
    assert "UN 3551" in sodium and "UN 3552" in sodium
    assert "lithium-ion cells fall" not in sodium
    assert both == hazards.GENERAL_CAUTION
    for text in (lithium, sodium, both):  # each still defers to the site and its people
        assert text.startswith("Failed cells can be dangerous.")
        for words in ("site's procedures", "local codes", "qualified personnel"):
            assert words in text


def test_every_shipped_rule_set_declares_its_family() -> None:
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.shipped import RULES_DIR

    families = {rs.name: rs.family for rs in load_rules_dir(RULES_DIR).rule_sets}
    assert families["sodium-hard-carbon"] == "sodium-ion"
    assert {f for name, f in families.items() if name != "sodium-hard-carbon"} == {"lithium-ion"}
