"""The ledger's schema as an ordered list of named migrations, oldest first.

A ledger written by an older formgate is brought up to date by the steps it lacks, in
this order, so a change to the schema is a new step at the end of ``MIGRATIONS``. The code
that applies them (one transaction each, the record of what was applied, the
refusal of a ledger ahead of this code) is migrate.py's; opening connections and
everything else about the ledger's rows is left to ``pipeline.ledger.ledger``.
"""

from __future__ import annotations

import sqlite3

from pipeline.ledger.chain import rehash
from pipeline.ledger.migrate import Migration, sql_migration

_STATES = "'claimed', 'judged', 'published', 'archived', 'quarantined', 'duplicate'"

# Times are ISO 8601 text in UTC with microseconds and "+00:00", one fixed width,
# so text order is time order. Tables are STRICT (SQLite 3.37 or later).
_INITIAL = sql_migration(
    "0001_initial",
    f"""
    CREATE TABLE inputs (
        id INTEGER PRIMARY KEY,
        sha256 TEXT NOT NULL CHECK (length(sha256) = 64 AND sha256 NOT GLOB '*[^0-9a-f]*'),
        name TEXT NOT NULL CHECK (name <> ''),
        size INTEGER NOT NULL CHECK (size >= 0),
        arrived_at TEXT NOT NULL,
        work_path TEXT NOT NULL,
        state TEXT NOT NULL CHECK (state IN ({_STATES})),
        final_path TEXT,
        final_at TEXT,
        reason TEXT,
        version INTEGER NOT NULL CHECK (version >= 1),
        supersedes INTEGER REFERENCES inputs (id),
        duplicate_of INTEGER REFERENCES inputs (id),
        CHECK (CASE state
            WHEN 'archived' THEN final_path IS NOT NULL
            WHEN 'quarantined' THEN final_path IS NOT NULL
            WHEN 'duplicate' THEN 1
            ELSE final_path IS NULL END),
        CHECK ((final_path IS NULL) = (final_at IS NULL)),
        CHECK ((state = 'duplicate') = (duplicate_of IS NOT NULL)),
        CHECK (supersedes IS NULL OR supersedes < id),
        CHECK (duplicate_of IS NULL OR duplicate_of < id)
    ) STRICT
    """,
    "CREATE INDEX inputs_by_sha256 ON inputs (sha256, id)",
    "CREATE INDEX inputs_by_state ON inputs (state)",
    "CREATE INDEX inputs_by_final_at ON inputs (final_at) WHERE final_at IS NOT NULL",
    "CREATE INDEX inputs_by_work_path ON inputs (work_path)",
    # versions count distinct contents under one name; duplicates take no part
    """CREATE UNIQUE INDEX inputs_by_name_version ON inputs (name, version)
       WHERE state <> 'duplicate'""",
    # one in-flight row per file in work/: what makes claiming again after a restart idempotent
    "CREATE UNIQUE INDEX inputs_in_flight ON inputs (work_path, sha256) WHERE final_path IS NULL",
    """
    CREATE TABLE results (
        id INTEGER PRIMARY KEY,
        input_id INTEGER NOT NULL UNIQUE REFERENCES inputs (id),
        cell_id TEXT NOT NULL,
        lot TEXT NOT NULL,
        verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold', 'error')),
        hazards TEXT NOT NULL CHECK (json_valid(hazards) AND json_type(hazards) = 'array'),
        result_json TEXT NOT NULL CHECK (json_valid(result_json)),
        rule_set_name TEXT NOT NULL,
        rule_set_revision TEXT NOT NULL,
        rule_set_sha256 TEXT NOT NULL,
        analysed_at TEXT NOT NULL,
        json_path TEXT NOT NULL,
        pdf_path TEXT,
        superseded_by INTEGER REFERENCES results (id),
        digest_mail_id INTEGER REFERENCES outbox (id),
        CHECK (superseded_by IS NULL OR superseded_by <> id),
        CHECK (digest_mail_id IS NULL OR verdict = 'pass')
    ) STRICT
    """,
    "CREATE INDEX results_by_analysed_at ON results (analysed_at, id)",
    "CREATE INDEX results_by_superseded_by ON results (superseded_by)",
    "CREATE INDEX results_by_digest_mail ON results (digest_mail_id)",
    """CREATE INDEX results_awaiting_digest ON results (lot)
       WHERE verdict = 'pass' AND digest_mail_id IS NULL""",
    """
    CREATE TABLE checks (
        id INTEGER PRIMARY KEY,
        result_id INTEGER NOT NULL REFERENCES results (id),
        position INTEGER NOT NULL,
        rule_id TEXT NOT NULL CHECK (rule_id <> ''),
        metric TEXT NOT NULL CHECK (metric <> ''),
        value REAL,
        low REAL,
        high REAL,
        outcome TEXT NOT NULL
            CHECK (outcome IN ('in_window', 'out_of_window', 'not_judged', 'skipped')),
        severity TEXT NOT NULL CHECK (severity IN ('reject', 'review')),
        hazard TEXT CHECK (hazard IS NULL OR hazard <> ''),
        UNIQUE (result_id, position)
    ) STRICT
    """,
    """
    CREATE TABLE outbox (
        id INTEGER PRIMARY KEY,
        kind TEXT NOT NULL CHECK (kind IN ('failure', 'hold', 'digest', 'alert')),
        message_id TEXT NOT NULL UNIQUE CHECK (message_id <> ''),
        recipients TEXT NOT NULL CHECK (json_valid(recipients) AND json_type(recipients) = 'array'),
        subject TEXT NOT NULL,
        body_text TEXT NOT NULL,
        attachment_path TEXT,
        cell_result_id INTEGER REFERENCES results (id),
        lot TEXT,
        state TEXT NOT NULL CHECK (state IN ('pending', 'sent', 'parked')),
        attempts INTEGER NOT NULL DEFAULT 0 CHECK (attempts >= 0),
        next_attempt_at TEXT NOT NULL,
        last_error TEXT,
        reply TEXT,
        created_at TEXT NOT NULL,
        sent_at TEXT,
        CHECK ((state = 'sent') = (sent_at IS NOT NULL))
    ) STRICT
    """,
    "CREATE INDEX outbox_due ON outbox (created_at, id) WHERE state = 'pending'",
    "CREATE INDEX outbox_by_result ON outbox (cell_result_id)",
    "CREATE INDEX outbox_by_state ON outbox (state)",
)

