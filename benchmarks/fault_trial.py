"""Fault trial: a real station fed bad inputs while it is killed at random, its mail server is down
and its disk fills up; then every input is reconciled.

Run by hand (a few minutes):

    .venv/bin/python benchmarks/fault_trial.py                  # 200 files, 20 random SIGKILLs
    .venv/bin/python benchmarks/fault_trial.py --files 400 --kills 60 --seed 3 --keep /tmp/trial

A short run is part of `make test` (tests/test_station_trial.py). The station runs as
`formgate watch` (meeting file permissions even when run as root), with a rename-mode
and a settle-mode inbox. Into them go good and failing cells, duplicates, names that
are not UTF-8 or hold a line break or 250 characters, bad content, a line past
max_line_kB, rows past max_rows, folders, dangling links, links to folders, named
pipes, unreadable files, dot-names, folders no one may move (immutable, where the
filesystem has the flag) and a writer that pauses half way. Meanwhile the station is
killed with SIGKILL at random moments (some while it recovers) and started again at
once, as a service manager would; its worker launcher (Python's forkserver) and its
workers are killed at other moments; its settle-mode inbox goes away for a few seconds
(an unmounted share) and comes back; its mail server first refuses connections, then
takes them and never answers, then works slowly while `formgate mail retry` loops run
beside the station; and, where this machine lets the trial mount a small file system,
the station's disk is filled for a while.

At the end the station is stopped, the outbox is sent with `formgate mail retry`, and a
table shows for each kind of input what became of it, and one for the mail: the letters
in the ledger and the Message-IDs the server received. The trial passes (exit 0) when
every input was decided exactly once (archived, quarantined, set aside, a duplicate, or,
for a dot-name or a folder no one may move, left in the inbox and shown), none is lost,
none was judged twice, every archived file matches the ledger's hash, every queued mail
was delivered, no Message-ID arrived twice but for one interrupted by a SIGKILL of its
sender, and the station never ended by itself (no crash loop); else it exits 1.
"""

from __future__ import annotations

import argparse
import collections
import contextlib
import glob
import hashlib
import os
import random
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from pipeline.names import to_text  # noqa: E402
from tests.smtp_server import HOST, free_port, smtp_server  # noqa: E402
from tests.station_kit import (  # noqa: E402
    cycle_file,
    make_station,
    permissions_are_obeyed,
    start_watch,
    stop_watch,
)

SETTLE_S = 0.5


@dataclass(frozen=True)
class Entry:
    """One thing dropped into an inbox, and what must become of it."""

    case: str
    inbox: Path
    name: str  # as the operating system has it
    expect: str  # archived, quarantined, set aside, duplicate, waiting, versions
    same_as: str = ""  # files of equal bytes: one is judged (whichever came first), the rest duplicates


