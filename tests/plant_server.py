"""A real PostgreSQL server for the plant tests (pipeline.plant.localserver), and the rule for
when it cannot start.

Without the server binaries the plant tests are skipped with the reason printed, except in
continuous integration (``CI=true``), where a skip would hide that they never ran: there it
fails.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import pytest

from pipeline.plant.localserver import (
    ADMIN,
    LocalServer,
    remove,
    server_bin,
    start_server,
)
from pipeline.plant.localserver import (
    NO_SERVER as _NO_BINARIES,
)

PlantServer = LocalServer
NO_SERVER = (_NO_BINARIES + ": the plant database tests need them "
             "(Debian: apt-get install postgresql)")

__all__ = ["ADMIN", "NO_SERVER", "PlantServer", "remove", "require_server", "server_bin",
           "start_server", "unavailable"]


def unavailable(reason: str, environ: Mapping[str, str]) -> None:
    """Skip the test for ``reason``, or fail it under CI=true (CI must run these tests)."""
    if environ.get("CI", "").lower() == "true":
        pytest.fail(reason + "; CI must run them")
    pytest.skip(reason)


def require_server(environ: Mapping[str, str]) -> Path:
    """The server binaries' folder; without them the test is skipped with the reason, or
    fails under CI=true."""
    found = server_bin()
    if found is None:
        unavailable(NO_SERVER, environ)
    assert found is not None
    return found
