"""The store's schema: every table, view and migration, and the tables rebuilt with
the statistics layout.

Migrations are append-only: never edit what a released migration does; add a new one.
Views that carry a shared rule (which outcome counts for a decision) are written from
that rule's owner in ``monitor.store.rules``; changing such a rule needs a new
migration that re-creates the view.  Temporary staging tables of the ingest live here
too, so that no module outside ``monitor.store`` writes DDL.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping
from typing import Any, Protocol

import duckdb

from monitor import __version__
from monitor.errors import UserError
from monitor.store.rules import (
    CURRENT_VERSION,
    current_outcome_rows_sql,
    quote_ident,
    utc_now,
)

# The table that records which migrations a store has had.  Stores made before it had
# this name kept the list as ``schema_migrations``: ``init`` (and any writer that checks
# the store) renames that table, history and all; until then readers read it there.
SCHEMA_VERSION_TABLE = "store_versions"
FORMER_VERSION_TABLE = "schema_migrations"


class StoreMismatch(UserError):
    """The store's layout disagrees with the configuration (a user error)."""


# Each entry is (version, description, statements).  Append only: never edit a
# released migration, add a new one.
MIGRATIONS: list[tuple[int, str, list[str]]] = [
    (
        1,
        "decisions, outcomes, batches, quarantine, runs and the analysts' view",
        [
            "CREATE SEQUENCE batch_ids START 1",
            """CREATE TABLE batches (
                batch_id BIGINT PRIMARY KEY,
                kind VARCHAR NOT NULL,
                path VARCHAR NOT NULL,
                sha256 VARCHAR NOT NULL,
                size_bytes BIGINT NOT NULL,
                format VARCHAR NOT NULL,
                rows_read BIGINT,
                rows_accepted BIGINT,
                rows_quarantined BIGINT,
                rows_duplicate BIGINT,
                started_at TIMESTAMPTZ NOT NULL,
                finished_at TIMESTAMPTZ,
                status VARCHAR NOT NULL,
                message VARCHAR,
                config_digest VARCHAR,
                software_version VARCHAR
            )""",
            """CREATE TABLE decisions (
                decision_id VARCHAR NOT NULL,
                decided_at TIMESTAMPTZ NOT NULL,
                decided_day DATE NOT NULL,
                decision_maker VARCHAR NOT NULL,
                team VARCHAR,
                judgment DOUBLE NOT NULL,
                batch_id BIGINT NOT NULL,
                ingested_at TIMESTAMPTZ NOT NULL,
                source_line BIGINT
            )""",
            """CREATE TABLE outcomes (
                decision_id VARCHAR NOT NULL,
                observed_at TIMESTAMPTZ NOT NULL,
                criterion DOUBLE NOT NULL,
                batch_id BIGINT NOT NULL,
                ingested_at TIMESTAMPTZ NOT NULL,
                source_line BIGINT
            )""",
            """CREATE TABLE quarantine (
                batch_id BIGINT NOT NULL,
                kind VARCHAR NOT NULL,
                source_line BIGINT,
                record_id VARCHAR,
                reason VARCHAR NOT NULL,
                message VARCHAR NOT NULL,
                raw_row VARCHAR,
                quarantined_at TIMESTAMPTZ NOT NULL
            )""",
            """CREATE TABLE dirty_buckets (
                decision_maker VARCHAR NOT NULL,
                day DATE NOT NULL,
                marked_at TIMESTAMPTZ NOT NULL
            )""",
            """CREATE TABLE runs (
                run_id VARCHAR NOT NULL,
                command VARCHAR NOT NULL,
                started_at TIMESTAMPTZ NOT NULL,
                finished_at TIMESTAMPTZ,
                status VARCHAR NOT NULL,
                message VARCHAR
            )""",
            # The outcome that counts for a decision: the most recently ingested one
            # (a correction is a later restatement); every earlier value stays in
            # `outcomes` as history.
            "CREATE VIEW current_outcomes AS SELECT decision_id, observed_at, criterion, "
            f"batch_id, ingested_at, source_line FROM ({current_outcome_rows_sql()})",
            """CREATE VIEW decisions_with_outcome AS
               SELECT d.*, o.criterion, o.observed_at,
                      o.ingested_at AS outcome_ingested_at,
                      o.batch_id AS outcome_batch_id
               FROM decisions d LEFT JOIN current_outcomes o USING (decision_id)""",
        ],
    ),
    (
        2,
        "rolling window fits, their cue weights and the store's key-value facts",
        [
            """CREATE TABLE store_facts (
                key VARCHAR PRIMARY KEY,
                value VARCHAR,
                updated_at TIMESTAMPTZ
            )""",
            # One row per (scope, decision-maker or team or 'all', window).
            """CREATE TABLE fits (
                scope VARCHAR NOT NULL,
                decision_maker VARCHAR NOT NULL,
                team VARCHAR,
                window_start DATE NOT NULL,
                window_end DATE NOT NULL,
                n_decisions BIGINT NOT NULL,
                n_linked BIGINT NOT NULL,
                R_s DOUBLE, R_e DOUBLE, r_a DOUBLE, G DOUBLE, C DOUBLE,
                model_of_judge_r DOUBLE,
                R_s_linked DOUBLE,
                judgment_mean DOUBLE,
                judgment_sd DOUBLE,
                sigma DOUBLE,
                df_resid DOUBLE,
                condition_number DOUBLE,
                method VARCHAR NOT NULL,
                reason VARCHAR,
                weight_cov DOUBLE[],
                cue_mean DOUBLE[],
                comoment DOUBLE[],
                design_signature VARCHAR NOT NULL,
                software_version VARCHAR NOT NULL,
                fitted_at TIMESTAMPTZ NOT NULL
            )""",
            """CREATE TABLE cue_weights (
                scope VARCHAR NOT NULL,
                decision_maker VARCHAR NOT NULL,
                window_end DATE NOT NULL,
                cue_index INTEGER NOT NULL,
                cue VARCHAR NOT NULL,
                weight DOUBLE, std_error DOUBLE, t_value DOUBLE, p_value DOUBLE,
                ci_low DOUBLE, ci_high DOUBLE,
                std_weight DOUBLE, utilization_r DOUBLE, validity_r DOUBLE,
                env_weight DOUBLE,
                estimable BOOLEAN NOT NULL,
                reason VARCHAR
            )""",
        ],
    ),
    (
        3,
        "policy findings per window, alerts with their history and delivery outbox",
        [
            "CREATE SEQUENCE alert_ids START 1",
            # One row per (evaluation, decision-maker or team, check, cue level, window).
            """CREATE TABLE policy_findings (
                evaluated_at TIMESTAMPTZ NOT NULL,
                check_kind VARCHAR NOT NULL,
                scope VARCHAR NOT NULL,
                decision_maker VARCHAR NOT NULL,
                team VARCHAR,
                cue VARCHAR NOT NULL,
                level VARCHAR,
                window_start DATE NOT NULL,
                window_end DATE NOT NULL,
                n BIGINT,
                disparity DOUBLE,
                direct DOUBLE,
                indirect DOUBLE,
                std_disparity DOUBLE,
                std_weight DOUBLE,
                std_indirect DOUBLE,
                ci_low DOUBLE,
                ci_high DOUBLE,
                p_value DOUBLE,
                q_value DOUBLE,
                statistic DOUBLE,
                flagged BOOLEAN,
                assessable BOOLEAN NOT NULL,
                reason VARCHAR
            )""",
            """CREATE TABLE policy_proxy_parts (
                evaluated_at TIMESTAMPTZ NOT NULL,
                decision_maker VARCHAR NOT NULL,
                cue VARCHAR NOT NULL,
                level VARCHAR,
                window_end DATE NOT NULL,
                proxy_cue VARCHAR NOT NULL,
                part DOUBLE,
                std_part DOUBLE
            )""",
            """CREATE TABLE alerts (
                alert_id BIGINT PRIMARY KEY,
                kind VARCHAR NOT NULL,
                scope VARCHAR NOT NULL,
                decision_maker VARCHAR NOT NULL,
                team VARCHAR,
                cue VARCHAR,
                state VARCHAR NOT NULL,
                opened_at TIMESTAMPTZ NOT NULL,
                opened_window_end DATE NOT NULL,
                resolved_at TIMESTAMPTZ,
                resolved_window_end DATE,
                acknowledged_by VARCHAR,
                acknowledged_at TIMESTAMPTZ,
                note VARCHAR,
                evidence VARCHAR NOT NULL,
                updated_at TIMESTAMPTZ NOT NULL
            )""",
            """CREATE TABLE alert_history (
                alert_id BIGINT NOT NULL,
                changed_at TIMESTAMPTZ NOT NULL,
                from_state VARCHAR,
                to_state VARCHAR NOT NULL,
                changed_by VARCHAR NOT NULL,
                note VARCHAR,
                evidence VARCHAR
            )""",
            """CREATE TABLE alert_deliveries (
                alert_id BIGINT NOT NULL,
                event VARCHAR NOT NULL,
                sink VARCHAR NOT NULL,
                status VARCHAR NOT NULL,
                attempts INTEGER NOT NULL,
                last_error VARCHAR,
                created_at TIMESTAMPTZ NOT NULL,
                delivered_at TIMESTAMPTZ
            )""",
        ],
    ),
    (
        4,
        "policy findings: when a drifting weight most likely changed",
        [
            "ALTER TABLE policy_findings ADD COLUMN change_day DATE",
            "ALTER TABLE policy_findings ADD COLUMN change_low DATE",
            "ALTER TABLE policy_findings ADD COLUMN change_high DATE",
        ],
    ),
    (
        5,
        "alert_history: the operating-system account behind each change and, for an "
        "acknowledgement, the way it came in",
        [
            # changed_by is the name a person typed; os_user is the account the cuewatch
            # process ran as (not typed, so not chosen by whoever reached the dashboard).
            "ALTER TABLE alert_history ADD COLUMN os_user VARCHAR",
            # How an acknowledgement came in ('cli', 'dashboard', 'dashboard, shared
            # secret checked'); NULL for the changes assess makes.
            "ALTER TABLE alert_history ADD COLUMN via VARCHAR",
        ],
    ),
    (
        6,
        "readmissions: quarantined records re-admitted after a configuration change",
        [
            # One row per quarantined record that `cuewatch quarantine --readmit` brought
            # in: the quarantine row (its batch and line) and the stored row it became
            # (readmitted_batch, readmitted_line = that decision's or outcome's batch_id,
            # source_line).  A separate table rather than columns on `quarantine`, whose
            # writers insert by position; the key makes re-admission happen at most once.
            """CREATE TABLE readmissions (
                quarantine_batch BIGINT NOT NULL,
                quarantine_line BIGINT NOT NULL,
                readmitted_batch BIGINT NOT NULL,
                readmitted_line BIGINT NOT NULL,
                readmitted_at TIMESTAMPTZ NOT NULL,
                PRIMARY KEY (quarantine_batch, quarantine_line)
            )""",
        ],
    ),
    (
        7,
        "policy findings keep their history: every version of a finding with the time it "
        "was first evaluated and the time a later evaluation superseded it; the current "
        "findings are a view",
        [
            # A finding (and a proxy part) is versioned: an assessment that reproduces a
            # stored row keeps it; one that changes or drops it sets its superseded_at
            # and adds the new version.  row_hash identifies a version (key and figures,
            # floats to ~12 digits); level_detail marks the per-level rows of a
            # categorical cue, which carry their own figures beneath the cue's verdict.
            "ALTER TABLE policy_findings RENAME TO finding_versions",
            "ALTER TABLE finding_versions ADD COLUMN level_detail BOOLEAN DEFAULT FALSE",
            "ALTER TABLE finding_versions ADD COLUMN superseded_at TIMESTAMPTZ",
            "ALTER TABLE finding_versions ADD COLUMN row_hash UBIGINT",
            "ALTER TABLE policy_proxy_parts RENAME TO proxy_part_versions",
            "ALTER TABLE proxy_part_versions ADD COLUMN superseded_at TIMESTAMPTZ",
            "ALTER TABLE proxy_part_versions ADD COLUMN row_hash UBIGINT",
            "CREATE VIEW policy_findings AS SELECT * FROM finding_versions "
            f"WHERE {CURRENT_VERSION}",
            "CREATE VIEW policy_proxy_parts AS SELECT * FROM proxy_part_versions "
            f"WHERE {CURRENT_VERSION}",
        ],
    ),
    (
        8,
        "superseded_decisions: every version of a decision that a later correction or "
        "retraction replaced",
        [
            # `decisions` keeps each decision as it now stands; a correction or
            # retraction moves the row it replaces here, with the batch, line and time
            # of the change and what it was (corrected | retracted).  Cue columns are
            # added beside those of `decisions` (sync_cue_columns).  The decisions known
            # at a moment: store.rules.decisions_known_at_sql.
            """CREATE TABLE superseded_decisions (
                decision_id VARCHAR NOT NULL,
                decided_at TIMESTAMPTZ NOT NULL,
                decided_day DATE NOT NULL,
                decision_maker VARCHAR NOT NULL,
                team VARCHAR,
                judgment DOUBLE NOT NULL,
                batch_id BIGINT NOT NULL,
                ingested_at TIMESTAMPTZ NOT NULL,
                source_line BIGINT,
                superseded_batch BIGINT NOT NULL,
                superseded_line BIGINT,
                superseded_at TIMESTAMPTZ NOT NULL,
                superseded_change VARCHAR NOT NULL
            )""",
        ],
    ),
    (
        9,
        "batches: the clock that stamped the batch (system, or simulated by the demo)",
        [
            # 'simulated' only for batches the demo plays with its simulated clock
            # (store.rules.simulated_clock); every earlier batch was stamped by the system.
            "ALTER TABLE batches ADD COLUMN clock VARCHAR DEFAULT 'system'",
        ],
    ),
    (
        10,
        "source_watermarks: how far ingest has read each PostgreSQL source",
        [
            # One row per kind pulled from PostgreSQL ([decisions.from_postgres] /
            # [outcomes.from_postgres]): the largest watermark value taken, as PostgreSQL
            # writes it as text (compared back as a literal of the column's own type), and
            # the batch that took it.  Written in the transaction that stores the batch's
            # rows, so a pull is in the store with its watermark or not at all.
            """CREATE TABLE source_watermarks (
                kind VARCHAR PRIMARY KEY,
                source VARCHAR NOT NULL,
                watermark VARCHAR NOT NULL,
                batch_id BIGINT NOT NULL,
                advanced_at TIMESTAMPTZ NOT NULL
            )""",
        ],
    ),
    (
        11,
        "lake_runs: the ranges of a data lake's rows each Spark refit read ([lake])",
        [
            # One row per kind and run of the Spark path (monitor.lake): the lake rows whose
            # watermark (an integer, or a timestamp as epoch microseconds) lies in
            # (after, through] were first read by batch_id, and were checked against that
            # run's clock (horizon: the latest plausible timestamp).  The store holds no
            # lake row itself; these ranges make every later run check a row as its first
            # run did.  Written in the transaction that writes the run's buckets.
            """CREATE TABLE lake_runs (
                kind VARCHAR NOT NULL,
                batch_id BIGINT NOT NULL,
                watermark_after BIGINT,
                watermark_through BIGINT NOT NULL,
                horizon TIMESTAMPTZ NOT NULL,
                quarantine VARCHAR,
                PRIMARY KEY (kind, watermark_through)
            )""",
        ],
    ),
]