class Dropper:
    """Writes the trial's inputs; every name is new (a running number in front)."""

    def __init__(
        self, quick: Path, slow: Path, rng: random.Random, can_lock: bool, can_freeze: bool
    ) -> None:
        self.quick, self.slow, self.rng, self.can_lock = quick, slow, rng, can_lock
        self.can_freeze = can_freeze
        self.slow_gone = False  # the settle inbox is away (a share unmounted): nobody writes there
        self.entries: list[Entry] = []
        self.good: list[bytes] = []
        self.n = 0
        self.writers: list[threading.Thread] = []
        self.frozen: list[Path] = []

    def _name(self, tail: str) -> str:
        self.n += 1
        return f"{self.n:04d}{tail}"

    def _hand_over(self, folder: Path, name: str, data: bytes) -> None:
        if folder == self.quick:  # write, then rename into place
            part = folder / f".{self.n:04d}.part"
            part.write_bytes(data)
            os.rename(part, folder / name)
        else:
            (folder / name).write_bytes(data)

    def file(
        self,
        case: str,
        expect: str,
        tail: str,
        data: bytes,
        *,
        settle: bool = False,
        same: bool = False,
    ) -> None:
        folder = self.slow if settle and not self.slow_gone else self.quick
        name = self._name(tail)
        self._hand_over(folder, name, data)
        group = hashlib.sha256(data).hexdigest() if same else ""
        self.entries.append(Entry(case, folder, name, expect, group))

    def one(self) -> None:
        """Drop one input of a kind drawn at random (mostly good cells)."""
        r, k = self.rng.random(), self.n
        if r < 0.45:
            data = cycle_file(f"T-{k}", seed=k)
            self.good.append(data)
            settle = self.rng.random() < 0.3
            self.file("good cell", "archived", "_good.csv", data, settle=settle, same=True)
        elif r < 0.55:
            low = cycle_file(f"T-{k}", capacity_ah=1.5, seed=k)
            self.file("failed cell", "archived", "_low.csv", low)
        elif r < 0.60 and self.good:
            again = self.rng.choice(self.good)
            self.file("duplicate bytes", "duplicate", "_copy.csv", again, same=True)
        elif r < 0.64:
            odd = os.fsdecode(b"_cell_\xe9.csv")
            self.file("name not UTF-8", "archived", odd, cycle_file(f"T-{k}", seed=k))
        elif r < 0.67:
            data = cycle_file(f"T-{k}", seed=k)
            self.file("name with a line break", "archived", "_two\nlines.csv", data)
        elif r < 0.70:
            data = cycle_file(f"T-{k}", seed=k)
            self.file("250-character name", "archived", "_" + "L" * 241 + ".csv", data)
        elif r < 0.73:
            bad = f"# cell_id: B-{k}\ntime_s,voltage_V\n0,x\n".encode()  # each its own bytes
            self.file("bad content", "quarantined", "_bad.csv", bad)
        elif r < 0.76:
            note = b"# note: " + b"x" * 70_000 + b"\n# lot:"
            data = cycle_file(f"T-{k}", seed=k).replace(b"# lot:", note)
            self.file("line past max_line_kB", "quarantined", "_long.csv", data)
        elif r < 0.79:
            data = cycle_file(f"T-{k}", dt_s=5.0, seed=k)
            self.file("rows past max_rows", "quarantined", "_rows.csv", data)
        elif r < 0.82:
            self._other("folder", _folder)
        elif r < 0.85:
            self._other("dangling link", lambda p: p.symlink_to(p.parent / "nowhere.csv"))
        elif r < 0.87:
            self._other("link to a folder", lambda p: p.symlink_to(p.parent.parent))
        elif r < 0.90:
            self._other("named pipe", os.mkfifo)
        elif r < 0.93 and self.can_lock:
            self._other("unreadable file", _unreadable)
        elif r < 0.945 and self.can_freeze:
            path = self.quick / self._name("_frozen")
            _folder(path)
            _immutable(path, True)
            self.frozen.append(path)
            self.entries.append(Entry("folder no one may move", self.quick, path.name, "left in place"))
        elif r < 0.96:
            name = "." + self._name("_dot.csv")
            (self.quick / name).write_bytes(b"a temporary name nobody renames\n")
            self.entries.append(Entry("dot-name", self.quick, name, "waiting"))
        elif not self.slow_gone:
            self._paused_writer(cycle_file(f"T-{k}", seed=k))
        else:
            self.file("good cell", "archived", "_good.csv", cycle_file(f"T-{k}", seed=k), same=True)

    def _other(self, case: str, make: Callable[[Path], object]) -> None:
        slow = self.rng.random() < 0.3 and not self.slow_gone
        path = (self.slow if slow else self.quick) / self._name("_odd.csv")
        make(path)
        self.entries.append(Entry(case, path.parent, path.name, "set aside"))

    def _paused_writer(self, data: bytes) -> None:
        """Half a file, a pause longer than settle_s, then the rest (settle inbox)."""
        name = self._name("_paused.csv")
        cut = data.rindex(b"\n", 0, len(data) // 2) + 1

        def write() -> None:
            with (self.slow / name).open("wb") as fh:
                fh.write(data[:cut])
                fh.flush()
                time.sleep(8 * SETTLE_S)
                fh.write(data[cut:])

        thread = threading.Thread(target=write, daemon=True)
        thread.start()
        self.writers.append(thread)
        self.entries.append(Entry("paused writer", self.slow, name, "versions"))


def _folder(path: Path) -> None:
    path.mkdir()
    (path / "inside.csv").write_bytes(b"x\n")


def _unreadable(path: Path) -> None:
    path.write_bytes(b"x\n")
    path.chmod(0)


def _immutable(path: Path, on: bool) -> bool:
    """Set or clear the immutable flag (not even root may rename it); False if unsupported."""
    try:
        done = subprocess.run(["chattr", "+i" if on else "-i", str(path)], capture_output=True,
                              check=False)
    except FileNotFoundError:
        return False
    return done.returncode == 0


def _can_freeze(folder: Path) -> bool:
    probe = folder / "immutable-probe"
    probe.mkdir()
    frozen = _immutable(probe, True)
    _immutable(probe, False)
    probe.rmdir()
    return frozen


def _children(pid: int) -> list[tuple[int, bytes]]:
    """(pid, command line) of the processes whose parent is ``pid`` (Linux /proc)."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            stat = Path(f"/proc/{entry}/stat").read_text()
            cmdline = Path(f"/proc/{entry}/cmdline").read_bytes()
        except OSError:
            continue
        if int(stat.rsplit(")", 1)[1].split()[1]) == pid:
            found.append((int(entry), cmdline))
    return found


class Supervisor:
    """Runs `formgate watch`, restarting it at once after each end, as a service manager would."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.proc = start_watch(root, obey_permissions=True)
        self.started = time.monotonic()
        self.starts, self.kills, self.kills_in_recovery = 1, 0, 0
        self.launcher_kills = self.worker_kills = 0
        self.own_exits: list[int] = []
        self.stopped = False

    def poll(self) -> None:
        code = self.proc.poll()
        if code is not None and not self.stopped:  # it ended by itself: a crash (or a loop)
            self.own_exits.append(code)
            stop_watch(self.proc)
            self._start()

    def kill(self) -> None:
        self.poll()
        self.kills += 1
        if time.monotonic() - self.started < 2.0:
            self.kills_in_recovery += 1
        self.proc.kill()
        stop_watch(self.proc)
        self._start()

    def launcher(self) -> int | None:
        """The pid of the station's worker launcher (the forkserver), if it runs now."""
        return next((p for p, cmd in _children(self.proc.pid) if b"forkserver" in cmd), None)

    def kill_launcher(self) -> None:
        """Kill the launcher, waiting up to 2 s for one to run (it starts with the first worker)."""
        deadline = time.monotonic() + 2.0
        pid = self.launcher()
        while pid is None and time.monotonic() < deadline:
            time.sleep(0.05)
            pid = self.launcher()
        if pid is not None:
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)
                self.launcher_kills += 1

    def kill_worker(self, rng: random.Random) -> None:
        launcher = self.launcher()
        workers = [p for p, _ in _children(launcher)] if launcher is not None else []
        if workers:
            with contextlib.suppress(ProcessLookupError):
                os.kill(rng.choice(workers), signal.SIGKILL)
                self.worker_kills += 1

    def _start(self) -> None:
        self.proc = start_watch(self.root, obey_permissions=True)
        self.started = time.monotonic()
        self.starts += 1

    def stop(self) -> int:
        self.poll()
        self.stopped = True
        return stop_watch(self.proc)


