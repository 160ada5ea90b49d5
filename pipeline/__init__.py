"""formgate: judges lithium-ion and sodium-ion cells after formation and grading, and certifies them."""

__version__ = "0.1.0"
