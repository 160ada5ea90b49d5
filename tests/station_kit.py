"""Helpers for station tests: a station folder with its own small rule set, cycle files, invariants.

Stations run for real: real folders, real watchdog, real SQLite, real worker processes,
either in a thread of the test (``running``) or as a `formgate watch` child process
(``start_watch``) when the test must kill it.
"""

from __future__ import annotations

import contextlib
import ctypes
import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

from pypdf import PdfReader

from pipeline.ledger.ledger import Ledger
from pipeline.station.handoff import is_temporary
from pipeline.station.settings import Settings, read_settings, smtp_settings
from pipeline.station.station import Station
from tests.factories import build_trace, simple_formation

REPO = Path(__file__).resolve().parent.parent

RULES = """\
# Test rules: one invented cell type, capacity and efficiency checks only.
[rule_set]
name = "test-cells"
revision = "1"
chemistry = "invented test chemistry"

[cell_type.TEST-CELL]
nominal_capacity_Ah = 2.0

[plausible]
min_voltage_V = 0.0
max_voltage_V = 5.0

[check.capacity]
metric = "grading_capacity_Ah"
low = 0.9              # test window
high = 1.1             # test window
relative_to = "nominal_capacity"
severity = "reject"
hazard = "abnormal_capacity"
message = "Capacity outside the test window."

[check.efficiency]
metric = "first_cycle_efficiency"
low = 0.8              # test window
severity = "reject"
message = "First-cycle efficiency too low."
"""


def station_toml(
    *, inboxes: str = "", extra: str = "", smtp: str = "", certificates: str = ""
) -> str:
    inboxes = inboxes or '[inbox.main]\nfolder = "inbox"\nhandover = "rename"\n'
    return (
        '[station]\nname = "test-station"\nworkers = 2\nreconcile_s = 0.5\nheartbeat_s = 0.5\n'
        f"{certificates}{extra}\n{inboxes}\n{smtp}\n"
        '[mail]\nfailures_to = ["quality@example.com"]\nholds_to = ["quality@example.com"]\n'
        'digests_to = ["production@example.com"]\nalerts_to = ["maintenance@example.com"]\n'
        "digest_quiet_s = 1.0\n"
    )


