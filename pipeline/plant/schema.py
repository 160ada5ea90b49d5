"""The plant database's schema as an ordered list of named migrations, and the code that applies them.

Like the ledger's (pipeline/ledger/migrate.py): each migration runs in one transaction
with the row that records it in ``formgate.migrations``, so the database is always at one
migration boundary; a database that knows migrations this code does not is refused. Two
stations that start at once against a new database take turns (a transaction-level
advisory lock). Every table is in the schema ``formgate``.

The forwarded tables mirror the ledger's: the same columns under the same names, with
PostgreSQL's own types (``timestamptz`` for times, ``jsonb`` for JSON, ``bigint`` ids,
``double precision`` values), the ledger's CHECK constraints, a primary key of the station's
id and the ledger's row id, and ``row_sha256``, the hash of the row's fixed columns as the
station forwarded it (tables.py). Rows are only ever added by a feed; the columns a station
changes in place (tables.py, ``changing``) are the only ones it updates. What the plant
decides itself (a cell whose stages ran at two stations) is in ``plant_decisions``.
Connecting is connect.py's job; forwarding, feed.py's.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import psycopg

from pipeline.errors import FormgateError
from pipeline.plant.tables import SCHEMA

# any fixed number: the key of the advisory lock migrations take
_MIGRATION_LOCK = 0x46474C47


class PlantError(FormgateError):
    """A plant database that cannot be used as it is (a newer schema, a foreign database)."""


@dataclass(frozen=True, slots=True)
class PlantMigration:
    name: str
    statements: tuple[str, ...]


_SHA = "CHECK ({0} ~ '^[0-9a-f]{{64}}$')"
_STATES = "'claimed', 'judged', 'published', 'archived', 'quarantined', 'duplicate'"
_STATION = "station_id text NOT NULL REFERENCES formgate.stations (station_id)"
_FED = "row_sha256 text NOT NULL CHECK (row_sha256 ~ '^[0-9a-f]{64}$'), " \
       "forwarded_at timestamptz NOT NULL DEFAULT now()"

_INITIAL = PlantMigration("0001_initial", (
    """
    CREATE TABLE formgate.stations (
        station_id text PRIMARY KEY CHECK (station_id <> '' AND length(station_id) <= 256),
        ledger_id uuid NOT NULL UNIQUE,
        first_fed_at timestamptz NOT NULL DEFAULT now(),
        last_fed_at timestamptz NOT NULL DEFAULT now()
    )
    """,
    f"""
    CREATE TABLE formgate.rule_texts (
        sha256 text PRIMARY KEY {_SHA.format('sha256')},
        kind text NOT NULL CHECK (kind IN ('rule_set', 'profile')),
        name text NOT NULL,
        text text NOT NULL,
        first_used_at timestamptz NOT NULL,
        {_STATION},
        {_FED},
        -- the key is the text's own hash: the plant checks it
        CHECK (encode(sha256(convert_to(text, 'UTF8')), 'hex') = sha256)
    )
    """,
    f"""
    CREATE TABLE formgate.inputs (
        {_STATION},
        id bigint NOT NULL,
        sha256 text NOT NULL {_SHA.format('sha256')},
        name text NOT NULL CHECK (name <> ''),
        size bigint NOT NULL CHECK (size >= 0),
        arrived_at timestamptz NOT NULL,
        work_path text NOT NULL,
        state text NOT NULL CHECK (state IN ({_STATES})),
        final_path text,
        final_at timestamptz,
        reason text,
        version integer NOT NULL CHECK (version >= 1),
        supersedes bigint,
        duplicate_of bigint,
        {_FED},
        PRIMARY KEY (station_id, id),
        CHECK ((final_path IS NULL) = (final_at IS NULL)),
        CHECK ((state = 'duplicate') = (duplicate_of IS NOT NULL)),
        CHECK (state NOT IN ('archived', 'quarantined') OR final_path IS NOT NULL),
        CHECK (supersedes IS NULL OR supersedes < id),
        CHECK (duplicate_of IS NULL OR duplicate_of < id)
    )
    """,
    "CREATE INDEX inputs_by_sha256 ON formgate.inputs (sha256)",
    f"""
    CREATE TABLE formgate.regrades (
        {_STATION},
        id bigint NOT NULL,
        started_at timestamptz NOT NULL,
        finished_at timestamptz,
        run_by text NOT NULL CHECK (run_by <> ''),
        reason text NOT NULL CHECK (trim(reason) <> ''),
        rules_digest text NOT NULL CHECK (length(rules_digest) = 64),
        rule_sets jsonb NOT NULL CHECK (jsonb_typeof(rule_sets) = 'array'),
        selection text NOT NULL,
        summary jsonb NOT NULL CHECK (jsonb_typeof(summary) = 'object'),
        {_FED},
        PRIMARY KEY (station_id, id)
    )
    """,
    f"""
    CREATE TABLE formgate.results (
        {_STATION},
        id bigint NOT NULL,
        input_id bigint NOT NULL,
        cell_id text NOT NULL,
        lot text NOT NULL,
        verdict text NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold', 'error')),
        hazards jsonb NOT NULL CHECK (jsonb_typeof(hazards) = 'array'),
        result_json jsonb NOT NULL,
        rule_set_name text NOT NULL,
        rule_set_revision text NOT NULL,
        rule_set_sha256 text NOT NULL,
        analysed_at timestamptz NOT NULL,
        json_path text NOT NULL,
        pdf_path text,
        superseded_by bigint,
        digest_mail_id bigint,
        regrade_id bigint,
        {_FED},
        PRIMARY KEY (station_id, id),
        FOREIGN KEY (station_id, input_id) REFERENCES formgate.inputs (station_id, id),
        CHECK (superseded_by IS NULL OR superseded_by <> id),
        CHECK (digest_mail_id IS NULL OR verdict = 'pass')
    )
    """,
    "CREATE INDEX results_by_cell ON formgate.results (cell_id, lot)",
    "CREATE INDEX results_by_lot ON formgate.results (lot, cell_id)",
    "CREATE INDEX results_by_input ON formgate.results (station_id, input_id)",
    f"""
    CREATE TABLE formgate.checks (
        {_STATION},
        id bigint NOT NULL,
        result_id bigint NOT NULL,
        position integer NOT NULL,
        rule_id text NOT NULL CHECK (rule_id <> ''),
        metric text NOT NULL CHECK (metric <> ''),
        value double precision,
        low double precision,
        high double precision,
        outcome text NOT NULL CHECK (outcome IN ('in_window', 'out_of_window', 'not_judged', 'skipped')),
        severity text NOT NULL CHECK (severity IN ('reject', 'review')),
        hazard text CHECK (hazard IS NULL OR hazard <> ''),
        {_FED},
        PRIMARY KEY (station_id, id),
        UNIQUE (station_id, result_id, position),
        FOREIGN KEY (station_id, result_id) REFERENCES formgate.results (station_id, id)
    )
    """,
    f"""
    CREATE TABLE formgate.readings (
        {_STATION},
        id bigint NOT NULL,
        input_id bigint NOT NULL,
        cell_id text NOT NULL CHECK (cell_id <> ''),
        lot text NOT NULL,
        cell_type text,
        at timestamptz NOT NULL,
        ocv_v double precision NOT NULL,
        acir_mohm double precision,
        temperature_c double precision,
        line integer NOT NULL CHECK (line >= 1),
        {_FED},
        PRIMARY KEY (station_id, id),
        UNIQUE (station_id, input_id, line),
        FOREIGN KEY (station_id, input_id) REFERENCES formgate.inputs (station_id, id)
    )
    """,
    "CREATE INDEX readings_by_cell ON formgate.readings (cell_id, lot)",
    f"""
    CREATE TABLE formgate.reviews (
        {_STATION},
        id bigint NOT NULL,
        cell_id text NOT NULL CHECK (cell_id <> ''),
        lot text NOT NULL,
        action text NOT NULL CHECK (action IN ('release', 'reject', 'retest')),
        stage text CHECK ((stage IS NULL) = (action <> 'retest')),
        accepts jsonb NOT NULL CHECK (jsonb_typeof(accepts) = 'array'),
        reviewer text NOT NULL CHECK (reviewer <> ''),
        reason text NOT NULL CHECK (trim(reason) <> ''),
        reviewed_at timestamptz NOT NULL,
        decision_id bigint NOT NULL,
        prev_hash text,
        row_hash text,
        {_FED},
        PRIMARY KEY (station_id, id),
        UNIQUE (station_id, row_hash)
    )
    """,
    f"""
    CREATE TABLE formgate.decisions (
        {_STATION},
        id bigint NOT NULL,
        cell_id text NOT NULL CHECK (cell_id <> ''),
        lot text NOT NULL,
        verdict text NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold')),
        reason text NOT NULL,
        hazards jsonb NOT NULL CHECK (jsonb_typeof(hazards) = 'array'),
        grade text,
        cause text NOT NULL
            CHECK (cause IN ('record', 'readings', 'lot closed', 'rules', 'review', 'regrade')),
        basis jsonb NOT NULL CHECK (jsonb_typeof(basis) = 'array'),
        decided_at timestamptz NOT NULL,
        supersedes bigint,
        review_id bigint,
        prev_hash text,
        row_hash text,
        {_FED},
        PRIMARY KEY (station_id, id),
        UNIQUE (station_id, row_hash),
        CHECK (supersedes IS NULL OR supersedes < id),
        CHECK (grade IS NULL OR verdict = 'pass'),
        CHECK ((review_id IS NULL) = (cause <> 'review'))
    )
    """,
    "CREATE INDEX decisions_by_cell ON formgate.decisions (cell_id, lot, station_id, id)",
    f"""
    CREATE TABLE formgate.lots (
        {_STATION},
        lot text NOT NULL,
        closed_at timestamptz NOT NULL,
        closed_by text NOT NULL CHECK (closed_by <> ''),
        report_path text,
        export_path text,
        {_FED},
        PRIMARY KEY (station_id, lot)
    )
    """,
    f"""
    CREATE TABLE formgate.set_aside (
        {_STATION},
        id bigint NOT NULL,
        inbox text NOT NULL,
        name text NOT NULL CHECK (name <> ''),
        kind text NOT NULL
            CHECK (kind IN ('file', 'folder', 'symlink', 'fifo', 'socket', 'device', 'marker')),
        reason text NOT NULL CHECK (reason <> ''),
        noticed_at timestamptz NOT NULL,
        state text NOT NULL CHECK (state IN ('quarantined', 'left_in_place')),
        final_path text,
        {_FED},
        PRIMARY KEY (station_id, id),
        CHECK ((state = 'quarantined') = (final_path IS NOT NULL))
    )
    """,
    f"""
    CREATE TABLE formgate.published (
        {_STATION},
        id bigint NOT NULL,
        path text NOT NULL CHECK (path <> ''),
        sha256 text NOT NULL {_SHA.format('sha256')},
        kind text NOT NULL,
        lot text,
        cell_id text,
        result_id bigint,
        decision_id bigint,
        published_at timestamptz NOT NULL,
        {_FED},
        PRIMARY KEY (station_id, id)
    )
    """,
    "CREATE INDEX published_by_sha ON formgate.published (sha256)",
    # What the plant decides itself: a cell whose records are at more than one station,
    # decided over all of them by the station's own pure logic, under the rule set (kept by
    # its SHA-256) its latest record names. A new decision points at the one it supersedes.
    """
    CREATE TABLE formgate.plant_decisions (
        id bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
        cell_id text NOT NULL CHECK (cell_id <> ''),
        lot text NOT NULL,
        verdict text NOT NULL CHECK (verdict IN ('pass', 'fail', 'hold')),
        reason text NOT NULL,
        hazards jsonb NOT NULL CHECK (jsonb_typeof(hazards) = 'array'),
        stations jsonb NOT NULL CHECK (jsonb_typeof(stations) = 'array'),
        basis jsonb NOT NULL CHECK (jsonb_typeof(basis) = 'array'),
        rule_set_sha256 text NOT NULL REFERENCES formgate.rule_texts (sha256),
        decided_by text NOT NULL CHECK (decided_by <> ''),
        decided_at timestamptz NOT NULL,
        supersedes bigint REFERENCES formgate.plant_decisions (id),
        CHECK (supersedes IS NULL OR supersedes < id)
    )
    """,
    "CREATE INDEX plant_decisions_by_cell ON formgate.plant_decisions (cell_id, lot, id)",
))

# A suspect channel flagged at a station (its ledger's channel_alerts), until a person clears it.
_CHANNEL_ALERTS = PlantMigration("0002_channel_alerts", (
    f"""
    CREATE TABLE formgate.channel_alerts (
        {_STATION},
        id bigint NOT NULL,
        station text NOT NULL,
        channel text NOT NULL CHECK (channel <> ''),
        raised_at timestamptz NOT NULL,
        cell_id text NOT NULL,
        lot text NOT NULL,
        evidence text NOT NULL CHECK (evidence <> ''),
        advice text NOT NULL,
        mail_id bigint,
        cleared_at timestamptz,
        cleared_by text,
        cleared_why text,
        {_FED},
        PRIMARY KEY (station_id, id),
        CHECK ((cleared_at IS NULL) = (cleared_by IS NULL))
    )
    """,
    "CREATE INDEX channel_alerts_open ON formgate.channel_alerts (station_id, channel) "
    "WHERE cleared_at IS NULL",
))

# A person's review of a cell the plant decides (release, reject, retest of a stage): the
# decision it answered and the files that decision rested on (``seen``, [name, SHA-256]
# pairs: a review stands until a file it did not see counts for the cell), and the plant
# decision it gives, which names it.
_PLANT_REVIEWS = PlantMigration("0003_plant_reviews", (
    """
    CREATE TABLE formgate.plant_reviews (
        id bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
        cell_id text NOT NULL CHECK (cell_id <> ''),
        lot text NOT NULL,
        action text NOT NULL CHECK (action IN ('release', 'reject', 'retest')),
        stage text CHECK ((stage IS NULL) = (action <> 'retest')),
        accepts jsonb NOT NULL CHECK (jsonb_typeof(accepts) = 'array'),
        reviewer text NOT NULL CHECK (reviewer <> ''),
        reason text NOT NULL CHECK (trim(reason) <> ''),
        reviewed_at timestamptz NOT NULL,
        answers bigint NOT NULL REFERENCES formgate.plant_decisions (id),
        seen jsonb NOT NULL CHECK (jsonb_typeof(seen) = 'array'),
        recorded_by text NOT NULL CHECK (recorded_by <> '')
    )
    """,
    "CREATE INDEX plant_reviews_by_cell ON formgate.plant_reviews (cell_id, lot, id)",
    "ALTER TABLE formgate.plant_decisions ADD COLUMN review_id bigint "
    "REFERENCES formgate.plant_reviews (id)",
))

# Each letter a plant command sent for a plant decision (letters.py): one row per decision and
# kind of letter, added in the transaction that sent it, so a letter goes out once.
_PLANT_LETTERS = PlantMigration("0004_plant_letters", (
    """
    CREATE TABLE formgate.plant_letters (
        decision_id bigint NOT NULL REFERENCES formgate.plant_decisions (id),
        kind text NOT NULL CHECK (kind IN ('decision', 'update', 'review')),
        message_id text NOT NULL UNIQUE CHECK (message_id ~ '^<[^<>@ ]+@[^<>@ ]+>$'),
        recipients jsonb NOT NULL CHECK (jsonb_typeof(recipients) = 'array'),
        subject text NOT NULL,
        reply text NOT NULL,
        sent_by text NOT NULL CHECK (sent_by <> ''),
        sent_at timestamptz NOT NULL,
        PRIMARY KEY (decision_id, kind)
    )
    """,
))

# Row-level security: a station's role adds and changes rows only under the station ids it
# feeds. ``stations.role_name`` names the role that feeds each station (the role that first
# registered it; the owner sets it for stations registered before this migration, which are
# refused until then). Every role reads every row; a table's owner (and a superuser) is not
# held by these policies, so migrations and the owner's repairs work as before. The list of
# tables is this migration's own: a later table gets its policies in its own migration.
_STATION_TABLES = ("rule_texts", "inputs", "regrades", "results", "checks", "readings",
                   "reviews", "decisions", "lots", "set_aside", "published", "channel_alerts")


def _own_rows(table: str) -> tuple[str, ...]:
    return (
        f"ALTER TABLE formgate.{table} ENABLE ROW LEVEL SECURITY",
        f"CREATE POLICY read_all ON formgate.{table} FOR SELECT USING (true)",
        f"CREATE POLICY add_own ON formgate.{table} FOR INSERT "
        "WITH CHECK (formgate.feeds(station_id))",
        f"CREATE POLICY change_own ON formgate.{table} FOR UPDATE "
        "USING (formgate.feeds(station_id)) WITH CHECK (formgate.feeds(station_id))",
    )


_STATION_ROWS = PlantMigration("0005_station_rows", (
    "ALTER TABLE formgate.stations ADD COLUMN role_name text "
    "CHECK (role_name IS NULL OR role_name <> '')",
    "ALTER TABLE formgate.stations ALTER COLUMN role_name SET DEFAULT current_user",
    """
    CREATE FUNCTION formgate.feeds(station text) RETURNS boolean
    LANGUAGE sql STABLE AS $$
        SELECT EXISTS (SELECT 1 FROM formgate.stations s
                       WHERE s.station_id = station AND s.role_name = current_user)
    $$
    """,
    "ALTER TABLE formgate.stations ENABLE ROW LEVEL SECURITY",
    "CREATE POLICY read_all ON formgate.stations FOR SELECT USING (true)",
    "CREATE POLICY add_own ON formgate.stations FOR INSERT WITH CHECK (role_name = current_user)",
    "CREATE POLICY change_own ON formgate.stations FOR UPDATE USING (role_name = current_user) "
    "WITH CHECK (role_name = current_user)",
    *(statement for table in _STATION_TABLES for statement in _own_rows(table)),
))

PLANT_MIGRATIONS: tuple[PlantMigration, ...] = (
    _INITIAL, _CHANNEL_ALERTS, _PLANT_REVIEWS, _PLANT_LETTERS, _STATION_ROWS,
)
PLANT_SCHEMA_VERSION = len(PLANT_MIGRATIONS)

_BOOTSTRAP = (
    f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}",
    f"""CREATE TABLE IF NOT EXISTS {SCHEMA}.migrations (
        id integer PRIMARY KEY,
        name text NOT NULL UNIQUE,
        applied_at timestamptz NOT NULL DEFAULT now()
    )""",
)


def applied(conn: psycopg.Connection[tuple[object, ...]]) -> list[str]:
    """The names of the migrations the database records, oldest first ([] for a new one)."""
    row = conn.execute("SELECT to_regclass(%s)", (f"{SCHEMA}.migrations",)).fetchone()
    if row is None or row[0] is None:
        return []
    return [str(r[0]) for r in conn.execute(f"SELECT name FROM {SCHEMA}.migrations ORDER BY id")]


def _check_known(names: Sequence[str], known: Sequence[str], where: str) -> None:
    newer = [n for n in names if n not in known]
    if newer or list(names) != list(known[: len(names)]):
        raise PlantError(
            f"the plant database {where} was set up by a newer formgate (migrations this "
            f"formgate does not know: {', '.join(newer) or ', '.join(names)})",
            None,
            "Run the newer formgate at this station too; a plant database is never downgraded.",
        )


def check_schema(conn: psycopg.Connection[tuple[object, ...]], *, where: str) -> int:
    """How many migrations are missing (0: up to date). Raises PlantError for a newer schema."""
    names = applied(conn)
    conn.rollback()
    _check_known(names, [m.name for m in PLANT_MIGRATIONS], where)
    return len(PLANT_MIGRATIONS) - len(names)


def migrate(
    conn: psycopg.Connection[tuple[object, ...]],
    migrations: Sequence[PlantMigration] = PLANT_MIGRATIONS,
    *,
    where: str,
) -> list[str]:
    """Apply the pending migrations, one transaction each; return the names applied.

    Needs a role that may create the schema and its tables (docs/plant.md); a station's
    own role, which may not, gets a PlantError that says to run ``formgate plant migrate``.
    """
    known = [m.name for m in migrations]
    done: list[str] = []
    while True:
        try:
            with conn.transaction():
                conn.execute("SELECT pg_advisory_xact_lock(%s)", (_MIGRATION_LOCK,))
                names = applied(conn)
                _check_known(names, known, where)
                if len(names) == len(migrations):
                    return done
                for statement in _BOOTSTRAP:  # only when there is work: it needs the right
                    conn.execute(statement)
                step = migrations[len(names)]
                for statement in step.statements:
                    conn.execute(statement)  # our own text, no input
                conn.execute(
                    f"INSERT INTO {SCHEMA}.migrations (id, name) VALUES (%s, %s)",
                    (len(names) + 1, step.name),
                )
        except psycopg.errors.InsufficientPrivilege as exc:
            raise PlantError(
                f"the plant database {where} needs its schema set up, and this role may not "
                f"({exc.diag.message_primary})",
                None,
                "Run `formgate plant migrate --database URL` once as the role that owns the "
                "plant's schema (docs/plant.md).",
            ) from exc
        done.append(step.name)