# The exact text of every rule set (and import profile) a result was judged with, by
# SHA-256: a restart that must re-render a committed result judges the same bytes
# with the same rules again, and auditors can read the rules behind any certificate.
_RULE_TEXTS = sql_migration(
    "0002_rule_texts",
    """
    CREATE TABLE rule_texts (
        sha256 TEXT PRIMARY KEY CHECK (length(sha256) = 64 AND sha256 NOT GLOB '*[^0-9a-f]*'),
        kind TEXT NOT NULL CHECK (kind IN ('rule_set', 'profile')),
        name TEXT NOT NULL,
        text TEXT NOT NULL,
        first_used_at TEXT NOT NULL
    ) STRICT
    """,
)

# Inbox entries the station could not take as inputs (a folder, a link, a pipe, a file it
# may not read or move, a marker without data): where each went, or why it was left in
# place. The rule sets in force at each successful load of the rules folder, so a station
# started while a rule file is broken judges with the last rules that were valid. And a
# few named values of the running station (whether it is paused, and why), which also
# serve as its test that the ledger can be written.
_SET_ASIDE = sql_migration(
    "0003_set_aside_rule_books_station_state",
    """
    CREATE TABLE set_aside (
        id INTEGER PRIMARY KEY,
        inbox TEXT NOT NULL,
        name TEXT NOT NULL CHECK (name <> ''),
        kind TEXT NOT NULL
            CHECK (kind IN ('file', 'folder', 'symlink', 'fifo', 'socket', 'device', 'marker')),
        reason TEXT NOT NULL CHECK (reason <> ''),
        noticed_at TEXT NOT NULL,
        state TEXT NOT NULL CHECK (state IN ('quarantined', 'left_in_place')),
        final_path TEXT,
        CHECK ((state = 'quarantined') = (final_path IS NOT NULL))
    ) STRICT
    """,
    "CREATE INDEX set_aside_by_noticed_at ON set_aside (noticed_at, id)",
    """
    CREATE TABLE rule_books (
        id INTEGER PRIMARY KEY,
        rule_sets TEXT NOT NULL CHECK (json_valid(rule_sets) AND json_type(rule_sets) = 'array'),
        loaded_at TEXT NOT NULL
    ) STRICT
    """,
    """
    CREATE TABLE station_state (
        key TEXT PRIMARY KEY CHECK (key <> ''),
        value TEXT NOT NULL,
        updated_at TEXT NOT NULL
    ) STRICT
    """,
)

