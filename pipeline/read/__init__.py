"""Reading: cycle files (version 1, or any layout through an import profile) into Traces,
their validation, and the limits one input may cost. Pure: bytes in, records out.
May import: the top-level records (model, errors, names, shipped). Never the station,
mail, report or demo.
"""
