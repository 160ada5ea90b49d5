"""A quiet file's record looks cut when it ends before its program does; settle hand-over waits.

The pure check (record_end.py) on demo records cut at known places, whole and through
their head and tail only; then a real station in settle hand-over with a writer that
pauses half way (never judged half) and one that never comes back (held as incomplete).
"""

from __future__ import annotations

import dataclasses
import functools
import time
from pathlib import Path

import pytest

from pipeline.demo import cycletext, synth
from pipeline.demo import lots as demo
from pipeline.judge.record_end import HEAD_BYTES, TAIL_BYTES, head_and_tail, looks_cut
from pipeline.ledger.ledger import Ledger
from pipeline.rulebook.book import load_rules_dir
from pipeline.shipped import RULES_DIR
from pipeline.station.settings import Settings
from tests.station_kit import RULES, cycle_file, make_station, running, settled, station_toml, wait_until

RULEBOOK = load_rules_dir(RULES_DIR)
CELL = demo.DEMO_CELLS[0]


@functools.cache
def _text(interval_s: float = 10.0) -> str:
    """The demo cell's file at ``interval_s``, simulated once per interval (a str: nothing can alter it)."""
    rng = demo._seed_for(CELL, 2026)
    recipe = dataclasses.replace(demo.demo_recipe(CELL, rng), sample_interval_s=interval_s)
    return cycletext.to_cycle_file(synth.simulate_formation(recipe, rng), demo.demo_metadata(CELL))


def _cut(text: str, step: int, share: float) -> bytes:
    """The file cut at a whole line ``share`` of the way into program step ``step``."""
    lines = text.splitlines(keepends=True)
    header = next(n for n, line in enumerate(lines) if not line.startswith("#")) + 1
    # columns: time_s, voltage_V, current_A, temperature_C, step, cycle
    rows = [n for n in range(header, len(lines)) if lines[n].split(",")[4] == str(step)]
    return "".join(lines[: rows[int(share * (len(rows) - 1))] + 1]).encode()


def test_a_whole_record_ends_as_its_program_does() -> None:
    assert looks_cut(_text().encode(), "c.csv", RULEBOOK, None) is None


@pytest.mark.parametrize(
    ("step", "share", "expected"),
    [
        (9, 0.5, "the record ends while current flows, not in the program's final rest"),
        (12, 0.9, "the record ends while current flows, not in the program's final rest"),
        (11, 0.5, "the record ends 0.50 h into a rest; the program's final rest lasts 3.00 h"),
        (15, 0.5, "the record ends 1.50 h into a rest; the program's final rest lasts 3.00 h"),
    ],
)
def test_a_record_cut_in_its_program_looks_cut(step: int, share: float, expected: str) -> None:
    assert looks_cut(_cut(_text(), step, share), "c.csv", RULEBOOK, None) == expected


def test_head_and_tail_tell_what_the_whole_file_tells() -> None:
    text = _text(interval_s=2.0)  # about 50,000 rows: larger than head and tail together
    assert len(text) > HEAD_BYTES + TAIL_BYTES
    whole = text.encode()
    assert looks_cut(head_and_tail(whole), "c.csv", RULEBOOK, None) is None
    cut = _cut(text, 15, 0.5)
    assert looks_cut(head_and_tail(cut), "c.csv", RULEBOOK, None) == looks_cut(cut, "c.csv", RULEBOOK, None)


def test_nothing_can_tell_without_a_final_rest_or_a_known_cell_type() -> None:
    unknown = _text().replace("DEMO-LFP-20A", "NO-SUCH-TYPE").encode()
    assert looks_cut(unknown, "c.csv", RULEBOOK, None) is None
    assert looks_cut(b"not a cycle file\n", "c.csv", RULEBOOK, None) is None


# ---- a real station in settle hand-over -------------------------------------------------------

# the test file's final rest lasts 3480 s from its first row to its last (120 s sampling)
PROGRAM = "\n[program]\nfinal_rest_s = 3400\n"


def _settle_station(tmp: Path, factor: float) -> Settings:
    inbox = f'[inbox.main]\nfolder = "inbox"\nhandover = "settle"\nsettle_s = 0.5\ncut_wait_factor = {factor:g}\n'
    s = make_station(tmp / "st", station_toml(inboxes=inbox))
    (s.rules_dir / "test_cells.toml").write_text(RULES + PROGRAM, encoding="utf-8")
    return s


@pytest.mark.slow
def test_a_paused_writers_first_half_is_never_judged(tmp_path: Path) -> None:
    s = _settle_station(tmp_path, factor=20.0)  # waits up to 10 s for a record that looks cut
    data = cycle_file("PW-2")
    cut = data.rindex(b"\n", 0, len(data) // 2) + 1
    path = s.inboxes[0].folder / "paused.csv"
    with running(s):
        with path.open("wb") as writer:
            writer.write(data[:cut])
            writer.flush()
            time.sleep(3.0)  # quiet for six times settle_s, ending on a whole line
            assert path.exists(), "the first half was taken"
            writer.write(data[cut:])
        wait_until(lambda: settled(s, 1), what="the whole file judged")
    with Ledger(s.ledger) as ledger:
        rows = ledger.inputs.in_state("archived", "quarantined")
        assert [(r.name, r.version, r.size) for r in rows] == [("paused.csv", 1, len(data))]
        result = ledger.results.of_input(rows[0].id)
        assert result is not None and result.verdict == "pass"


@pytest.mark.slow
def test_a_record_whose_writer_never_comes_back_is_held_as_incomplete(tmp_path: Path) -> None:
    s = _settle_station(tmp_path, factor=2.0)
    data = cycle_file("PW-3")
    cut = data.rindex(b"\n", 0, len(data) // 2) + 1
    (s.inboxes[0].folder / "stopped.csv").write_bytes(data[:cut])
    with running(s):
        wait_until(lambda: settled(s, 1), what="the cut file taken after 2 x settle_s")
    with Ledger(s.ledger) as ledger:
        (row,) = ledger.inputs.in_state("archived", "quarantined")
        result = ledger.results.of_input(row.id)
        assert result is not None and result.verdict == "hold"
        assert "program incomplete" in result.result_json
