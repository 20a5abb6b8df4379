"""The database schema as ordered migrations, versioned by ``PRAGMA user_version``.

To change the schema, append a :class:`Migration` with the next version number; never edit one
that has shipped. Each runs in its own transaction together with its ``user_version`` bump.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass

APPLICATION_ID = 0x506C6D62  # "Plmb" in the file header: tells our databases from others


@dataclass(frozen=True)
class Migration:
    """One step of the schema."""

    version: int
    description: str
    statements: tuple[str, ...]


def _append_only(table: str) -> tuple[str, ...]:
    return (
        f"CREATE TRIGGER {table}_no_update BEFORE UPDATE ON {table} "
        f"BEGIN SELECT RAISE(ABORT, '{table} are append-only'); END",
        f"CREATE TRIGGER {table}_no_delete BEFORE DELETE ON {table} "
        f"BEGIN SELECT RAISE(ABORT, '{table} are append-only'); END",
    )


_FILES_AND_OBSERVATIONS = (
    """CREATE TABLE passes (
        id INTEGER PRIMARY KEY,
        as_of TEXT NOT NULL,
        started_at TEXT NOT NULL,
        finished_at TEXT,
        status TEXT NOT NULL CHECK (status IN ('running', 'finished', 'failed', 'interrupted')),
        counts TEXT NOT NULL DEFAULT '{}'
    )""",
    """CREATE TABLE files (
        id INTEGER PRIMARY KEY,
        feed TEXT NOT NULL,
        name TEXT NOT NULL,
        sha256 TEXT NOT NULL,
        size INTEGER NOT NULL,
        received_at TEXT NOT NULL,
        pass_id INTEGER REFERENCES passes(id),
        outcome TEXT NOT NULL CHECK (outcome IN ('archived', 'rejected', 'empty', 'duplicate')),
        duplicate_of INTEGER REFERENCES files(id),
        rows_ingested INTEGER NOT NULL DEFAULT 0,
        rows_plan INTEGER NOT NULL DEFAULT 0,
        rows_rejected INTEGER NOT NULL DEFAULT 0,
        revisions INTEGER NOT NULL DEFAULT 0,
        unchanged INTEGER NOT NULL DEFAULT 0,
        stored_path TEXT NOT NULL,
        errors_text TEXT NOT NULL DEFAULT '',
        note TEXT NOT NULL DEFAULT '',
        moved_at TEXT
    )""",
    # The same bytes are ingested once: unique among the files whose rows were taken.
    "CREATE UNIQUE INDEX files_ingested_sha256 ON files(sha256) WHERE outcome = 'archived'",
    "CREATE INDEX files_by_sha256 ON files(sha256)",
    "CREATE INDEX files_awaiting_move ON files(feed) WHERE moved_at IS NULL",
    "CREATE INDEX files_by_pass ON files(pass_id)",
    "CREATE TRIGGER files_no_delete BEFORE DELETE ON files "
    "BEGIN SELECT RAISE(ABORT, 'files are never deleted'); END",
    """CREATE TABLE rejected_rows (
        file_id INTEGER NOT NULL REFERENCES files(id),
        line INTEGER NOT NULL,
        reason TEXT NOT NULL,
        cells TEXT NOT NULL,
        PRIMARY KEY (file_id, line)
    ) WITHOUT ROWID""",
    # One row per (feed, per: value); '' is the one series of a model without per:.
    """CREATE TABLE series (
        id INTEGER PRIMARY KEY,
        feed TEXT NOT NULL,
        key TEXT NOT NULL,
        UNIQUE (feed, key)
    )""",
    # The numeric columns of a feed in order of first appearance; observations.vals holds one
    # little-endian float64 per position known when the row was written (NaN = no value).
    """CREATE TABLE feed_columns (
        feed TEXT NOT NULL,
        position INTEGER NOT NULL,
        name TEXT NOT NULL,
        PRIMARY KEY (feed, position),
        UNIQUE (feed, name)
    )""",
    # A period's label as first written, for display.
    """CREATE TABLE periods (
        feed TEXT NOT NULL,
        period_key INTEGER NOT NULL,
        period TEXT NOT NULL,
        PRIMARY KEY (feed, period_key)
    ) WITHOUT ROWID""",
    """CREATE TABLE observations (
        id INTEGER PRIMARY KEY,
        series_id INTEGER NOT NULL REFERENCES series(id),
        period TEXT NOT NULL,
        period_key INTEGER NOT NULL,
        is_plan INTEGER NOT NULL CHECK (is_plan IN (0, 1)),
        revision INTEGER NOT NULL,
        current INTEGER NOT NULL CHECK (current IN (0, 1)),
        vals BLOB NOT NULL,
        file_id INTEGER NOT NULL REFERENCES files(id),
        line INTEGER NOT NULL
    )""",
    # One current actual and one open plan row per key; these also serve the reads.
    "CREATE UNIQUE INDEX observations_current_actual ON observations(series_id, period_key) "
    "WHERE is_plan = 0 AND current = 1",
    "CREATE UNIQUE INDEX observations_open_plan ON observations(series_id, period_key) "
    "WHERE is_plan = 1 AND current = 1",
    "CREATE TRIGGER observations_no_delete BEFORE DELETE ON observations "
    "BEGIN SELECT RAISE(ABORT, 'observations are append-only'); END",
    # A revision retires the row it replaces (current 1 -> 0); nothing else ever changes.
    """CREATE TRIGGER observations_only_retire BEFORE UPDATE ON observations
        WHEN NEW.id IS NOT OLD.id OR NEW.series_id IS NOT OLD.series_id
          OR NEW.period IS NOT OLD.period OR NEW.period_key IS NOT OLD.period_key
          OR NEW.is_plan IS NOT OLD.is_plan OR NEW.revision IS NOT OLD.revision
          OR NEW.vals IS NOT OLD.vals OR NEW.file_id IS NOT OLD.file_id
          OR NEW.line IS NOT OLD.line OR NOT (OLD.current = 1 AND NEW.current = 0)
        BEGIN SELECT RAISE(ABORT, 'observations are append-only'); END""",
)

_MODELS_FITS_FORECASTS = (
    """CREATE TABLE model_versions (
        model TEXT NOT NULL,
        version INTEGER NOT NULL,
        signature TEXT NOT NULL,
        config TEXT NOT NULL,
        created_at TEXT NOT NULL,
        PRIMARY KEY (model, version)
    )""",
    """CREATE TABLE fits (
        id INTEGER PRIMARY KEY,
        pass_id INTEGER NOT NULL REFERENCES passes(id),
        model TEXT NOT NULL,
        version INTEGER NOT NULL,
        series_key TEXT NOT NULL,
        window_first TEXT,
        window_first_key INTEGER,
        window_last TEXT,
        window_last_key INTEGER,
        n INTEGER NOT NULL,
        estimable INTEGER NOT NULL CHECK (estimable IN (0, 1)),
        reason TEXT,
        coefficients TEXT NOT NULL,
        inference TEXT NOT NULL,
        diagnostics TEXT NOT NULL,
        FOREIGN KEY (model, version) REFERENCES model_versions(model, version),
        UNIQUE (pass_id, model, series_key)
    )""",
    "CREATE INDEX fits_by_series ON fits(model, series_key, id)",
    """CREATE TABLE forecasts (
        id INTEGER PRIMARY KEY,
        pass_id INTEGER NOT NULL REFERENCES passes(id),
        fit_id INTEGER REFERENCES fits(id),
        model TEXT NOT NULL,
        version INTEGER,
        feed TEXT NOT NULL,
        series_key TEXT NOT NULL,
        target_period TEXT NOT NULL,
        target_period_key INTEGER NOT NULL,
        observation_id INTEGER REFERENCES observations(id),
        issued_at TEXT NOT NULL,
        lead INTEGER NOT NULL,
        inputs TEXT NOT NULL,
        point REAL NOT NULL,
        mean_lower REAL,
        mean_upper REAL,
        lower REAL NOT NULL,
        upper REAL NOT NULL,
        level REAL NOT NULL CHECK (level > 0 AND level < 1),
        leverage REAL,
        extrapolation INTEGER NOT NULL CHECK (extrapolation IN (0, 1)),
        UNIQUE (pass_id, model, series_key, target_period_key)
    )""",
    "CREATE INDEX forecasts_by_target ON forecasts(model, series_key, target_period_key)",
    "CREATE INDEX forecasts_by_plan_row ON forecasts(observation_id, model)",
    *_append_only("forecasts"),
    """CREATE TABLE outcomes (
        id INTEGER PRIMARY KEY,
        forecast_id INTEGER NOT NULL UNIQUE REFERENCES forecasts(id),
        actual REAL NOT NULL,
        outcome TEXT NOT NULL CHECK (outcome IN ('hit', 'miss_high', 'miss_low')),
        pass_id INTEGER NOT NULL REFERENCES passes(id)
    )""",
    *_append_only("outcomes"),
    """CREATE TABLE baselines (
        id INTEGER PRIMARY KEY,
        model TEXT NOT NULL,
        version INTEGER NOT NULL,
        series_key TEXT NOT NULL,
        start_period TEXT NOT NULL,
        start_key INTEGER NOT NULL,
        end_period TEXT NOT NULL,
        end_key INTEGER NOT NULL,
        set_by TEXT NOT NULL CHECK (set_by IN ('auto', 'declared', 'rolled', 'rebaseline')),
        monitoring_start TEXT,
        monitoring_start_key INTEGER,
        created_at TEXT NOT NULL,
        pass_id INTEGER REFERENCES passes(id)
    )""",
    "CREATE INDEX baselines_by_series ON baselines(model, version, series_key, id)",
)

_FINDINGS_DIGESTS_OUTBOX = (
    """CREATE TABLE findings (
        id INTEGER PRIMARY KEY,
        model TEXT,
        series_key TEXT NOT NULL,
        feed TEXT,
        kind TEXT NOT NULL,
        severity TEXT NOT NULL CHECK (severity IN ('notice', 'warning', 'critical')),
        state TEXT NOT NULL CHECK (state IN ('new', 'ongoing', 'cleared')),
        since_period TEXT,
        statistic REAL,
        p_value REAL,
        message TEXT NOT NULL,
        action TEXT NOT NULL,
        first_pass_id INTEGER NOT NULL REFERENCES passes(id),
        last_pass_id INTEGER NOT NULL REFERENCES passes(id),
        false_streak INTEGER NOT NULL DEFAULT 0,
        last_false_pass_id INTEGER,
        created_at TEXT NOT NULL,
        updated_at TEXT NOT NULL,
        acknowledged_at TEXT,
        cleared_at TEXT,
        cleared_pass_id INTEGER REFERENCES passes(id),
        CHECK (model IS NOT NULL OR feed IS NOT NULL)
    )""",
    # At most one open finding per (model, series, kind), or per (feed, kind) for a feed-level
    # finding (model NULL).
    "CREATE UNIQUE INDEX findings_one_open ON findings(ifnull(model, ''), series_key, "
    "CASE WHEN model IS NULL THEN feed ELSE '' END, kind) WHERE state <> 'cleared'",
    "CREATE INDEX findings_by_scope ON findings(model, series_key, kind, id)",
    "CREATE INDEX findings_by_pass ON findings(first_pass_id)",
    """CREATE TABLE digests (
        id INTEGER PRIMARY KEY,
        period_end TEXT NOT NULL UNIQUE,
        created_at TEXT NOT NULL,
        pass_id INTEGER REFERENCES passes(id),
        path TEXT
    )""",
    """CREATE TABLE outbox (
        id INTEGER PRIMARY KEY,
        kind TEXT NOT NULL CHECK (kind IN ('pass', 'digest')),
        dedupe_key TEXT NOT NULL UNIQUE,
        recipients TEXT NOT NULL,
        subject TEXT NOT NULL,
        body BLOB NOT NULL,
        created_at TEXT NOT NULL,
        pass_id INTEGER REFERENCES passes(id),
        attempts INTEGER NOT NULL DEFAULT 0,
        next_attempt_at TEXT NOT NULL,
        last_error TEXT,
        sent_at TEXT
    )""",
    "CREATE INDEX outbox_due ON outbox(next_attempt_at) WHERE sent_at IS NULL",
)

# The calibrated interval issued beside the model's own (``interval_method: calibrated``): its
# bounds and the factor q that scaled the model's half-width (monitor/stats/conformal.py). NULL
# for a model that does not issue one and during a series' warm-up.
_CALIBRATED_INTERVALS = (
    "ALTER TABLE forecasts ADD COLUMN calibrated_lower REAL",
    "ALTER TABLE forecasts ADD COLUMN calibrated_upper REAL",
    "ALTER TABLE forecasts ADD COLUMN calibrated_factor REAL",
)

# An owner's notes on a finding (``plumbline note``): who, when, why; the history is kept, so the
# table is append-only. A note stops the finding's messages; ``findings.acknowledged_at`` keeps
# the moment of its first note (the column's old name stays: renaming it would touch every
# reader). A finding acknowledged before notes existed gets one note saying so.
_FINDING_NOTES = (
    """CREATE TABLE finding_notes (
        id INTEGER PRIMARY KEY,
        finding_id INTEGER NOT NULL REFERENCES findings(id),
        noted_at TEXT NOT NULL,
        noted_by TEXT NOT NULL,
        text TEXT NOT NULL
    )""",
    "CREATE INDEX finding_notes_by_finding ON finding_notes(finding_id, id)",
    "INSERT INTO finding_notes (finding_id, noted_at, noted_by, text) "
    "SELECT id, acknowledged_at, 'unknown', 'acknowledged (before notes were kept)' "
    "FROM findings WHERE acknowledged_at IS NOT NULL ORDER BY id",
    *_append_only("finding_notes"),
)

_PER_FEED_DUPLICATES_AND_IDENTITY = (
    # Duplicates are judged per feed: the same bytes dropped into two feeds are two deliveries.
    "DROP INDEX files_ingested_sha256",
    "CREATE UNIQUE INDEX files_ingested_sha256 ON files(feed, sha256) WHERE outcome = 'archived'",
    # A random identity made when the database is created, mixed into every Message-ID with the
    # moment of composing, so two instances, a restore or a rebuilt database never reuse one.
    """CREATE TABLE database_identity (
        id INTEGER PRIMARY KEY CHECK (id = 1),
        token TEXT NOT NULL
    )""",
    "INSERT INTO database_identity (id, token) VALUES (1, lower(hex(randomblob(16))))",
)

_OUTCOMES_BY_PASS = (
    # Which series a pass (or the passes since the last finished one) scored: read by every
    # pass for every model. Without it SQLite walked every forecast the model ever issued (2.3 s
    # at 10,000 series × 156 weeks, growing with the history) to find this week's outcomes.
    "CREATE INDEX outcomes_by_pass ON outcomes(pass_id)",
)

_UNSCORED_FORECASTS = (
    # The forecasts not scored yet, kept by triggers as forecasts and outcomes are written (both
    # append-only), so that every pass finds what to score among these few instead of walking
    # every forecast a model ever issued for the ones without an outcome (1.4 s at 10,000
    # series × 156 weeks, growing each week). The triggers fire only for rows really inserted
    # (``ON CONFLICT DO NOTHING`` inserts none), in the writing transaction.
    """CREATE TABLE unscored_forecasts (
        forecast_id INTEGER PRIMARY KEY REFERENCES forecasts(id),
        model TEXT NOT NULL
    )""",
    "CREATE INDEX unscored_forecasts_by_model ON unscored_forecasts(model)",
    "INSERT INTO unscored_forecasts (forecast_id, model) SELECT f.id, f.model FROM forecasts AS f "
    "WHERE NOT EXISTS (SELECT 1 FROM outcomes AS o WHERE o.forecast_id = f.id)",
    "CREATE TRIGGER forecasts_await_outcome AFTER INSERT ON forecasts BEGIN "
    "INSERT INTO unscored_forecasts (forecast_id, model) VALUES (NEW.id, NEW.model); END",
    "CREATE TRIGGER outcomes_scored AFTER INSERT ON outcomes BEGIN "
    "DELETE FROM unscored_forecasts WHERE forecast_id = NEW.forecast_id; END",
)

_FORECAST_RESIDUAL_DF = (
    # Each forecast's fit's residual degrees of freedom beside it (NULL without a fit): the
    # coverage chart scores every scored forecast of a series' latest horizon with it each pass,
    # and reading it out of the fit's inference JSON row by row was 6 s of the 21 s that read
    # took at 10,000 series × 156 weeks. The rows written before get it from their fit, as the
    # reads did; forecasts stay append-only (the trigger is set aside for that one update).
    "DROP TRIGGER forecasts_no_update",
    "ALTER TABLE forecasts ADD COLUMN residual_df REAL",
    "UPDATE forecasts SET residual_df = (SELECT json_extract(fi.inference, '$.residual_df') "
    "FROM fits AS fi WHERE fi.id = forecasts.fit_id) WHERE fit_id IS NOT NULL",
    _append_only("forecasts")[0],
)

MIGRATIONS: tuple[Migration, ...] = (
    Migration(1, "passes, files, rejected rows, series, observations", _FILES_AND_OBSERVATIONS),
    Migration(2, "model versions, fits, forecasts, outcomes, baselines", _MODELS_FITS_FORECASTS),
    Migration(3, "findings, digests, the outbox", _FINDINGS_DIGESTS_OUTBOX),
    Migration(4, "calibrated intervals beside forecasts", _CALIBRATED_INTERVALS),
    Migration(5, "owners' notes on findings", _FINDING_NOTES),
    Migration(6, "duplicate files per feed; the database's random identity",
              _PER_FEED_DUPLICATES_AND_IDENTITY),
    Migration(7, "outcomes found by the pass that scored them", _OUTCOMES_BY_PASS),
    Migration(8, "the forecasts not scored yet", _UNSCORED_FORECASTS),
    Migration(9, "each forecast's residual degrees of freedom", _FORECAST_RESIDUAL_DF),
)
SCHEMA_VERSION = MIGRATIONS[-1].version


def apply_migrations(conn: sqlite3.Connection, target: int = SCHEMA_VERSION) -> int:
    """Bring the database at ``conn`` up to schema ``target``; returns the version it had.

    Each migration and its ``user_version`` bump commit together, so a crash leaves the database
    at one version or the next, never between. ``conn`` must be in autocommit mode
    (``isolation_level=None``).
    """
    if conn.isolation_level is not None:
        raise ValueError("apply_migrations needs a connection opened with isolation_level=None")
    start = int(conn.execute("PRAGMA user_version").fetchone()[0])
    if start >= target:
        return start  # the usual case: no write lock needed
    by_version = {migration.version: migration for migration in MIGRATIONS}
    while True:
        conn.execute("BEGIN IMMEDIATE")
        try:
            # Read again under the write lock: another process may have migrated meanwhile.
            version = int(conn.execute("PRAGMA user_version").fetchone()[0])
            if version >= target:
                conn.execute("COMMIT")
                return start
            migration = by_version[version + 1]
            for statement in migration.statements:
                conn.execute(statement)
            conn.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            conn.execute(f"PRAGMA user_version = {migration.version}")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
        conn.execute("COMMIT")


__all__ = ["APPLICATION_ID", "MIGRATIONS", "SCHEMA_VERSION", "Migration", "apply_migrations"]