def cue_sql_type(cue_type: str) -> str:
    return "VARCHAR" if cue_type == "categorical" else "DOUBLE"


def latest_version() -> int:
    return max(v for v, _, _ in MIGRATIONS)


def _has_table(con: duckdb.DuckDBPyConnection, name: str) -> bool:
    return bool(
        con.execute(
            "SELECT count(*) FROM information_schema.tables "
            "WHERE table_name = ? AND table_schema = 'main'",
            [name],
        ).fetchone()[0]
    )


def version_table(con: duckdb.DuckDBPyConnection) -> str | None:
    """The table holding the store's migration list: SCHEMA_VERSION_TABLE, or
    FORMER_VERSION_TABLE in a store not renamed yet; None in a store without one."""
    for name in (SCHEMA_VERSION_TABLE, FORMER_VERSION_TABLE):
        if _has_table(con, name):
            return name
    return None


def adopt_former_version_table(con: duckdb.DuckDBPyConnection) -> bool:
    """Rename a store's FORMER_VERSION_TABLE to SCHEMA_VERSION_TABLE (its rows unchanged)
    on a read-write connection; True when it did.  No-op once renamed or when the new
    table already exists."""
    if _has_table(con, SCHEMA_VERSION_TABLE) or not _has_table(con, FORMER_VERSION_TABLE):
        return False
    con.execute(f"ALTER TABLE {FORMER_VERSION_TABLE} RENAME TO {SCHEMA_VERSION_TABLE}")
    return True


