"""The station demo stops once every file is dealt with, while settle-mode originals are still kept.

A settle inbox's originals wait in work/.taken for a day (keep_originals_h) after their
copy was judged and archived: that is the station keeping them, not a file in hand, so the
demo must not wait for them (it would wait out its ten-minute deadline).
"""

from __future__ import annotations

from pathlib import Path

from pipeline.demo.station_demo import _drained
from pipeline.ledger.ledger import Ledger


def test_originals_kept_in_work_taken_do_not_keep_the_demo_waiting(tmp_path: Path) -> None:
    for folder in ("inbox", "inbox-rename", "inbox-marker", "work/.taken/slow-writers"):
        (tmp_path / folder).mkdir(parents=True)
    (tmp_path / "work" / ".taken" / "slow-writers" / "0123_L01-001.csv").write_bytes(b"kept\n")
    with Ledger(tmp_path / "ledger.sqlite"):
        pass
    assert _drained(tmp_path, tmp_path / "ledger.sqlite", 0)
    # a file in work/ itself is one the station still has in hand
    (tmp_path / "work" / "L01-002.csv").write_bytes(b"in hand\n")
    assert not _drained(tmp_path, tmp_path / "ledger.sqlite", 0)
