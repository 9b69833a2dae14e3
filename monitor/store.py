"""The DuckDB store: schema, migrations, connection rules and identifier quoting.

Connection rules (DuckDB cannot mix a read-write process with read-only ones on one
file):

* one writer at a time, serialised by an advisory lock file beside the store
  (``<store>.lock``); a second writer waits up to ``store.lock_timeout_s`` and then
  fails with ``StoreBusy`` (a user-facing error, exit code 2);
* readers open short-lived read-only connections and retry briefly while a writer
  holds the file, so a dashboard never blocks the nightly job for long.

Every other module asks this one for connections; identifiers that come from the
configuration are always passed through ``quote_ident``.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import duckdb

from monitor import __version__
from monitor.config import Config

SCHEMA_VERSION_TABLE = "schema_migrations"
THREADS_ENV = "CUEWATCH_DUCKDB_THREADS"


class StoreBusy(Exception):
    """The store is held by another process for longer than we are willing to wait."""


class StoreMismatch(Exception):
    """The store's layout disagrees with the configuration (a user error)."""


def quote_ident(name: str) -> str:
    """Quote an identifier for DuckDB SQL (double quotes, embedded quotes doubled)."""
    return '"' + str(name).replace('"', '""') + '"'


def sql_literal(value: object) -> str:
    """Render a Python scalar as a SQL literal (strings quoted, None as NULL)."""
    if value is None:
        return "NULL"
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, int | float):
        return repr(float(value)) if isinstance(value, float) else str(value)
    return "'" + str(value).replace("'", "''") + "'"


def utc_now() -> datetime:
    return datetime.now(UTC)


# --- schema -------------------------------------------------------------------------

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
            """CREATE VIEW current_outcomes AS
               SELECT decision_id, observed_at, criterion, batch_id, ingested_at, source_line
               FROM (
                   SELECT *, row_number() OVER (
                       PARTITION BY decision_id
                       ORDER BY ingested_at DESC, batch_id DESC, source_line DESC) AS rank_
                   FROM outcomes)
               WHERE rank_ = 1""",
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
]


def _cue_sql_type(cue_type: str) -> str:
    return "VARCHAR" if cue_type == "categorical" else "DOUBLE"


