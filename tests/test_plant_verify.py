"""`formgate plant verify`: a station's ledger beside what the plant holds for it, on a real
server: the same after the feed caught up; a row removed from the plant, one changed in it, and
one the plant holds that the ledger does not are each named, with the input SHA-256s."""

from __future__ import annotations

import datetime
import threading
from pathlib import Path

import psycopg
import pytest

from pipeline.cli.main import main
from pipeline.plant.connect import PlantTarget
from pipeline.plant.feed import PlantFeed
from tests.plant_kit import caught_up, copy_ledger
from tests.plant_kit import judged_ledger as judged_ledger  # a fixture
from tests.plant_server import PlantServer
from tests.station_kit import make_station, station_toml, wait_until

pytestmark = pytest.mark.slow


def test_verify_finds_the_ledger_and_the_plant_the_same_then_names_each_difference(
    plant_server: PlantServer, judged_ledger: Path, tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    url = plant_server.new_database()
    root = tmp_path / "station"
    make_station(root, station_toml() + f'\n[plant]\ndatabase = "{url}"\nstation_id = "line-1"\n')
    ledger = copy_ledger(judged_ledger, root)
    stop = threading.Event()
    feed = PlantFeed(ledger, PlantTarget(url, "line-1", connect_timeout_s=2), stop=stop,
                     clock=lambda: datetime.datetime.now(datetime.UTC), poll_s=0.05)
    feed.start()
    try:
        wait_until(lambda: caught_up(ledger), what="the feed to catch up")
    finally:
        stop.set()
        feed.join(60)
    capsys.readouterr()
    assert main(["plant", "verify", str(root)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0] == "station line-1: ledger against the plant database"
    assert out[-2:] == ["  input SHA-256s: same", "the plant holds exactly the ledger's rows for this station"]
    inputs = next(line for line in out if line.startswith("  inputs "))
    assert inputs.split() == ["inputs", "ledger", "6", "plant", "6", "same"]
    with psycopg.connect(url, autocommit=True) as conn:
        conn.execute("DELETE FROM formgate.checks WHERE station_id = 'line-1' AND id = 1")
        conn.execute("UPDATE formgate.decisions SET row_sha256 = repeat('0', 64) "
                     "WHERE station_id = 'line-1' AND id = 2")
        conn.execute("INSERT INTO formgate.inputs (station_id, id, sha256, name, size, arrived_at, "
                     "work_path, state, version, row_sha256) VALUES ('line-1', 99, repeat('a', 64), "
                     "'x.csv', 1, now(), 'w/x.csv', 'claimed', 1, repeat('f', 64))")
    assert main(["plant", "verify", str(root), "--database", url]) == 1
    out = capsys.readouterr().out.splitlines()
    lines = {line.split()[0]: line for line in out[1:-2]}
    assert lines["checks"].endswith("DIFFERS: 1 not in the plant (1)")
    assert lines["decisions"].endswith("DIFFERS: 1 changed since forwarded (2)")
    assert lines["inputs"].endswith("DIFFERS: 1 only in the plant (99)")
    assert lines["results"].split()[-1] == "same"
    assert out[-2] == "  input SHA-256s: 0 not in the plant, 1 only in the plant"
    assert out[-1] == ("the plant and the ledger differ; a row changed since it was forwarded "
                       "stops the feed (docs/plant.md)")
