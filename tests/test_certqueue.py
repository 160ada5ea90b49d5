"""The certificate queue keeps judged results for their renders: a passed cell's as its certificate draws it.

A passed cell's record certificate is one page without plots, so the station keeps its
result without the curves and views (worker.as_drawn): the PDF must be the very same bytes
as from the whole result, and a rack's burst of passes must be kept in memory rather than
judged again from the archive. Demo cells judged for real, rendered as a station does.
"""

from __future__ import annotations

import datetime
import pickle
import threading
from pathlib import Path

import pytest

from pipeline.acceptance.results import CellResult, VerdictKind
from pipeline.demo.lots import ALL_DEMO_CELLS, demo_file_bytes
from pipeline.ledger.ledger import Ledger
from pipeline.report.result import to_json
from pipeline.rulebook.book import load_rules_dir
from pipeline.runner import judge
from pipeline.shipped import RULES_DIR
from pipeline.station import certqueue
from pipeline.station.judges import JudgePool
from pipeline.station.worker import as_drawn, render_certificate

AT = datetime.datetime(2026, 3, 2, 12, 0, tzinfo=datetime.UTC)


@pytest.fixture(scope="module")
def judged() -> dict[VerdictKind, CellResult]:
    """The first passed, failed and held demo cells, judged from their files."""
    rulebook = load_rules_dir(RULES_DIR)
    found: dict[VerdictKind, CellResult] = {}
    for cell in ALL_DEMO_CELLS:
        result = judge(demo_file_bytes(cell), f"{cell.cell_id}.csv", rulebook, analysed_at=AT)
        found.setdefault(result.verdict.kind, result)
        if len(found) == 3:
            break
    assert {VerdictKind.PASS, VerdictKind.FAIL} <= set(found)
    return found


def test_a_passed_cells_certificate_from_its_drawn_result_is_the_same_pdf(
    judged: dict[VerdictKind, CellResult],
) -> None:
    result = judged[VerdictKind.PASS]
    drawn = as_drawn(result)
    assert drawn is not result and drawn.metrics.record is None and drawn.metrics.grading_curve is None
    text = to_json(result)
    assert to_json(drawn) == text  # the published JSON does not hold the plots either
    assert render_certificate(drawn, text, "L01-001.pdf") == render_certificate(result, text, "L01-001.pdf")
    # what a station keeps and sends to a worker for the render: a small part of the whole
    assert len(pickle.dumps(drawn)) < 0.2 * len(pickle.dumps(result))


def test_failed_and_held_results_are_kept_whole(judged: dict[VerdictKind, CellResult]) -> None:
    for kind, result in judged.items():
        if kind is not VerdictKind.PASS:
            assert as_drawn(result) is result  # their certificates draw the plots


def test_a_burst_of_passes_is_kept_beside_the_failures_each_up_to_its_own_count(
    judged: dict[VerdictKind, CellResult], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(certqueue, "KEEP", 3)
    monkeypatch.setattr(certqueue, "KEEP_PASSED", 5)
    ledger = Ledger(tmp_path / "ledger.sqlite")
    try:
        queue = certqueue.RecordCertificates(
            ledger, lambda: AT, JudgePool(1, timeout_s=60.0), threading.Event(), threading.Event(),
            lambda row: None,
        )
        failed, passed = judged[VerdictKind.FAIL], judged[VerdictKind.PASS]
        for n in range(10):
            queue.keep(n, failed)
        for n in range(10, 30):
            queue.keep(n, passed)
        # the passes of a burst do not push the failures out, nor the failures the passes
        assert list(queue.kept) == [7, 8, 9]
        assert list(queue.kept_passed) == [25, 26, 27, 28, 29]
        assert queue.kept[9] is failed and queue.kept_passed[29].metrics.record is None
        queue.forget(9)
        queue.forget(29)
        assert 9 not in queue.kept and 29 not in queue.kept_passed
    finally:
        ledger.close()


def test_a_station_keeps_a_rack_of_passes_for_their_certificates() -> None:
    # a rack of 512 channels finishing together is rendered from memory, not judged again
    # (common practice: formation racks hold some hundreds of channels)
    assert certqueue.KEEP_PASSED >= 1024
