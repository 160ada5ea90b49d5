"""The command line: argument parsing and exit codes only, one module per command family
(check, profile, station, lots, review, channels, verify, regrade, plant, demo), the entry
point with its parser (main), the exit codes (exits) and a command's start (starting). The
top of the package: may import every other part, the demo included; nothing imports it.
"""