# A cell's history beyond its cycle files: the open-circuit-voltage readings of its aging
# stage (one row per reading, from the input file that brought it), every decision on the
# cell as a whole (over its stages and its lot; a new decision points at the one it
# supersedes, none is ever changed), and the lots that were closed, when and by whom.
_LOTS = sql_migration(
    "0004_readings_decisions_lots",
    """
    CREATE TABLE readings (
        id INTEGER PRIMARY KEY,
        input_id INTEGER NOT NULL REFERENCES inputs (id),
        cell_id TEXT NOT NULL CHECK (cell_id <> ''),
        lot TEXT NOT NULL,
        cell_type TEXT,
        at TEXT NOT NULL,
        ocv_v REAL NOT NULL,
        acir_mohm REAL,
        temperature_c REAL,
        line INTEGER NOT NULL CHECK (line >= 1),
        UNIQUE (input_id, line)
    ) STRICT
    """,
    "CREATE INDEX readings_by_cell ON readings (lot, cell_id)",
    """
    CREATE TABLE decisions (
        id INTEGER PRIMARY KEY,
        cell_id TEXT NOT NULL CHECK (cell_id <> ''),
        lot TEXT NOT NULL,
        verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold')),
        reason TEXT NOT NULL,
        hazards TEXT NOT NULL CHECK (json_valid(hazards) AND json_type(hazards) = 'array'),
        grade TEXT,
        cause TEXT NOT NULL CHECK (cause IN ('record', 'readings', 'lot closed', 'rules')),
        basis TEXT NOT NULL CHECK (json_valid(basis) AND json_type(basis) = 'array'),
        decided_at TEXT NOT NULL,
        supersedes INTEGER REFERENCES decisions (id),
        CHECK (supersedes IS NULL OR supersedes < id),
        CHECK (grade IS NULL OR verdict = 'pass')
    ) STRICT
    """,
    "CREATE INDEX decisions_by_cell ON decisions (lot, cell_id, id)",
    """
    CREATE TABLE lots (
        lot TEXT PRIMARY KEY,
        closed_at TEXT NOT NULL,
        closed_by TEXT NOT NULL CHECK (closed_by <> ''),
        report_path TEXT,
        export_path TEXT
    ) STRICT
    """,
)

# Who is sending an outbox row right now. The station's mail thread and any number of
# `formgate mail retry` processes share one outbox: a sender claims a row (its owner id
# and the end of its lease) in one write transaction before it speaks to the server, and
# only that owner records the outcome, which clears the claim. A claim whose owner died
# is taken over once its lease has run out. Both columns are set together or not at all.
_OUTBOX_CLAIMS = sql_migration(
    "0005_outbox_claims",
    # only a pending row is ever claimed: an outcome clears the claim in the same UPDATE
    """ALTER TABLE outbox ADD COLUMN claimed_by TEXT
       CHECK (claimed_by IS NULL OR (claimed_by <> '' AND state = 'pending'))""",
    """ALTER TABLE outbox ADD COLUMN claimed_until TEXT
       CHECK ((claimed_until IS NULL) = (claimed_by IS NULL))""",
)

