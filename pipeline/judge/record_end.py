"""Does a settled file's record end where its program ends? Read from its head and its tail only.

Pure: bytes, a rule book and an import profile in; None (it ends as its program does, or
nothing can tell) or the reason it looks cut short out. A writer that pauses leaves a
file that is quiet and ends on a whole line, yet holds only part of a record: size,
time and a final newline cannot tell. The rule set's program can: a record whose program
ends with a final rest of ``final_rest_s`` is finished only when it ends in a rest that
long; a formation file (``# stage: formation``) has no such rest, so nothing here can
tell it is cut (the judge holds one that ends before its formation cycles are done).
The station asks this before it takes a file in settle hand-over, and waits a while
longer for one that looks cut (docs/station.md); the judge still holds a record that is
cut short, whatever the station did.
"""

from __future__ import annotations

from pipeline.errors import FormgateError
from pipeline.judge.program import FINAL_REST_SHARE, stage_program
from pipeline.judge.rest_band import estimate_band
from pipeline.read.cyclefile import file_stages, read_cycle_file
from pipeline.read.profile import Profile
from pipeline.rulebook.book import RuleBook

# How much of a file's start and end is read: the metadata and header, and enough rows to
# see a final rest of a few hours at 1 s sampling (common practice for the sizes; a longer
# rest that fills the whole tail counts as long enough only if the tail spans it).
HEAD_BYTES = 64 * 1024
TAIL_BYTES = 1024 * 1024


def join_head_and_tail(head: bytes, tail: bytes) -> bytes:
    """A file's head to its last whole line and its tail from its first whole line, joined.

    The rows in between are left out: the reader then sees a record with a gap, which is
    all this check needs.
    """
    return head[: head.rfind(b"\n") + 1] + tail[tail.find(b"\n") + 1 :]


def head_and_tail(data: bytes) -> bytes:
    """:func:`join_head_and_tail` of a whole file's bytes; short files come back whole."""
    if len(data) <= HEAD_BYTES + TAIL_BYTES:
        return data
    return join_head_and_tail(data[:HEAD_BYTES], data[-TAIL_BYTES:])


def looks_cut(data: bytes, name: str, rulebook: RuleBook, profile: Profile | None) -> str | None:
    """Why the record in ``data`` looks cut short of its program's end, or None.

    ``data`` may be the whole file or :func:`head_and_tail` of it. None also when nothing
    can tell: a file the reader refuses, a cell type no rule set knows, a program with no
    final rest given. The judge says what is wrong with those.
    """
    try:
        trace = read_cycle_file(data, name, profile)
        rule_set, cell_type = rulebook.for_cell_type(trace.cell_type, source=name)
    except FormgateError:
        return None
    # a formation file's program ends with its last formation cycle, perhaps a charge to a
    # storage level and a rest of no set length: only the judge can tell it was cut short
    final_rest_s = stage_program(rule_set.program, file_stages(trace.metadata)).final_rest_s
    if final_rest_s is None or len(trace) < 2:
        return None
    one_c_a = cell_type.nominal_capacity_ah
    band = estimate_band(trace.current_a, rule_set.rest_current_fraction * one_c_a, one_c_a)
    flowing = abs(trace.current_a - band.offset_a) > band.threshold_a
    if flowing[-1]:
        return "the record ends while current flows, not in the program's final rest"
    moving = flowing.nonzero()[0]
    # the rest starts at its first row, as the judge measures a step's duration
    rest_from = float(trace.time_s[moving[-1] + 1]) if len(moving) else float(trace.time_s[0])
    rest_s = float(trace.time_s[-1]) - rest_from
    if rest_s >= FINAL_REST_SHARE * final_rest_s:  # as the judge tests a final rest
        return None
    return (
        f"the record ends {rest_s / 3600.0:.2f} h into a rest; the program's final rest "
        f"lasts {final_rest_s / 3600.0:.2f} h"
    )