def is_read_only(con: duckdb.DuckDBPyConnection) -> bool:
    return con.execute("SELECT current_setting('access_mode')").fetchone()[0] == "read_only"


def current_version(con: duckdb.DuckDBPyConnection) -> int:
    table = version_table(con)
    if table is None:
        return 0
    row = con.execute(f"SELECT max(version) FROM {table}").fetchone()
    return int(row[0] or 0)


def apply_migrations(con: duckdb.DuckDBPyConnection) -> list[int]:
    adopt_former_version_table(con)
    con.execute(
        f"CREATE TABLE IF NOT EXISTS {SCHEMA_VERSION_TABLE} ("
        "version INTEGER NOT NULL, description VARCHAR, applied_at TIMESTAMPTZ NOT NULL, "
        "software_version VARCHAR)"
    )
    have = current_version(con)
    applied = []
    for version, description, statements in MIGRATIONS:
        if version <= have:
            continue
        for stmt in statements:
            con.execute(stmt)
        con.execute(
            f"INSERT INTO {SCHEMA_VERSION_TABLE} VALUES (?, ?, ?, ?)",
            [version, description, utc_now(), __version__],
        )
        applied.append(version)
    return applied


def decision_columns(con: duckdb.DuckDBPyConnection, table: str = "decisions") -> dict[str, str]:
    """The ``decisions`` table's (or ``table``'s) columns and their DuckDB types."""
    return dict(
        con.execute(
            "SELECT column_name, data_type FROM information_schema.columns "
            "WHERE table_name = ? AND table_schema = 'main'",
            [table],
        ).fetchall()
    )