# Acting on decisions. A person's review of a held or failed cell (release, reject, or a
# retest of one stage) is a row of its own, and a decision may rest on it (cause 'review',
# review_id); a release of a failed cell names the failed checks it accepts. Every file
# the station publishes is recorded with its SHA-256, so that `formgate verify` can tell a
# certificate or result from an edited one. Decisions and reviews are chained by hash
# (chain.py): the decisions table is rebuilt for its wider cause and its new columns, and
# the rows already there are chained in id order.
_REVIEWS_SQL = (
    "ALTER TABLE decisions RENAME TO decisions_before_reviews",
    # made after the rename (a table made before it would follow the old table to its new
    # name) and before the new decisions table (whose rows name their review)
    """
    CREATE TABLE reviews (
        id INTEGER PRIMARY KEY,
        cell_id TEXT NOT NULL CHECK (cell_id <> ''),
        lot TEXT NOT NULL,
        action TEXT NOT NULL CHECK (action IN ('release', 'reject', 'retest')),
        stage TEXT CHECK ((stage IS NULL) = (action <> 'retest')),
        accepts TEXT NOT NULL CHECK (json_valid(accepts) AND json_type(accepts) = 'array'),
        reviewer TEXT NOT NULL CHECK (reviewer <> ''),
        reason TEXT NOT NULL CHECK (trim(reason) <> ''),
        reviewed_at TEXT NOT NULL,
        decision_id INTEGER NOT NULL REFERENCES decisions (id),
        prev_hash TEXT,
        row_hash TEXT UNIQUE
    ) STRICT
    """,
    "CREATE INDEX reviews_by_cell ON reviews (lot, cell_id, id)",
    """
    CREATE TABLE decisions (
        id INTEGER PRIMARY KEY,
        cell_id TEXT NOT NULL CHECK (cell_id <> ''),
        lot TEXT NOT NULL,
        verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold')),
        reason TEXT NOT NULL,
        hazards TEXT NOT NULL CHECK (json_valid(hazards) AND json_type(hazards) = 'array'),
        grade TEXT,
        cause TEXT NOT NULL
            CHECK (cause IN ('record', 'readings', 'lot closed', 'rules', 'review')),
        basis TEXT NOT NULL CHECK (json_valid(basis) AND json_type(basis) = 'array'),
        decided_at TEXT NOT NULL,
        supersedes INTEGER REFERENCES decisions (id),
        review_id INTEGER REFERENCES reviews (id),
        prev_hash TEXT,
        row_hash TEXT UNIQUE,
        CHECK (supersedes IS NULL OR supersedes < id),
        CHECK (grade IS NULL OR verdict = 'pass'),
        CHECK ((review_id IS NULL) = (cause <> 'review'))
    ) STRICT
    """,
    """
    INSERT INTO decisions (id, cell_id, lot, verdict, reason, hazards, grade, cause, basis,
                           decided_at, supersedes)
    SELECT id, cell_id, lot, verdict, reason, hazards, grade, cause, basis, decided_at, supersedes
    FROM decisions_before_reviews ORDER BY id
    """,
    "DROP TABLE decisions_before_reviews",
    "CREATE INDEX decisions_by_cell ON decisions (lot, cell_id, id)",
    """
    CREATE TABLE published (
        id INTEGER PRIMARY KEY,
        path TEXT NOT NULL CHECK (path <> ''),
        sha256 TEXT NOT NULL CHECK (length(sha256) = 64 AND sha256 NOT GLOB '*[^0-9a-f]*'),
        kind TEXT NOT NULL CHECK (kind IN ('result', 'certificate', 'cell result',
            'cell certificate', 'lot report', 'lot export')),
        lot TEXT,
        cell_id TEXT,
        result_id INTEGER REFERENCES results (id),
        decision_id INTEGER REFERENCES decisions (id),
        published_at TEXT NOT NULL
    ) STRICT
    """,
    "CREATE INDEX published_by_sha ON published (sha256)",
    "CREATE INDEX published_by_path ON published (path, id)",
)


def _reviews_and_chain(conn: sqlite3.Connection) -> None:
    for statement in _REVIEWS_SQL:
        conn.execute(statement)
    rehash(conn, "decisions")


