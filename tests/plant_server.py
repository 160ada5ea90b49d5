"""A real PostgreSQL server for the plant tests, started in a temporary folder on loopback.

The server binaries come from the operating system (Debian's ``postgresql`` package puts
``initdb`` and ``postgres`` in /usr/lib/postgresql/<version>/bin); none are downloaded.
Without them the plant tests are skipped with the reason printed, except in continuous
integration (``CI=true``), where a skip would hide that they never ran: there it fails.
PostgreSQL refuses to run as root, so under root the server runs as the ``postgres`` user
(or ``nobody``), in a folder of its own that the user owns.
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
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import psycopg
import pytest

ADMIN = "plant_admin"


def server_bin() -> Path | None:
    """The folder holding initdb and postgres, or None."""
    found = shutil.which("initdb")
    if found and shutil.which("postgres"):
        return Path(found).parent
    for folder in sorted(Path("/usr/lib/postgresql").glob("*/bin"), reverse=True):
        if (folder / "initdb").exists() and (folder / "postgres").exists():
            return folder
    return None


NO_SERVER = ("no PostgreSQL server binaries (initdb, postgres) on PATH or in "
             "/usr/lib/postgresql/*/bin: the plant database tests need them "
             "(Debian: apt-get install postgresql)")


def require_server(environ: Mapping[str, str]) -> Path:
    """The server binaries' folder; without them the test is skipped with the reason, or
    fails under CI=true (CI must run these tests)."""
    found = server_bin()
    if found is not None:
        return found
    if environ.get("CI", "").lower() == "true":
        pytest.fail(NO_SERVER + "; CI must run them")
    pytest.skip(NO_SERVER)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class PlantServer:
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
        subprocess.run(
            [str(self.bin / "initdb"), "-D", str(self.data), "-U", ADMIN, "--auth=trust",
             "-E", "UTF8", "--no-locale", "--no-sync"],
            check=True, capture_output=True, user=self.user,
        )

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
                    raise RuntimeError(
                        "PostgreSQL did not start: " + (self.root / "server.log").read_text()[-2000:]
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

    def new_database(self) -> str:
        """A new empty database; its URL (for the admin role)."""
        self.databases += 1
        name = f"plant_{self.databases}"
        with psycopg.connect(self.admin_url(), autocommit=True) as conn:
            conn.execute(f"CREATE DATABASE {name}")  # type: ignore[arg-type]
        return self.admin_url(name)


def start_server() -> PlantServer:
    """Start a new cluster in a temporary folder (the caller stops it)."""
    bin_dir = server_bin()
    assert bin_dir is not None
    user = None
    if os.geteuid() == 0:
        for name in ("postgres", "nobody"):
            with contextlib.suppress(KeyError):
                pwd.getpwnam(name)
                user = name
                break
    # not under pytest's own temporary folder: under root it is closed to other users
    root = Path(tempfile.mkdtemp(prefix="formgate-plant-"))
    os.chmod(root, 0o755)
    server = PlantServer(bin_dir, root, user=user)
    server.init()
    server.start()
    return server


def remove(server: PlantServer) -> None:
    server.stop()
    shutil.rmtree(server.root, ignore_errors=True)
