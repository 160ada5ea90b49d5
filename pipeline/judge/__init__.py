"""Judging: rest told from current, steps and cycles, the program's grading cycle,
plateaus and dQ/dV, every metric, and the verdict against a rule set. Pure: records
and rules in, records out. May import: model, acceptance, errors, read, rulebook. Never
the station, mail, report or demo.
"""