@contextlib.contextmanager
def small_filesystem(path: Path, size: str) -> Iterator[bool]:
    """Mount a tmpfs at ``path`` if this machine allows it; yields whether it did."""
    path.mkdir(parents=True)
    try:
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                              capture_output=True, check=False)
        mounted = done.returncode == 0
    except FileNotFoundError:
        mounted = False
    try:
        yield mounted
    finally:
        if mounted:
            subprocess.run(["umount", "-l", str(path)], check=False)


def fill(folder: Path) -> Path:
    filler = folder / "filler"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT, 0o644)
    try:
        for size in (2**20, 2**16, 2**12, 1):
            with contextlib.suppress(OSError):
                while True:
                    os.write(fd, b"\0" * size)
    finally:
        os.close(fd)
    return filler


@contextlib.contextmanager
def silent(port: int) -> Iterator[None]:
    """The mail server's port takes connections and never answers."""
    listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        listener.bind((HOST, port))
        listener.listen(16)
        yield
    finally:
        listener.close()


def station_toml(port: int) -> str:
    return (
        '[station]\nname = "trial-station"\nworkers = 2\nreconcile_s = 0.5\nheartbeat_s = 0.5\n'
        "retry_max_s = 1\nwaiting_alert_s = 5\nmax_rows = 5000\ntask_timeout_s = 60\n\n"
        '[inbox.quick]\nfolder = "inbox"\nhandover = "rename"\n\n'
        f'[inbox.slow]\nfolder = "settle-inbox"\nhandover = "settle"\nsettle_s = {SETTLE_S}\n\n'
        f'[smtp]\nhost = "{HOST}"\nport = {port}\nsecurity = "none"\nsender = "formgate@example.com"\n'
        "timeout_s = 1\n\n"
        '[mail]\nfailures_to = ["quality@example.com"]\nholds_to = ["quality@example.com"]\n'
        'digests_to = ["production@example.com"]\nalerts_to = ["maintenance@example.com"]\n'
        "digest_quiet_s = 1\n"
    )


