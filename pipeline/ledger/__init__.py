"""The ledger: the station's SQLite record of every input, result, check, reading, decision,
lot, set-aside entry and letter, its migrations, and the read-only look a worker takes at a
cell's other records. May import: model, acceptance, errors, and read's records (readings).
Never the station, mail, report or demo: they use the ledger, not the other way round.
"""