class Store:
    """Access to one DuckDB store file under the connection rules above."""

    def __init__(self, config: Config):
        self.config = config
        self.path = Path(config.store.path)
        self.lock_path = self.path.with_name(self.path.name + ".lock")

    # --- connections ------------------------------------------------------------------

    def _configure(self, con: duckdb.DuckDBPyConnection) -> None:
        # Timestamps without an offset in the input are read in the decisions' zone;
        # the bucket day of a decision is its calendar day there.
        con.execute(f"SET TimeZone = {sql_literal(self.config.decisions.timezone)}")
        con.execute("SET enable_progress_bar = false")
        # Operators (and the thread-independence tests) may pin DuckDB's worker count;
        # the statistics must not depend on it beyond rounding.
        threads = os.environ.get(THREADS_ENV, "").strip()
        if threads:
            if not threads.isdigit() or int(threads) < 1:
                raise StoreMismatch(f"{THREADS_ENV} must be a positive integer, not {threads!r}.")
            con.execute(f"SET threads = {int(threads)}")

    @contextlib.contextmanager
    def writer(self, timeout_s: float | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
        """The single read-write connection, under the store's lock file."""
        timeout = self.config.store.lock_timeout_s if timeout_s is None else timeout_s
        self.path.parent.mkdir(parents=True, exist_ok=True)
        with _file_lock(self.lock_path, timeout):
            con = _connect_with_retry(str(self.path), read_only=False, timeout_s=max(timeout, 5))
            try:
                self._configure(con)
                yield con
            finally:
                con.close()

    @contextlib.contextmanager
    def reader(self, retry_s: float | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
        """A short-lived read-only connection; retries while a writer holds the file."""
        if not self.path.exists():
            raise StoreMismatch(
                f"the store {self.path} does not exist yet: run 'cuewatch init' first."
            )
        wait = self.config.store.read_retry_s if retry_s is None else retry_s
        con = _connect_with_retry(str(self.path), read_only=True, timeout_s=wait)
        try:
            self._configure(con)
            yield con
        finally:
            con.close()

    def query_df(self, sql: str, params: list | None = None):
        """Run one read-only query and return a pandas DataFrame."""
        with self.reader() as con:
            return con.execute(sql, params or []).df()

    # --- schema -----------------------------------------------------------------------

    def init(self) -> dict:
        """Create or migrate the store; a no-op when it is up to date.

        Returns {"created": bool, "applied": [versions], "cue_columns_added": [...],
        "schema_version": int}.
        """
        created = not self.path.exists()
        with self.writer() as con:
            con.execute("BEGIN")
            try:
                applied = _apply_migrations(con)
                added = self._sync_cue_columns(con)
                con.execute("COMMIT")
            except BaseException:
                con.execute("ROLLBACK")
                raise
            version = current_version(con)
        return {
            "created": created,
            "applied": applied,
            "cue_columns_added": added,
            "schema_version": version,
            "path": str(self.path),
        }

    def _sync_cue_columns(self, con: duckdb.DuckDBPyConnection) -> list[str]:
        existing = dict(
            con.execute(
                "SELECT column_name, data_type FROM information_schema.columns "
                "WHERE table_name = 'decisions' AND table_schema = 'main'"
            ).fetchall()
        )
        added: list[str] = []
        for name, cue in self.config.cues.items():
            wanted = _cue_sql_type(cue.type)
            if name in existing:
                if existing[name] != wanted:
                    raise StoreMismatch(
                        f"cue '{name}' is stored as {existing[name]} but configured as "
                        f"{cue.type}; rename the cue or use a new store."
                    )
                continue
            con.execute(f"ALTER TABLE decisions ADD COLUMN {quote_ident(name)} {wanted}")
            added.append(name)
        return added

    def ensure_ready(self, con: duckdb.DuckDBPyConnection) -> None:
        """Raise StoreMismatch unless the store is initialised and has every cue column."""
        if current_version(con) < latest_version():
            raise StoreMismatch(
                f"the store {self.path} is not initialised or needs migrating: "
                "run 'cuewatch init' first."
            )
        cols = {
            r[0]
            for r in con.execute(
                "SELECT column_name FROM information_schema.columns "
                "WHERE table_name = 'decisions' AND table_schema = 'main'"
            ).fetchall()
        }
        missing = [c for c in self.config.cues if c not in cols]
        if missing:
            raise StoreMismatch(
                f"the store has no column for cue(s) {', '.join(missing)}: run 'cuewatch init'."
            )

    # --- run log ----------------------------------------------------------------------

    def record_run(
        self,
        con: duckdb.DuckDBPyConnection,
        run_id: str,
        command: str,
        started_at: datetime,
        status: str,
        message: str = "",
    ) -> None:
        con.execute(
            "INSERT INTO runs VALUES (?, ?, ?, ?, ?, ?)",
            [run_id, command, started_at, utc_now(), status, message],
        )


def get_fact(con: duckdb.DuckDBPyConnection, key: str) -> str | None:
    """A value from ``store_facts`` (None when unset)."""
    rows = con.execute("SELECT value FROM store_facts WHERE key = ?", [key]).fetchall()
    return rows[0][0] if rows else None


def set_fact(con: duckdb.DuckDBPyConnection, key: str, value: str) -> None:
    con.execute("INSERT OR REPLACE INTO store_facts VALUES (?, ?, ?)", [key, value, utc_now()])


def latest_version() -> int:
    return max(v for v, _, _ in MIGRATIONS)


def current_version(con: duckdb.DuckDBPyConnection) -> int:
    exists = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_name = ?",
        [SCHEMA_VERSION_TABLE],
    ).fetchone()[0]
    if not exists:
        return 0
    row = con.execute(f"SELECT max(version) FROM {SCHEMA_VERSION_TABLE}").fetchone()
    return int(row[0] or 0)


def _apply_migrations(con: duckdb.DuckDBPyConnection) -> list[int]:
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


# --- locking and retries ------------------------------------------------------------------


@contextlib.contextmanager
def _file_lock(path: Path, timeout_s: float) -> Iterator[None]:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        deadline = time.monotonic() + timeout_s
        delay = 0.05
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    holder = _read_holder(fd)
                    raise StoreBusy(
                        f"another cuewatch writer{holder} holds the store lock {path}; "
                        f"gave up after {timeout_s:g} s."
                    ) from None
                time.sleep(delay)
                delay = min(delay * 2, 1.0)
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        try:
            yield
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


def _read_holder(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        pid = os.read(fd, 32).decode().strip()
        return f" (pid {pid})" if pid else ""
    except OSError:
        return ""


def _is_lock_conflict(exc: Exception) -> bool:
    text = str(exc).lower()
    return "lock" in text or "conflicting" in text or "being used" in text


def _connect_with_retry(path: str, read_only: bool, timeout_s: float) -> duckdb.DuckDBPyConnection:
    deadline = time.monotonic() + timeout_s
    delay = 0.02
    while True:
        try:
            return duckdb.connect(path, read_only=read_only)
        except duckdb.IOException as exc:
            if not _is_lock_conflict(exc) or time.monotonic() >= deadline:
                if _is_lock_conflict(exc):
                    who = "the nightly job or another writer" if read_only else "a reader"
                    raise StoreBusy(
                        f"the store {path} is busy ({who} has it open); "
                        f"gave up after {timeout_s:g} s."
                    ) from None
                raise
            time.sleep(delay)
            delay = min(delay * 2, 0.5)