def quiet(root: Path, entries: list[Entry]) -> bool:
    """Nothing left to decide: inboxes hold only what must wait, work holds no input."""
    waiting = {(e.inbox, e.name) for e in entries if e.expect in ("waiting", "left in place")}
    for inbox in {e.inbox for e in entries}:
        if any((inbox, n) not in waiting for n in os.listdir(inbox) if not n.endswith(".part")):
            return False
    if any(not n.startswith(".") for n in os.listdir(root / "work")):
        return False
    if [p for p in (root / "work" / ".taken").rglob("*") if p.is_file() and p.name.startswith("_")]:
        return False
    with contextlib.closing(sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True)) as db:
        if db.execute("SELECT count(*) FROM certificate_queue WHERE done_at IS NULL").fetchone()[0]:
            return False  # a verdict is out, its certificate still to render
        return not db.execute("SELECT count(*) FROM inputs WHERE final_path IS NULL").fetchone()[0]


def certificates(root: Path) -> dict[str, int]:
    """Every judged file's certificate: rendered and on disk with the bytes the ledger recorded
    as published, or still waiting, or given up, or missing (promised and not there)."""
    db = sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True)
    counts: collections.Counter[str] = collections.Counter()
    rows = db.execute(
        "SELECT r.pdf_path, q.result_id IS NOT NULL, q.outcome FROM results r "
        "LEFT JOIN certificate_queue q ON q.result_id = r.id "
        "JOIN inputs i ON i.id = r.input_id "
        "WHERE r.regrade_id IS NULL AND r.pdf_path IS NOT NULL AND i.state <> 'quarantined'"
    ).fetchall()
    for pdf_path, queued, outcome in rows:
        if queued and outcome is None:
            counts["waiting"] += 1
            continue
        if outcome == "failed":
            counts["given up"] += 1
            continue
        path = Path(pdf_path)
        published = db.execute(
            "SELECT sha256 FROM published WHERE path = ? ORDER BY id DESC LIMIT 1",
            (os.path.abspath(path),),
        ).fetchone()
        if not path.exists() or published is None:
            counts["missing"] += 1
        elif hashlib.sha256(path.read_bytes()).hexdigest() != published[0]:
            counts["differing"] += 1
        else:
            counts["rendered"] += 1
    db.close()
    return dict(counts)


