"""A PostgreSQL server of formgate's own, in a temporary folder on loopback: for the tests and
the two-station demo, never for a plant (which runs its own database server).

The server binaries come from the operating system (Debian's ``postgresql`` package puts
``initdb`` and ``postgres`` in /usr/lib/postgresql/<version>/bin); none are downloaded.
PostgreSQL refuses to run as root, so under root the server runs as the ``postgres`` user
(or ``nobody``), in a folder of its own that the user owns. Every connection is trusted
(``--auth=trust``) and the server listens on 127.0.0.1 only; ``fsync`` is off, as nothing in
it outlives the run.
"""

from __future__ import annotations

import contextlib
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import psycopg

ADMIN = "plant_admin"

NO_SERVER = ("no PostgreSQL server binaries (initdb, postgres) on PATH or in "
             "/usr/lib/postgresql/*/bin")
INSTALL = "Install them (Debian, Ubuntu: apt-get install postgresql), then try again."


class LocalServerError(RuntimeError):
    """The local server could not be set up or started (its log's end is in the message)."""


def server_bin() -> Path | None:
    """The folder holding initdb and postgres, or None."""
    found = shutil.which("initdb")
    if found and shutil.which("postgres"):
        return Path(found).parent
    for folder in sorted(Path("/usr/lib/postgresql").glob("*/bin"), reverse=True):
        if (folder / "initdb").exists() and (folder / "postgres").exists():
            return folder
    return None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class LocalServer:
    """One PostgreSQL cluster: start, stop (as a crash or an orderly stop), start again."""

    bin: Path
    root: Path
    port: int = field(default_factory=_free_port)
    user: str | None = None
    process: subprocess.Popen[bytes] | None = None
    databases: int = 0

    @property
    def data(self) -> Path:
        return self.root / "data"

    def admin_url(self, database: str = "postgres") -> str:
        return f"postgresql://{ADMIN}@127.0.0.1:{self.port}/{database}"

    def init(self) -> None:
        self.data.mkdir()
        (self.root / "socket").mkdir()
        if self.user is not None:
            entry = pwd.getpwnam(self.user)
            for path in (self.root, self.data, self.root / "socket"):
                os.chown(path, entry.pw_uid, entry.pw_gid)
        done = subprocess.run(
            [str(self.bin / "initdb"), "-D", str(self.data), "-U", ADMIN, "--auth=trust",
             "-E", "UTF8", "--no-locale", "--no-sync"],
            capture_output=True, user=self.user,
        )
        if done.returncode != 0:
            raise LocalServerError("initdb failed: "
                                   + done.stderr.decode("utf-8", "replace").strip()[-2000:])

    def start(self) -> None:
        log = (self.root / "server.log").open("ab")
        self.process = subprocess.Popen(
            [str(self.bin / "postgres"), "-D", str(self.data), "-p", str(self.port),
             "-k", str(self.root / "socket"), "-c", "listen_addresses=127.0.0.1",
             "-c", "fsync=off", "-c", "full_page_writes=off", "-c", "max_connections=40"],
            stdout=log, stderr=subprocess.STDOUT, user=self.user,
        )
        log.close()
        deadline = time.monotonic() + 60
        while True:
            try:
                psycopg.connect(self.admin_url(), connect_timeout=2).close()
                return
            except psycopg.OperationalError:
                if self.process.poll() is not None or time.monotonic() > deadline:
                    self.stop()
                    raise LocalServerError(
                        "PostgreSQL did not start: " + (self.root / "server.log").read_text(
                            errors="replace")[-2000:]
                    ) from None
                time.sleep(0.1)

    def stop(self, *, crash: bool = False) -> None:
        """Stop the server: an immediate stop (like a crash: no shutdown checkpoint) or a fast one."""
        if self.process is None:
            return
        # SIGQUIT: immediate shutdown; SIGINT: fast shutdown (clients are disconnected)
        self.process.send_signal(3 if crash else 2)
        try:
            self.process.wait(timeout=60)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()
        self.process = None

    def new_database(self, name: str | None = None) -> str:
        """A new empty database (``plant_N`` unless named); its URL (for the admin role)."""
        self.databases += 1
        name = name or f"plant_{self.databases}"
        if not name.isidentifier():
            raise ValueError(f"not a plain database name: {name!r}")
        with psycopg.connect(self.admin_url(), autocommit=True) as conn:
            conn.execute(f"CREATE DATABASE {name}")  # a plain name, checked above
        return self.admin_url(name)


def start_server() -> LocalServer:
    """Start a new cluster in a temporary folder (the caller stops it: :func:`remove`).
    Raises LocalServerError without the binaries, or when the server does not start."""
    bin_dir = server_bin()
    if bin_dir is None:
        raise LocalServerError(f"{NO_SERVER}. {INSTALL}")
    user = None
    if os.geteuid() == 0:
        for name in ("postgres", "nobody"):
            with contextlib.suppress(KeyError):
                pwd.getpwnam(name)
                user = name
                break
    # not under a folder closed to other users: under root the server runs as another user
    root = Path(tempfile.mkdtemp(prefix="formgate-plant-"))
    os.chmod(root, 0o755)
    server = LocalServer(bin_dir, root, user=user)
    try:
        server.init()
        server.start()
    except BaseException:
        remove(server)
        raise
    return server


def remove(server: LocalServer) -> None:
    """Stop the server and delete its folder."""
    server.stop()
    shutil.rmtree(server.root, ignore_errors=True)
