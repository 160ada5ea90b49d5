"""The command line: argument parsing and exit codes only, one module per command family
(check, station, lots, demo) and the entry point (main). The top of the package: may
import every other part, the demo included; nothing imports it.
"""