# Tables that carry one column per cue: the decisions as they stand and the versions
# corrections and retractions replaced (migration 8).
_CUE_TABLES = ("decisions", "superseded_decisions")


class CueSource(Protocol):
    """What the schema needs of a configuration: its cues by name (each with a
    ``type``).  A protocol rather than ``monitor.config.Config`` itself, because the
    configuration asks the schema which names are reserved (``reserved_column_names``)."""

    @property
    def cues(self) -> Mapping[str, Any]: ...


def sync_cue_columns(con: duckdb.DuckDBPyConnection, config: CueSource) -> list[str]:
    """Add a ``decisions`` column for every newly configured cue; returns their names.

    A cue whose configured type no longer matches its stored column raises
    ``StoreMismatch`` (rename the cue or use a new store)."""
    added: list[str] = []
    for table in _CUE_TABLES:
        existing = decision_columns(con, table)
        for name, cue in config.cues.items():
            wanted = cue_sql_type(cue.type)
            if name in existing:
                if existing[name] != wanted:
                    raise StoreMismatch(
                        f"cue '{name}' is stored as {existing[name]} but configured as "
                        f"{cue.type}; rename the cue or use a new store."
                    )
                continue
            con.execute(f"ALTER TABLE {table} ADD COLUMN {quote_ident(name)} {wanted}")
            if table == "decisions":
                added.append(name)
    return added