_REVIEWS = Migration("0006_reviews_published_files_chain", _reviews_and_chain)

# Regrades. A regrade judges archived inputs again under other rules; what it applies is
# recorded beside what was there (nothing overwritten): a regrade row (who, why, under which
# rule sets; finished_at once every change is applied, so that a run cut short and started
# again carries on under the same row), a new result of each input it judged again
# (regrade_id; the input's earlier result points at it through superseded_by), and a decision
# with cause 'regrade' whose basis names the regrade. The results table is rebuilt so that an
# input may have one result of its own and one per regrade (and gains the index by cell it
# lacked); the decisions table is rebuilt for its wider cause, its rows and hashes copied as
# they are. Both follow SQLite's procedure for other kinds of table schema changes (a new
# table, the rows copied with their ids, the old one dropped, the new one renamed, with
# foreign keys off), so that the tables that refer to them keep referring to them; nothing
# then points nowhere (checked before the step commits).

_REGRADES_SQL = (
    """
    CREATE TABLE regrades (
        id INTEGER PRIMARY KEY,
        started_at TEXT NOT NULL,
        finished_at TEXT,
        run_by TEXT NOT NULL CHECK (run_by <> ''),
        reason TEXT NOT NULL CHECK (trim(reason) <> ''),
        rules_digest TEXT NOT NULL CHECK (length(rules_digest) = 64),
        rule_sets TEXT NOT NULL CHECK (json_valid(rule_sets) AND json_type(rule_sets) = 'array'),
        selection TEXT NOT NULL,
        summary TEXT NOT NULL CHECK (json_valid(summary) AND json_type(summary) = 'object')
    ) STRICT
    """,
    """
    CREATE TABLE results_new (
        id INTEGER PRIMARY KEY,
        input_id INTEGER NOT NULL REFERENCES inputs (id),
        cell_id TEXT NOT NULL,
        lot TEXT NOT NULL,
        verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold', 'error')),
        hazards TEXT NOT NULL CHECK (json_valid(hazards) AND json_type(hazards) = 'array'),
        result_json TEXT NOT NULL CHECK (json_valid(result_json)),
        rule_set_name TEXT NOT NULL,
        rule_set_revision TEXT NOT NULL,
        rule_set_sha256 TEXT NOT NULL,
        analysed_at TEXT NOT NULL,
        json_path TEXT NOT NULL,
        pdf_path TEXT,
        superseded_by INTEGER REFERENCES results (id),
        digest_mail_id INTEGER REFERENCES outbox (id),
        regrade_id INTEGER REFERENCES regrades (id),
        CHECK (superseded_by IS NULL OR superseded_by <> id),
        CHECK (digest_mail_id IS NULL OR verdict = 'pass')
    ) STRICT
    """,
    """
    INSERT INTO results_new (id, input_id, cell_id, lot, verdict, hazards, result_json,
        rule_set_name, rule_set_revision, rule_set_sha256, analysed_at, json_path, pdf_path,
        superseded_by, digest_mail_id)
    SELECT id, input_id, cell_id, lot, verdict, hazards, result_json, rule_set_name,
        rule_set_revision, rule_set_sha256, analysed_at, json_path, pdf_path, superseded_by,
        digest_mail_id
    FROM results ORDER BY id
    """,
    "DROP TABLE results",
    "ALTER TABLE results_new RENAME TO results",
    "CREATE UNIQUE INDEX results_own_of_input ON results (input_id) WHERE regrade_id IS NULL",
    """CREATE UNIQUE INDEX results_regraded_of_input ON results (input_id, regrade_id)
       WHERE regrade_id IS NOT NULL""",
    "CREATE INDEX results_by_cell ON results (lot, cell_id, id)",
    "CREATE INDEX results_by_analysed_at ON results (analysed_at, id)",
    "CREATE INDEX results_by_superseded_by ON results (superseded_by)",
    "CREATE INDEX results_by_digest_mail ON results (digest_mail_id)",
    """CREATE INDEX results_awaiting_digest ON results (lot)
       WHERE verdict = 'pass' AND digest_mail_id IS NULL""",
    """
    CREATE TABLE decisions_new (
        id INTEGER PRIMARY KEY,
        cell_id TEXT NOT NULL CHECK (cell_id <> ''),
        lot TEXT NOT NULL,
        verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold')),
        reason TEXT NOT NULL,
        hazards TEXT NOT NULL CHECK (json_valid(hazards) AND json_type(hazards) = 'array'),
        grade TEXT,
        cause TEXT NOT NULL
            CHECK (cause IN ('record', 'readings', 'lot closed', 'rules', 'review', 'regrade')),
        basis TEXT NOT NULL CHECK (json_valid(basis) AND json_type(basis) = 'array'),
        decided_at TEXT NOT NULL,
        supersedes INTEGER REFERENCES decisions (id),
        review_id INTEGER REFERENCES reviews (id),
        prev_hash TEXT,
        row_hash TEXT UNIQUE,
        CHECK (supersedes IS NULL OR supersedes < id),
        CHECK (grade IS NULL OR verdict = 'pass'),
        CHECK ((review_id IS NULL) = (cause <> 'review'))
    ) STRICT
    """,
    "INSERT INTO decisions_new SELECT * FROM decisions ORDER BY id",
    "DROP TABLE decisions",
    "ALTER TABLE decisions_new RENAME TO decisions",
    "CREATE INDEX decisions_by_cell ON decisions (lot, cell_id, id)",
)


