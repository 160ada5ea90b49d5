"""The command line's exit codes, one name each, shared by every command family.

0 every cell passed, 1 a cell failed or was held, 2 a problem the user can fix (bad
rules, unreadable or unjudgeable file, bad settings), 3 a bug in formgate, 130 Ctrl-C.
"""

EXIT_OK, EXIT_REJECTED, EXIT_USER, EXIT_BUG, EXIT_INTERRUPTED = 0, 1, 2, 3, 130
