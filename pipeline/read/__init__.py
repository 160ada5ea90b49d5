"""Reading: cycle files (version 1, or any layout through an import profile) into Traces,
their validation, and the limits one input may cost. Pure: bytes in, records out.
May import: the shared records (model, acceptance, errors, names, shipped). Never the
station, mail, report or demo.
"""