def check_ready(con: duckdb.DuckDBPyConnection, config: CueSource) -> str | None:
    """Why the store cannot be used with ``config`` yet (None when it can): the rest of
    a sentence that starts with the store's path.  On a read-write connection a store
    whose migration list still has its former name gets it renamed first."""
    if not is_read_only(con):
        adopt_former_version_table(con)
    if current_version(con) < latest_version():
        return "is not initialised or needs migrating: run 'cuewatch init' first."
    missing = [c for t in _CUE_TABLES for c in config.cues if c not in decision_columns(con, t)]
    if missing:
        return f"has no column for cue(s) {', '.join(missing)}: run 'cuewatch init'."
    return None


# Tables that share a name space with the cue columns: cues are columns of `decisions`,
# and the views put `outcomes`' columns beside them.
_CUE_NEIGHBOURS = ("decisions", "outcomes", "superseded_decisions")


# Views over the policy findings: cues never share a query with them.
_FINDING_VIEWS = ("policy_findings", "policy_proxy_parts")


@functools.cache
def reserved_column_names() -> frozenset[str]:
    """The names a cue cannot take, lower-case (DuckDB's identifiers ignore case): every
    column of ``decisions``, ``outcomes`` and every view over them, read from the migrations
    themselves (run on an empty in-memory database, ~0.1 s once per process), so a
    column a later migration adds is reserved without a second list to keep."""
    con = duckdb.connect(":memory:", config={"threads": 1})
    try:
        con.execute("BEGIN")
        apply_migrations(con)
        con.execute("COMMIT")
        views = [
            r[0]
            for r in con.execute(
                "SELECT view_name FROM duckdb_views() WHERE NOT internal"
            ).fetchall()
        ]
        names: set[str] = set()
        for table in (*_CUE_NEIGHBOURS, *(v for v in views if v not in _FINDING_VIEWS)):
            described = con.execute(f"SELECT * FROM {quote_ident(table)} LIMIT 0").description
            names.update(col[0].lower() for col in described)
    finally:
        con.close()
    return frozenset(names)


