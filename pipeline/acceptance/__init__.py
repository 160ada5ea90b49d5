"""Acceptance: what a rule set asks of a cell (rules.py) and what judging a cell against it
found (results.py), frozen records shared by every part like the model's. May import: the
model and errors; nothing of the package above them.
"""