def make_station(root: Path, toml: str | None = None) -> Settings:
    """A station folder with station.toml, the test rules and every folder."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "station.toml").write_text(toml or station_toml(), encoding="utf-8")
    (root / "rules").mkdir(exist_ok=True)
    (root / "rules" / "test_cells.toml").write_text(RULES, encoding="utf-8")
    settings = read_settings(root)
    for folder in settings.all_folders():
        folder.mkdir(parents=True, exist_ok=True)
    return settings


def cycle_file(
    cell_id: str,
    *,
    lot: str = "LOT-A",
    capacity_ah: float = 2.0,
    seed: int = 0,
    dt_s: float = 120.0,
) -> bytes:
    """A small cycle file (a few hundred rows) of an invented TEST-CELL cell.

    ``capacity_ah`` below 1.8 makes it fail its capacity check.
    """
    phases = simple_formation(capacity_ah=capacity_ah, final_rest_s=3600.0)
    trace = build_trace(phases, dt_s=dt_s, noise_v=5e-4, seed=seed)
    meta = {"cell_id": cell_id, "lot": lot, "cell_type": "TEST-CELL"}
    lines = [f"# {k}: {v}" for k, v in meta.items()]
    lines.append("time_s,voltage_V,current_A,temperature_C")
    for t, v, i, c in zip(
        trace.time_s, trace.voltage_v, trace.current_a, trace.temperature_c, strict=True
    ):
        lines.append(f"{t:.1f},{v:.5f},{i:.5f},{c:.2f}")
    return ("\n".join(lines) + "\n").encode()


def drop(folder: Path, name: str, data: bytes) -> Path:
    """Hand a file over by write-then-rename."""
    part = folder / f".{name}.part"
    part.write_bytes(data)
    target = folder / name
    os.rename(part, target)
    return target


def wait_until(
    predicate: Callable[[], bool], timeout_s: float = 60.0, what: str = "condition"
) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(0.1)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


@contextlib.contextmanager
def running(settings: Settings, environ: dict[str, str] | None = None) -> Iterator[Station]:
    """Run a station in a thread of this process; stop it (gracefully) on exit."""
    smtp = smtp_settings(settings, environ or {})
    station = Station(settings, smtp)
    stop = threading.Event()
    errors: list[BaseException] = []

    def target() -> None:
        try:
            station.run(stop)
        except BaseException as exc:  # reported to the test
            errors.append(exc)

    thread = threading.Thread(target=target, name="test-station")
    thread.start()
    try:
        yield station
    finally:
        stop.set()
        thread.join(120)
        assert not thread.is_alive(), "station did not stop"
    if errors:
        raise errors[0]


# Linux capabilities that let root ignore file permissions (capability.h); PR_CAPBSET_DROP
# is the prctl option that removes one from the bounding set (prctl.h).
CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH, PR_CAPBSET_DROP = 1, 2, 24


def _obey_permissions() -> None:
    """In the child before exec: a root process gives up ignoring file permissions.

    Tests run as root, and root reads a file of mode 000 and writes into a read-only
    folder. Without these two capabilities it meets permissions as any user does, so a
    test can show a station the real errors.
    """
    libc = ctypes.CDLL(None, use_errno=True)
    for cap in (CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH):
        if libc.prctl(PR_CAPBSET_DROP, cap, 0, 0, 0) != 0:
            raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP) refused")


def start_watch(
    root: Path, env: dict[str, str] | None = None, *, obey_permissions: bool = False
) -> subprocess.Popen[bytes]:
    """`formgate watch root` as a child process (so a test can kill it).

    ``obey_permissions``: run as root, the station still meets file permissions.
    """
    full = {**os.environ, **(env or {})}
    as_root = obey_permissions and os.geteuid() == 0
    return subprocess.Popen(
        [sys.executable, "-m", "pipeline", "watch", str(root), "--quiet"],
        cwd=REPO,
        env=full,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        preexec_fn=_obey_permissions if as_root else None,
    )


def permissions_are_obeyed(folder: Path) -> bool:
    """True if a station started with ``obey_permissions`` cannot read a file of mode 000."""
    probe = folder / "mode-000-probe"
    probe.write_bytes(b"x")
    probe.chmod(0)
    try:
        code = subprocess.run(
            [sys.executable, "-c", f"open({str(probe)!r}).read()"],
            stderr=subprocess.DEVNULL,
            preexec_fn=_obey_permissions if os.geteuid() == 0 else None,
            check=False,
        ).returncode
    except (OSError, subprocess.SubprocessError):
        code = 0
    probe.chmod(0o644)
    probe.unlink()
    return code != 0


def stop_watch(proc: subprocess.Popen[bytes], timeout_s: float = 120.0) -> int:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    try:
        proc.wait(timeout_s)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        for stream in (proc.stdout, proc.stderr):
            if stream is not None:
                stream.close()
    return proc.returncode


def heartbeat_troubles(settings: Settings) -> list[str]:
    """The troubles the station's heartbeat shows now (none while it cannot be read)."""
    try:
        beat = json.loads(settings.heartbeat.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    return [str(t) for t in beat.get("troubles", [])]


def settled(settings: Settings, expected: int) -> bool:
    """Every one of ``expected`` inputs is final and nothing is waiting anywhere."""
    if any(p for i in settings.inboxes for p in i.folder.iterdir() if not is_temporary(p.name)):
        return False
    if any(not p.name.startswith(".") for p in settings.work.iterdir()):
        return False  # (work/.taken holds settle-mode originals being watched)
    if not settings.ledger.exists():
        return False
    with Ledger(settings.ledger) as ledger:
        if ledger.inputs.in_state("claimed", "judged", "published"):
            return False
        if ledger.certificates.backlog().waiting:
            return False  # a verdict is out, its certificate still to render
        finals = ledger.inputs.in_state("archived", "quarantined", "duplicate")
        return len([r for r in finals if r.final_path]) >= expected


def check_invariants(settings: Settings, dropped: set[str]) -> None:
    """Each input in exactly one final folder, the ledger agrees, no temp files, mailed PDFs parse."""
    archived = [
        p for p in settings.archive.rglob("*") if p.is_file() and not p.name.endswith(".done")
    ]
    quarantined = [
        p
        for p in settings.quarantine.iterdir()
        if p.is_file() and not p.name.endswith((".reason.txt", ".done"))
    ]
    finals = archived + quarantined
    names = sorted(p.name.split("_", 1)[1] for p in finals)
    assert sorted(set(names)) == sorted(dropped), "every dropped file ends in archive or quarantine"
    assert len(names) == len(dropped), f"an input is in two places: {sorted(names)}"
    for p in quarantined:
        assert p.with_name(p.name + ".reason.txt").exists()
    with Ledger(settings.ledger) as ledger:
        assert ledger.integrity_ok()
        rows = ledger.inputs.in_state("archived", "quarantined", "duplicate")
        assert sorted(Path(r.final_path).name for r in rows if r.final_path) == sorted(
            p.name for p in finals
        )
        assert not ledger.inputs.in_state("claimed", "judged", "published")
        for mail in ledger.outbox.in_state("sent"):
            if mail.attachment_path:
                PdfReader(mail.attachment_path)  # every PDF ever mailed parses
        for r in ledger.results.recent(10_000):
            assert Path(r.json_path).exists()
            json.loads(Path(r.json_path).read_text(encoding="utf-8"))
    for folder in (settings.results, settings.certificates, settings.archive, settings.quarantine):
        assert not [p for p in folder.rglob(".*.tmp")], "no temporary files left"
    for pdf in settings.certificates.rglob("*.pdf"):
        PdfReader(pdf)
