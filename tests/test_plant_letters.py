"""The plant's own letters: a cell formed at one station and failed at grading at another is
decided in the plant, and the plant command that decided it mails it, once, over real SMTP
(a mail server on loopback), with the cautions of a failed cell; a mail server that is down
leaves the letter due, and a person's review in the plant sends its own letter.

Two real stations judge invented demo cells (pipeline.demo.lots) of the shipped NMC rule set
and forward their ledgers to a PostgreSQL server of the tests' own.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import psycopg
import pytest

from pipeline.cli.main import main
from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_aging_file, demo_stage_files
from pipeline.shipped import RULES_DIR
from pipeline.station.settings import Settings
from tests.plant_kit import caught_up, same_rows
from tests.plant_server import PlantServer
from tests.smtp_server import CERTS, free_port, smtp_server
from tests.station_kit import drop, make_station, running, settled, station_toml, wait_until

pytestmark = pytest.mark.slow

SHARED = DEMO_STAGED_CELLS[0]  # formed at hall A, graded at hall B: passes in the plant
LOW = DEMO_STAGED_CELLS[22]  # formed at hall A, failed at grading at hall B
assert LOW.defect == "low_capacity"
LOT = SHARED.lot


def _station(root: Path, station_id: str, url: str) -> Settings:
    s = make_station(root, station_toml() + f'\n[plant]\ndatabase = "{url}"\nstation_id = "{station_id}"\n')
    shutil.copy(RULES_DIR / "nmc_graphite.toml", s.rules_dir / "nmc_graphite.toml")
    return s


def _desk(root: Path, port: int) -> Path:
    """A folder whose station.toml's [smtp] and [mail] send the plant's letters."""
    smtp = (f'[smtp]\nhost = "127.0.0.1"\nport = {port}\nsecurity = "starttls"\n'
            f'sender = "plant@example.com"\ntimeout_s = 2.0\nca_file = "{CERTS / "ca.pem"}"\n')
    make_station(root, station_toml(smtp=smtp))
    return root


@pytest.fixture(scope="module")
def plant(tmp_path_factory: pytest.TempPathFactory, plant_server: PlantServer) -> str:
    url = plant_server.new_database()
    root = tmp_path_factory.mktemp("letters")
    a, b = _station(root / "a", "hall-a", url), _station(root / "b", "hall-b", url)
    with running(a):
        for cell in (SHARED, LOW):
            drop(a.inboxes[0].folder, f"{cell.cell_id}-formation.csv", demo_stage_files(cell)["formation"])
        drop(a.inboxes[0].folder, "aging.csv", demo_aging_file((SHARED, LOW)))
        wait_until(lambda: settled(a, 3), what="hall A's files judged")
        wait_until(lambda: caught_up(a.ledger) and same_rows(a.ledger, url, "hall-a"),
                   what="hall A's feed")
    with running(b):
        for cell in (SHARED, LOW):
            drop(b.inboxes[0].folder, f"{cell.cell_id}-grading.csv", demo_stage_files(cell)["grading"])
        wait_until(lambda: settled(b, 2), what="hall B's files judged")
        wait_until(lambda: caught_up(b.ledger) and same_rows(b.ledger, url, "hall-b"),
                   what="hall B's feed")
    return url


def _run(capsys: pytest.CaptureFixture[str], code: int, *argv: str) -> tuple[str, str]:
    capsys.readouterr()
    assert main(list(argv)) == code
    captured = capsys.readouterr()
    return captured.out, captured.err


def _letters(url: str) -> list[tuple[str, str, str]]:
    with psycopg.connect(url) as conn:
        return [tuple(r) for r in conn.execute(
            "SELECT d.cell_id, d.verdict, l.kind FROM formgate.plant_letters l "
            "JOIN formgate.plant_decisions d ON d.id = l.decision_id ORDER BY d.id, l.kind")]


def test_the_plant_command_that_decides_a_failed_cell_mails_it_once(
    plant: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    url, port = plant, free_port()
    desk = _desk(tmp_path / "desk", port)
    # no mail settings: the decision is recorded, its letter is due and the command says so
    out, err = _run(capsys, 0, "plant", "lot", "show", LOT, "--database", url)
    assert out.splitlines()[0].endswith(": 1 pass, 1 fail, 0 hold; yield 50.0 %")
    assert err.startswith(f"1 letter(s) due, not sent: no mail settings were given (cell "
                          f"{LOW.cell_id} of lot {LOT} (fail)). Give --letters FOLDER")
    # the mail server is down: the letter is not sent, stays due, and the command says why
    _, err = _run(capsys, 2, "plant", "lot", "show", LOT, "--database", url, "--letters", str(desk))
    assert err.startswith(f"letter NOT sent: decision letter for cell {LOW.cell_id} of lot {LOT} "
                          f"(fail): cannot connect to 127.0.0.1:{port}")
    assert "the next plant command that decides the cell tries again" in err
    assert _letters(url) == []
    with smtp_server(port=port, starttls=True) as server:
        _, err = _run(capsys, 0, "plant", "lot", "show", LOT, "--database", url, "--letters", str(desk))
        assert err == (f"letter sent: decision letter for cell {LOW.cell_id} of lot {LOT} (fail) to "
                       "quality@example.com\n")
        # run again, by another command: nothing goes out twice
        for argv in (("lot", "show", LOT), ("cell", "show", LOW.cell_id), ("yield",)):
            _, err = _run(capsys, 0, "plant", *argv, "--database", url, "--letters", str(desk))
            assert "letter" not in err
        assert len(server.received) == 1
        mail = server.received[0]
    message = mail.parsed()
    assert mail.rcpt_tos == ("quality@example.com",)
    assert message["Subject"].startswith(f"formgate: FAIL cell {LOW.cell_id}, lot {LOT} \N{EM DASH} "
                                         "grading_capacity_Ah")
    body = " ".join(message.get_body().get_content().split())  # type: ignore[union-attr]
    # the failed cell's cautions, as a station's letter carries them
    assert "FAIL. Do not release this cell; handle it with care." in body
    assert "GENERAL CAUTION" in body and "qualified personnel" in body
    assert "site's procedures" in body
    assert "plant database (stations hall-a, hall-b)" in body
    assert f"station hall-b: {LOW.cell_id}-grading.csv (SHA-256 " in body
    assert _letters(url) == [(LOW.cell_id, "fail", "decision")]


def test_a_review_in_the_plant_sends_its_letter_once_and_keeps_the_cautions(
    plant: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.judge.review import failed_checks
    from pipeline.plant.cells import cell_as_it_stands, fetch_cell, latest_rule_set, rule_book

    url, port = plant, free_port()
    desk = _desk(tmp_path / "desk", port)
    with psycopg.connect(url) as conn:
        cell = fetch_cell(conn, LOT, LOW.cell_id)
        now = cell_as_it_stands(cell, rule_book(conn, latest_rule_set(cell) or ""))
    assert now is not None
    accepts = [a for c in failed_checks(now.stages.records) for a in ("--accept", c)]
    with smtp_server(port=port, starttls=True) as server:
        out, err = _run(capsys, 0, "plant", "review", "release", LOW.cell_id, *accepts, "--by",
                        "quality engineer A", "--reason", "customer concession 14",
                        "--database", url, "--letters", str(desk))
        assert "; recorded in the plant database" in out
        assert err.startswith(f"letter sent: review letter for cell {LOW.cell_id} of lot {LOT} (pass)")
        _, err = _run(capsys, 0, "plant", "lot", "show", LOT, "--database", url, "--letters", str(desk))
        assert "letter" not in err  # the review's letter said it all: no update besides
        assert len(server.received) == 1
        message = server.received[0].parsed()
    subject = " ".join(str(message["Subject"]).split())  # a long subject is folded on the wire
    assert subject.startswith(f"formgate: RELEASED AS A CONCESSION cell {LOW.cell_id}, lot {LOT} "
                              "\N{EM DASH} by quality engineer A, accepting ")
    body = " ".join(message.get_body().get_content().split())  # type: ignore[union-attr]
    assert "The review is kept in the plant database (review " in body
    assert "GENERAL CAUTION" in body and "qualified personnel" in body
    assert (LOW.cell_id, "pass", "review") in _letters(url)
