"""A regrade's judgements kept in a small SQLite file, so that a regrade stopped half-way
continues where it stopped and never judges an input twice under the same rules.

One row per judged input, keyed by the input's SHA-256, the rules bundle's digest and a
*setting* digest: what else decides the result document besides the bytes and the rules
(the name the file is judged under, its import profile, the size limits, the formgate
version; rules_bundle.setting_digest). A row holds the result document (JSON text) or the
located message of an "error" verdict, never both, and the time the input was judged at.

Rows are written as results arrive, a batch in one short transaction, in WAL mode so
that a reader (a report being built) never waits for the writer. Only judgements are
kept: an archived copy that could not be read, or no longer matches its SHA-256, is not a
judgement of those bytes and is tried again by the next run.

>>> cache = RegradeCache(":memory:")
>>> key = CacheKey("ab" * 32, "cd" * 32, "ef" * 32)
>>> cache.get(key) is None
True
>>> import datetime
>>> at = datetime.datetime(2026, 3, 10, tzinfo=datetime.timezone.utc)
>>> cache.put_many([(key, CachedResult('{"x": 1}', None, at))])
>>> cache.get(key).result_json, cache.hits, cache.written, len(cache)
('{"x": 1}', 1, 1, 1)
"""

from __future__ import annotations

import datetime
import os
import sqlite3
from collections.abc import Iterable
from types import TracebackType
from typing import NamedTuple

_SCHEMA = """
CREATE TABLE IF NOT EXISTS judged (
    input_sha256 TEXT NOT NULL,
    rules_digest TEXT NOT NULL,
    setting TEXT NOT NULL,
    result_json TEXT,
    error TEXT,
    analysed_at TEXT NOT NULL,
    PRIMARY KEY (input_sha256, rules_digest, setting),
    CHECK ((result_json IS NULL) <> (error IS NULL))
) WITHOUT ROWID
"""


class CacheKey(NamedTuple):
    """What a judgement depends on: the input's bytes, the rules and the setting (all SHA-256)."""

    input_sha256: str
    rules_digest: str
    setting: str


class CachedResult(NamedTuple):
    """A kept judgement: the result document or the error verdict's message, and when judged."""

    result_json: str | None
    error: str | None
    analysed_at: datetime.datetime


class RegradeCache:
    """The judgements of a regrade, in the SQLite file at ``path`` (created if needed).

    ``hits`` counts the lookups answered and ``written`` the judgements stored through this
    object. Used from one thread at a time (a regrade's consumer); close it when done.
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = os.fspath(path)
        # the regrade's generator may be resumed in another thread than the one that opened it
        self._db = sqlite3.connect(self.path, timeout=30.0, check_same_thread=False, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=NORMAL")  # WAL: a power loss may lose the last batch only
        self._db.execute(_SCHEMA)
        self.hits = 0
        self.written = 0

    def get(self, key: CacheKey) -> CachedResult | None:
        """The judgement kept for ``key``, or None."""
        row = self._db.execute(
            "SELECT result_json, error, analysed_at FROM judged "
            "WHERE input_sha256 = ? AND rules_digest = ? AND setting = ?",
            tuple(key),
        ).fetchone()
        if row is None:
            return None
        self.hits += 1
        return CachedResult(row[0], row[1], datetime.datetime.fromisoformat(row[2]))

    def put_many(self, entries: Iterable[tuple[CacheKey, CachedResult]]) -> None:
        """Keep judgements, in one transaction (a judgement kept again replaces the old row)."""
        rows = [
            (*key, found.result_json, found.error, found.analysed_at.isoformat())
            for key, found in entries
        ]
        if not rows:
            return
        for _, _, _, result_json, error, _ in rows:
            if (result_json is None) == (error is None):
                raise ValueError("a kept judgement has a result document or an error, not both")
        with self._transaction():
            self._db.executemany("INSERT OR REPLACE INTO judged VALUES (?, ?, ?, ?, ?, ?)", rows)
        self.written += len(rows)

    def analysed_at(self, rules_digest: str) -> datetime.datetime | None:
        """When the first judgement kept under these rules was made (None: none kept).

        A regrade resumed later can judge with the same time, so that all its results agree.
        """
        row = self._db.execute(
            "SELECT MIN(analysed_at) FROM judged WHERE rules_digest = ?", (rules_digest,)
        ).fetchone()
        return None if row[0] is None else datetime.datetime.fromisoformat(row[0])

    def __len__(self) -> int:
        return int(self._db.execute("SELECT COUNT(*) FROM judged").fetchone()[0])

    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> RegradeCache:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()

    def _transaction(self) -> _Transaction:
        return _Transaction(self._db)


class _Transaction:
    """BEGIN IMMEDIATE ... COMMIT, or ROLLBACK when the block raises."""

    def __init__(self, db: sqlite3.Connection) -> None:
        self._db = db

    def __enter__(self) -> None:
        self._db.execute("BEGIN IMMEDIATE")

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self._db.execute("COMMIT" if kind is None else "ROLLBACK")
