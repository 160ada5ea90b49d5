"""Rule files: their schema declared as data, loading with located TOML errors, and the
table machinery station settings share. Pure given the text. May import: model,
acceptance, errors, judge.metricdefs. Never the station, mail, report or demo.
"""