def _regrades(conn: sqlite3.Connection) -> None:
    for statement in _REGRADES_SQL:
        conn.execute(statement)


_REGRADE_TABLES = Migration("0007_regrades", _regrades, rebuilds=True)

# Certificates are rendered after judging, from a queue that outlives the process: a result
# recorded with a certificate to come has a row here until its PDF is written (outcome
# 'rendered') or given up (outcome 'failed', with the error); failed cells first (priority 0),
# then held (1), then passed (2). A letter that attaches the certificate is not due while
# its row waits. A letter may also name a file it links (``waits_for``, the cell's own
# certificate): it waits until that path is published after the letter was queued.
_CERTIFICATE_QUEUE = sql_migration(
    "0008_certificate_queue",
    """
    CREATE TABLE certificate_queue (
        result_id INTEGER PRIMARY KEY REFERENCES results (id),
        priority INTEGER NOT NULL CHECK (priority IN (0, 1, 2)),
        queued_at TEXT NOT NULL,
        losses INTEGER NOT NULL DEFAULT 0 CHECK (losses >= 0),
        done_at TEXT,
        outcome TEXT CHECK (outcome IN ('rendered', 'failed')),
        error TEXT,
        CHECK ((done_at IS NULL) = (outcome IS NULL)),
        CHECK ((outcome = 'failed') = (error IS NOT NULL))
    ) STRICT
    """,
    """CREATE INDEX certificate_queue_waiting ON certificate_queue (priority, queued_at, result_id)
       WHERE done_at IS NULL""",
    "ALTER TABLE outbox ADD COLUMN waits_for TEXT CHECK (waits_for IS NULL OR waits_for <> '')",
)

# The plant feed (pipeline/plant): every row the station records is forwarded to the plant
# database. Which rows are still to go is a log of changes kept by triggers: a row inserted,
# changed (an input archived, a result superseded, and a hand edit too) or deleted adds its
# table and key to ``plant_changes``; the feed forwards them in that order and deletes what
# the plant has taken, so what is left is how far it is behind. The triggers log only once
# ``plant_feed`` has its row, which the feed writes at its first start together with the
# whole history (a station without a plant database keeps no log). A table rebuilt by a later
# migration loses its triggers: that migration must make them again (plant_trigger_sql).
_FED_AT_0009: tuple[tuple[str, str], ...] = (  # as 0009 made their triggers: never change
    ("rule_texts", "sha256"), ("inputs", "id"), ("regrades", "id"), ("results", "id"),
    ("checks", "id"), ("readings", "id"), ("reviews", "id"), ("decisions", "id"),
    ("lots", "lot"), ("set_aside", "id"), ("published", "id"),
)