def reconcile(root: Path, entries: list[Entry]) -> tuple[list[list[str]], dict[str, int]]:
    """Per case: dropped, and what became of each (from the ledger, checked against the folders)."""
    db = sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True)
    inputs = collections.defaultdict(list)
    for name, state, path, sha in db.execute("SELECT name, state, final_path, sha256 FROM inputs"):
        inputs[name].append((state, path, sha))
    aside = collections.defaultdict(list)
    for name, state in db.execute("SELECT name, state FROM set_aside"):
        aside[name].append(state)
    judged = db.execute(
        "SELECT count(*) FROM (SELECT i.sha256 FROM results r JOIN inputs i ON i.id = r.input_id "
        "GROUP BY i.sha256 HAVING count(*) > 1)"
    ).fetchone()[0]
    mails = dict(db.execute("SELECT state, count(*) FROM outbox GROUP BY state").fetchall())
    db.close()
    rows: dict[str, collections.Counter[str]] = collections.defaultdict(collections.Counter)
    totals: collections.Counter[str] = collections.Counter(judged_twice=judged)
    groups = collections.Counter(e.same_as for e in entries if e.same_as)
    judged_in_group: collections.Counter[str] = collections.Counter()
    for e in entries:
        text = to_text(e.name)
        got = inputs.get(text, [])
        states = collections.Counter(s for s, _, _ in got)
        states.update("set aside" for s in aside.get(text, []) if s == "quarantined")
        states.update("left in place" for s in aside.get(text, []) if s == "left_in_place")
        quarantined = any((root / "quarantine").glob(f"aside-*_{glob.escape(text)}"))
        if not got and not aside.get(text) and quarantined:
            states["set aside"] += 1  # killed between the move and its ledger row
            totals["set aside without a ledger row"] += 1
        for state, path, sha in got:
            if state in ("archived", "quarantined", "duplicate"):
                data = Path(path).read_bytes()
                totals["archive differs from ledger"] += hashlib.sha256(data).hexdigest() != sha
        present = os.path.lexists(e.inbox / e.name)
        decided = sum(states[s] for s in ("archived", "quarantined", "duplicate", "set aside"))
        row = rows[e.case]
        row["dropped"] += 1
        for state, n in states.items():
            row[state] += n
        if e.expect == "waiting":
            ok = present and not decided
            row["waiting"] += present
        elif e.expect == "left in place":  # shown in status, tried again only once it changes
            ok = present and not decided and states["left in place"] == 1
        elif e.expect == "versions":  # one version, or two when the writer came back in time
            ok = 1 <= states["archived"] <= 2 and decided == states["archived"]
        elif groups[e.same_as] > 1:  # equal bytes: which one is judged depends on who came first
            ok = decided == 1 and states["archived"] + states["duplicate"] == 1
            judged_in_group[e.same_as] += states["archived"]
        else:
            want = {"archived": "archived", "quarantined": "quarantined", "duplicate": "duplicate",
                    "set aside": "set aside"}[e.expect]
            ok = decided == 1 and states[want] == 1
        if not ok:
            kind = "lost" if not decided and not present else "not decided once"
            row[kind] += 1
            totals[kind] += 1
            print(f"  {kind}: {e.case} {text!r} -> {dict(states)}", file=sys.stderr)
    for group, n in judged_in_group.items():
        if n != 1:
            totals["not decided once"] += 1
            print(f"  equal files judged {n} times: sha256 {group[:12]}", file=sys.stderr)
    columns = ["dropped", "archived", "quarantined", "set aside", "duplicate", "waiting",
               "left in place", "lost", "not decided once"]
    table = [["input", *columns]]
    for case in sorted(rows):
        table.append([case, *(str(rows[case][c]) for c in columns)])
    table.append(["total", *(str(sum(rows[c][k] for c in rows)) for k in columns)])
    totals["mail pending"] = mails.get("pending", 0)
    totals["mail parked"] = mails.get("parked", 0)
    totals["mail sent"] = mails.get("sent", 0)
    return table, dict(totals)


def show(table: list[list[str]]) -> str:
    widths = [max(len(r[i]) for r in table) for i in range(len(table[0]))]

    def cells(row: list[str]) -> str:
        pairs = enumerate(zip(row, widths, strict=True))
        return "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in pairs)

    lines = [cells(r) for r in table]
    lines.insert(1, "-" * len(lines[0]))
    lines.insert(len(lines) - 1, "-" * len(lines[0]))
    return "\n".join(lines)


class RetryLoops:
    """`formgate mail retry` run again and again beside the station, as impatient staff might."""

    def __init__(self, root: Path, loops: int) -> None:
        self.root, self.stop = root, threading.Event()
        self.runs = 0
        self.threads = [threading.Thread(target=self._loop, daemon=True) for _ in range(loops)]

    def _loop(self) -> None:
        while not self.stop.is_set():
            subprocess.run([sys.executable, "-m", "pipeline", "mail", "retry", str(self.root)],
                           cwd=REPO, capture_output=True, check=False)
            self.runs += 1
            self.stop.wait(0.2)

    def start(self) -> None:
        for thread in self.threads:
            thread.start()

    def join(self) -> None:
        self.stop.set()
        for thread in self.threads:
            thread.join()


