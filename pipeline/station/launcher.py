"""Python's worker launcher (the multiprocessing fork server): is it still running, and does it keep dying.

The judge pool's workers are forked by one launcher process, which Python starts at the
first spawn and starts anew at the next spawn once it finds it dead
(``multiprocessing.forkserver.ForkServer.ensure_running`` asks ``waitpid(pid, WNOHANG)``,
which also reaps the dead one). So the station only *looks* at the launcher, in
``/proc/PID/stat``, and never waits for it: a launcher reaped by the station would make
Python's own ``waitpid`` fail, and no launcher would ever be started again.

When the launcher dies, every worker it forked loses its link to the pool and the pool
breaks; none of the inputs being judged is to blame (judges.py). A launcher that keeps
dying is a trouble of the machine (memory pressure, something killing processes), shown in
``formgate status`` and alerted once (:class:`LauncherDeaths`).
"""

from __future__ import annotations

import contextlib
import os
import signal
import time
from collections import deque
from dataclasses import dataclass
from multiprocessing import forkserver
from pathlib import Path

from pipeline.station.board import process_exists

PROC = Path("/proc")
# Linux's task flag "getting shut down" (include/linux/sched.h): a killed process closes its
# files before it becomes a zombie, so the pool can see its workers' links break while the
# launcher's state still reads running.
PF_EXITING = 0x00000004
EXIT_WAIT_S = 1.0  # longest wait for a launcher the station killed to end (a SIGKILL takes ms)

# One launcher death is an accident (an operator's kill, the OOM killer choosing it once);
# three within ten minutes mean something keeps killing it, and a person should look. Ten
# minutes is also how long troubles.REALERT_S treats a trouble that ends and begins again
# as one episode, so a launcher dying on and off raises one alert, not one per flicker.
DEATHS_TO_ALERT = 3
DEATHS_WINDOW_S = 600.0
QUIET_S = 600.0  # the trouble ends once the launcher has lived this long without a death


def _stat(pid: int) -> tuple[str, int, int] | None:
    """(state, flags, start time in clock ticks since boot) of process ``pid``; None if gone."""
    try:
        raw = (PROC / str(pid) / "stat").read_bytes()
        # fields after the command name, which may itself hold spaces and parentheses (proc(5))
        fields = raw[raw.rindex(b")") + 2 :].split()
        return fields[0].decode("ascii"), int(fields[6]), int(fields[19])
    except (OSError, ValueError, IndexError):  # gone, or read as it went
        return None


@dataclass(frozen=True, slots=True)
class Launcher:
    """One launcher process; its start time tells it from a later process given the same pid."""

    pid: int
    started: int | None  # clock ticks since boot (/proc/PID/stat field 22); None without /proc

    def running(self) -> bool:
        """True while this very process runs: not ended, not a zombie, not exiting."""
        stat = _stat(self.pid)
        if stat is None:
            return not PROC.joinpath("self").exists() and process_exists(self.pid)
        state, flags, started = stat
        if self.started is not None and started != self.started:
            return False  # the pid was given to another process
        return state not in ("Z", "X", "x") and not flags & PF_EXITING

    def ended(self) -> bool:
        """True once it has ended (a zombie, or gone): only then does Python's ``waitpid`` see
        it dead, and start another. A killed process is not running, but not yet ended, while
        it closes its files."""
        stat = _stat(self.pid)
        if stat is None:
            return not PROC.joinpath("self").exists() and not process_exists(self.pid)
        return stat[0] in ("Z", "X", "x") or (self.started is not None and stat[2] != self.started)

    def await_end(self) -> None:
        """Wait (at most EXIT_WAIT_S) until a launcher that is not running has ended."""
        deadline = time.monotonic() + EXIT_WAIT_S
        while not self.ended() and time.monotonic() < deadline:
            time.sleep(0.002)

    def stop(self) -> None:
        """Kill a launcher that runs but cannot start workers, so that Python starts another.

        Waits until it has ended, without reaping it: Python's next spawn must find it
        dead, and reaps it itself.
        """
        if self.running():
            with contextlib.suppress(ProcessLookupError):
                os.kill(self.pid, signal.SIGKILL)
        self.await_end()


def current_launcher() -> Launcher | None:
    """The launcher Python uses now (running or not), or None before the first was started.

    Python keeps its process id in a private attribute of the module's one ForkServer; no
    public call tells it.
    """
    pid = getattr(getattr(forkserver, "_forkserver", None), "_forkserver_pid", None)
    if not isinstance(pid, int):
        return None
    stat = _stat(pid)
    return Launcher(pid, stat[2] if stat is not None else None)


def start_launcher() -> Launcher | None:
    """Start a launcher unless one runs (Python's own check, which reaps a dead one); it.

    A launcher still dying is first waited for: Python would take it for alive.
    Raises what starting a process raises (OSError).
    """
    before = current_launcher()
    if before is not None and not before.running():
        before.await_end()
    forkserver.ensure_running()
    return current_launcher()


def is_launcher_child(pid: int) -> bool:
    """True if ``pid`` is a process forked by a launcher (a worker): it runs the launcher's
    command line. Checked before the station kills a pid it only read from the board, which
    might by now belong to another process."""
    try:
        cmdline = (PROC / str(pid) / "cmdline").read_bytes()
    except OSError:
        return False
    return b"multiprocessing.forkserver" in cmdline


class LauncherDeaths:
    """The launchers seen dying, and whether that is a trouble to show (times in monotonic s).

    Pure bookkeeping over :func:`current_launcher`: :meth:`look` notes the death of the
    launcher last seen running (once) and remembers the one running now.
    """

    def __init__(
        self,
        to_alert: int = DEATHS_TO_ALERT,
        window_s: float = DEATHS_WINDOW_S,
        quiet_s: float = QUIET_S,
    ) -> None:
        self.to_alert = to_alert
        self.window_s = window_s
        self.quiet_s = quiet_s
        self.seen: Launcher | None = None  # the launcher last seen running
        self.recent: deque[float] = deque()  # times of the deaths within window_s
        self.total = 0  # deaths since the station started
        self.last_s: float | None = None  # time of the latest death
        self.since_trouble = 0  # deaths since the trouble began
        self.troubled = False

    def look(self, now_s: float) -> bool:
        """Note the death of the launcher last seen running; True if it has just been noted."""
        died = False
        if self.seen is not None and not self.seen.running():
            self.seen = None
            self.died(now_s)
            died = True
        if self.seen is None:
            launcher = current_launcher()
            if launcher is not None and launcher.running():
                self.seen = launcher
        return died

    def died(self, now_s: float) -> None:
        self.total += 1
        self.last_s = now_s
        self.recent.append(now_s)
        if self.troubled:
            self.since_trouble += 1

    def trouble(self, now_s: float) -> str | None:
        """Why the launcher is a trouble now (it keeps dying), or None (it has been quiet)."""
        while self.recent and now_s - self.recent[0] > self.window_s:
            self.recent.popleft()
        if not self.troubled and len(self.recent) >= self.to_alert:
            self.troubled = True
            self.since_trouble = len(self.recent)
        elif self.troubled and self.last_s is not None and now_s - self.last_s >= self.quiet_s:
            self.troubled = False
        if not self.troubled:
            return None
        return (
            f"the worker launcher keeps dying ({self.since_trouble} times so far, "
            f"{self.to_alert} or more within {self.window_s / 60:g} minutes); the station "
            "starts it again and judges the files in hand again, blaming none of them"
        )