def plant_trigger_sql(table: str, key: str) -> tuple[str, ...]:
    """The three triggers that log ``table``'s changes for the plant feed."""
    when = "WHEN EXISTS (SELECT 1 FROM plant_feed)"
    log = "INSERT INTO plant_changes (tbl, row_key)"
    return (
        f"CREATE TRIGGER plant_log_{table}_insert AFTER INSERT ON {table} {when} "
        f"BEGIN {log} VALUES ('{table}', NEW.{key}); END",
        f"CREATE TRIGGER plant_log_{table}_update AFTER UPDATE ON {table} {when} "
        f"BEGIN {log} SELECT '{table}', OLD.{key} WHERE OLD.{key} IS NOT NEW.{key}; "
        f"{log} VALUES ('{table}', NEW.{key}); END",
        f"CREATE TRIGGER plant_log_{table}_delete AFTER DELETE ON {table} {when} "
        f"BEGIN {log} VALUES ('{table}', OLD.{key}); END",
    )


_PLANT_FEED = sql_migration(
    "0009_plant_feed",
    """
    CREATE TABLE plant_feed (
        id INTEGER PRIMARY KEY CHECK (id = 1),
        ledger_id TEXT NOT NULL CHECK (length(ledger_id) = 36),
        started_at TEXT NOT NULL
    ) STRICT
    """,
    """
    CREATE TABLE plant_changes (
        seq INTEGER PRIMARY KEY,
        tbl TEXT NOT NULL CHECK (tbl <> ''),
        row_key ANY NOT NULL
    ) STRICT
    """,
    *(sql for table, key in _FED_AT_0009 for sql in plant_trigger_sql(table, key)),
)

# A channel the suspect-channel screen flagged (judge/channels.py): one open alert per
# channel at a time, with the evidence that raised it, until a person clears it.
_CHANNEL_ALERTS = sql_migration(
    "0010_channel_alerts",
    """
    CREATE TABLE channel_alerts (
        id INTEGER PRIMARY KEY,
        station TEXT NOT NULL,
        channel TEXT NOT NULL CHECK (channel <> ''),
        raised_at TEXT NOT NULL,
        cell_id TEXT NOT NULL,
        lot TEXT NOT NULL,
        evidence TEXT NOT NULL CHECK (evidence <> ''),
        advice TEXT NOT NULL,
        mail_id INTEGER REFERENCES outbox (id),
        cleared_at TEXT,
        cleared_by TEXT,
        cleared_why TEXT,
        CHECK ((cleared_at IS NULL) = (cleared_by IS NULL))
    ) STRICT
    """,
    "CREATE UNIQUE INDEX channel_alerts_open ON channel_alerts (station, channel) WHERE cleared_at IS NULL",
)

# The channel alerts go to the plant too: their triggers, and, on a ledger whose feed has
# started, the alerts already there logged to go.
_PLANT_CHANNEL_ALERTS = sql_migration(
    "0011_plant_feed_channel_alerts",
    *plant_trigger_sql("channel_alerts", "id"),
    """INSERT INTO plant_changes (tbl, row_key)
       SELECT 'channel_alerts', id FROM channel_alerts WHERE EXISTS (SELECT 1 FROM plant_feed)
       ORDER BY id""",
)

# Every table the plant feed forwards (its key), parents first: pipeline/ledger/plantlog.py
# logs them all when a feed starts, and pipeline/plant/tables.py says how each is forwarded.
FED_TABLES: tuple[tuple[str, str], ...] = (*_FED_AT_0009, ("channel_alerts", "id"))

MIGRATIONS: tuple[Migration, ...] = (
    _INITIAL, _RULE_TEXTS, _SET_ASIDE, _LOTS, _OUTBOX_CLAIMS, _REVIEWS, _REGRADE_TABLES,
    _CERTIFICATE_QUEUE, _PLANT_FEED, _CHANNEL_ALERTS, _PLANT_CHANNEL_ALERTS,
)
SCHEMA_VERSION = len(MIGRATIONS)