def mail_table(root: Path, received: list[str]) -> tuple[list[list[str]], int, int]:
    """Letters in the ledger against Message-IDs at the sink: (table, received twice, never)."""
    db = sqlite3.connect(f"file:{root / 'ledger.sqlite'}?mode=ro", uri=True)
    queued = dict(db.execute("SELECT kind, count(*) FROM outbox GROUP BY kind").fetchall())
    ids = {m: k for m, k in db.execute("SELECT message_id, kind FROM outbox")}
    db.close()
    got = collections.Counter(received)
    table = [["letter", "queued", "received", "received twice", "never received"]]
    for kind in sorted(queued):
        mine = [m for m, k in ids.items() if k == kind]
        table.append([kind, str(queued[kind]), str(sum(1 for m in mine if got[m])),
                      str(sum(1 for m in mine if got[m] > 1)), str(sum(1 for m in mine if not got[m]))])
    strangers = sum(1 for m in got if m not in ids)
    twice = sum(1 for m in got.values() if m > 1)
    never = sum(1 for m in ids if not got[m])
    table.append(["total", str(len(ids)), str(len(got) - strangers), str(twice), str(never)])
    return table, twice, never


def run(args: argparse.Namespace, folder: Path) -> int:
    rng = random.Random(args.seed)
    port = free_port()
    with small_filesystem(folder / "disk", "96m") as mounted:
        s = make_station(folder / "disk" / "st", station_toml(port))
        quick, slow = (i.folder for i in s.inboxes)
        slow.mkdir(exist_ok=True)
        # the immutable flag is the inbox's file system's to give (tmpfs has none)
        dropper = Dropper(quick, slow, rng, permissions_are_obeyed(folder), _can_freeze(quick))
        supervisor = Supervisor(s.root)
        received: list[str] = []
        span_s = args.files * args.gap_s
        kill_at = sorted(rng.uniform(0.5, span_s) for _ in range(args.kills))
        # the launcher is killed in a row of quick kills, workers now and then between
        launcher_at = [span_s * 0.2 + k * 0.4 for k in range(args.launcher_kills)]
        worker_at = sorted(rng.uniform(0.5, span_s) for _ in range(args.worker_kills))
        fill_planned = mounted and not args.no_disk_full
        fill_at = span_s * 0.6 if fill_planned else None
        away_at = None if args.no_inbox_removal else span_s * 0.4
        away = slow.with_name(slow.name + "-unmounted")
        t0 = time.monotonic()
        mail = contextlib.ExitStack()
        loops = RetryLoops(s.root, args.retry_loops)
        server = None
        filled: Path | None = None
        try:
            for k in range(args.files):  # mail server: refusing, silent, then slow with retry loops
                if k == args.files // 3:
                    mail.enter_context(silent(port))
                if k == 2 * args.files // 3:
                    mail.close()
                    server = mail.enter_context(smtp_server(port=port, data_delay_s=0.2))
                    loops.start()
                if filled is None:  # a cycler cannot write to a full disk either
                    dropper.one()
                time.sleep(args.gap_s)
                now = time.monotonic() - t0
                while kill_at and kill_at[0] <= now:
                    kill_at.pop(0)
                    supervisor.kill()
                while launcher_at and launcher_at[0] <= now:
                    launcher_at.pop(0)
                    supervisor.kill_launcher()
                while worker_at and worker_at[0] <= now:
                    worker_at.pop(0)
                    supervisor.kill_worker(rng)
                if away_at is not None and not dropper.slow_gone and away_at <= now < away_at + 3.0:
                    for thread in dropper.writers:  # no writer half way through its file
                        thread.join()
                    dropper.slow_gone = True
                    slow.rename(away)
                if dropper.slow_gone and now >= away_at + 3.0:  # type: ignore[operator]
                    away.rename(slow)
                    dropper.slow_gone, away_at = False, None
                if fill_at is not None and filled is None and now >= fill_at:
                    for thread in dropper.writers:
                        thread.join()
                    filled = fill(folder / "disk")
                if filled is not None and now >= fill_at + 3.0:  # type: ignore[operator]
                    filled.unlink()
                    filled, fill_at = None, None
                supervisor.poll()
            for thread in dropper.writers:
                thread.join()
            if dropper.slow_gone:
                away.rename(slow)
            if filled is not None:
                filled.unlink()
            if server is None:
                mail.close()
                server = mail.enter_context(smtp_server(port=port, data_delay_s=0.2))
                loops.start()
            deadline = time.monotonic() + args.settle_timeout_s
            while not quiet(s.root, dropper.entries) and time.monotonic() < deadline:
                supervisor.poll()
                time.sleep(0.3)
            loops.join()
            code = supervisor.stop()
            subprocess.run([sys.executable, "-m", "pipeline", "mail", "retry", str(s.root)],
                           cwd=REPO, capture_output=True, check=False)
            received = [str(m.parsed()["Message-ID"]) for m in server.received]
        finally:
            loops.stop.set()
            mail.close()
            with contextlib.suppress(Exception):
                supervisor.stop()
            for path in dropper.frozen:
                _immutable(path, False)
            for e in dropper.entries:  # give the trial's own files back their permissions
                with contextlib.suppress(OSError):
                    if e.case == "unreadable file":
                        for p in (e.inbox / e.name, *s.quarantine.glob(f"*{to_text(e.name)}*")):
                            p.chmod(0o644)
        table, totals = reconcile(s.root, dropper.entries)
        letters, twice, never = mail_table(s.root, received)
        print(show(table))
        print()
        print(show(letters))
        print()
        print(f"station: {supervisor.starts} starts, {supervisor.kills} SIGKILLs by the trial "
              f"({supervisor.kills_in_recovery} within 2 s of a start), {supervisor.launcher_kills} "
              f"of its worker launcher, {supervisor.worker_kills} of a worker; ended by itself "
              f"{len(supervisor.own_exits)} times {supervisor.own_exits or ''}, last stop exit {code}")
        print(f"mail: {totals['mail sent']} sent, {totals['mail pending']} pending, "
              f"{totals['mail parked']} parked; the server took {len(received)} messages "
              f"({len(set(received))} distinct Message-IDs, {twice} twice, {never} letters never); "
              f"{loops.runs} runs of formgate mail retry beside the station")
        filled_note = "filled for 3 s" if fill_planned else "not filled (no tmpfs here, or --no-disk-full)"
        print(f"disk: {filled_note}; settle inbox: "
              + ("away for 3 s" if not args.no_inbox_removal else "not removed (--no-inbox-removal)"))
        made = certificates(s.root)
        print(f"certificates: {made.get('rendered', 0)} rendered and as published, "
              f"{made.get('missing', 0)} missing, {made.get('waiting', 0)} waiting, "
              f"{made.get('given up', 0)} given up, {made.get('differing', 0)} differing "
              "from the ledger")
        lost = totals.get("lost", 0)
        failed = totals.get("not decided once", 0)
        print(f"reconciliation: {lost} lost, {failed} not decided exactly once, "
              f"{totals['judged_twice']} judged twice, {totals.get('archive differs from ledger', 0)} "
              f"archived files differing from the ledger, {len(supervisor.own_exits)} crash loops")
        ok = (
            not lost and not failed and not totals["judged_twice"]
            and not totals.get("archive differs from ledger") and not supervisor.own_exits
            and code == 0 and not totals["mail pending"] and not totals["mail parked"]
            # a SIGKILL between the server's answer and the ledger's note may send one
            # letter again; nothing else may
            and twice <= supervisor.kills and not never
            and not made.get("missing") and not made.get("waiting") and not made.get("differing")
        )
        if args.keep:
            subprocess.run(["cp", "-a", str(s.root), str(args.keep)], check=False)
        return 0 if ok else 1


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=200, help="inputs to drop (default 200)")
    parser.add_argument("--kills", type=int, default=20, help="random SIGKILLs (default 20)")
    parser.add_argument("--launcher-kills", type=int, default=10,
                        help="SIGKILLs of the worker launcher, in a row (default 10)")
    parser.add_argument("--worker-kills", type=int, default=10,
                        help="SIGKILLs of a worker at random moments (default 10)")
    parser.add_argument("--retry-loops", type=int, default=2,
                        help="formgate mail retry loops beside the station (default 2)")
    parser.add_argument("--no-inbox-removal", action="store_true",
                        help="keep the settle inbox in place")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--gap-s", type=float, default=0.15, help="pause between drops")
    parser.add_argument("--settle-timeout-s", type=float, default=300.0)
    parser.add_argument("--no-disk-full", action="store_true", help="skip filling the disk")
    parser.add_argument("--keep", type=Path, help="copy the station folder here at the end")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="formgate-trial-") as tmp:
        return run(args, Path(tmp))


if __name__ == "__main__":
    sys.exit(main())