# --- tables rebuilt with the statistics layout -------------------------------------------


def replace_bucket_tables(
    con: duckdb.DuckDBPyConnection, shift_width: int, sums_width: int
) -> None:
    """(Re)create the empty ``bucket_shifts`` and ``bucket_stats`` tables for a bucket
    layout of ``shift_width`` shifted variables and ``sums_width`` sums per set.  They are
    internal and rebuilt whenever the design or the layout changes, so they live outside
    the versioned migrations."""
    con.execute("DROP TABLE IF EXISTS bucket_stats")
    con.execute("DROP TABLE IF EXISTS bucket_shifts")
    con.execute(
        "CREATE TABLE bucket_shifts (decision_maker VARCHAR NOT NULL, "
        f"shift DOUBLE[{int(shift_width)}] NOT NULL)"
    )
    con.execute(
        "CREATE TABLE bucket_stats (decision_maker VARCHAR NOT NULL, day DATE NOT NULL, "
        f"linked_only BOOLEAN NOT NULL, team VARCHAR, sums DOUBLE[{int(sums_width)}] NOT NULL)"
    )


# --- temporary staging tables (one connection, never stored) ---------------------------


def stage_temp_table(con: duckdb.DuckDBPyConnection, name: str, select_sql: str) -> None:
    """Materialise ``select_sql`` as the temporary table ``name``."""
    con.execute(f"CREATE TEMP TABLE {quote_ident(name)} AS {select_sql}")


def empty_temp_table(con: duckdb.DuckDBPyConnection, name: str, columns_sql: str) -> None:
    """Create the empty temporary table ``name`` with ``columns_sql`` (``a INT, b VARCHAR``)."""
    con.execute(f"CREATE TEMP TABLE {quote_ident(name)} ({columns_sql})")


def drop_temp_tables(con: duckdb.DuckDBPyConnection, *names: str) -> None:
    """Drop the temporary tables ``names`` where they exist."""
    for name in names:
        con.execute(f"DROP TABLE IF EXISTS {quote_ident(name)}")
