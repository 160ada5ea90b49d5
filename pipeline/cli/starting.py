"""A command's start: the modules it imports, without the garbage collector's passes over them.

A command run as the program (the formgate script, ``python -m pipeline``) runs in a fresh
process and imports what it uses first (numpy, pandas, the rules, the ledger): hundreds of
thousands of objects that live as long as the process. The collector, counting them as they
are made, would scan them over and over while they are imported: some 30 ms of a one-file
check. Inside :func:`importing` it waits; afterwards what the imports made is frozen out of
its later passes (``gc.freeze``, as a station's worker does once its modules are in), and it
runs as usual for the command's own work. Called from Python (``main(argv)``, as the tests
do), a command leaves the collector alone: freezing would keep the caller's garbage forever.
"""

from __future__ import annotations

import contextlib
import gc
from collections.abc import Iterator

_program = False  # whether this process runs one command as the program (set by main)


def as_program() -> None:
    """This process runs one command, started as the program: its imports may be frozen."""
    global _program
    _program = True


@contextlib.contextmanager
def importing() -> Iterator[None]:
    """Run the imports inside with the collector paused; then freeze what exists, and resume.

    Only in a process that runs one command as the program, and only when the collector is
    on (an outer ``importing`` has paused it, or a caller chose to): otherwise nothing changes.
    """
    if not (_program and gc.isenabled()):
        yield
        return
    gc.disable()
    try:
        yield
    finally:
        gc.freeze()
        gc.enable()
