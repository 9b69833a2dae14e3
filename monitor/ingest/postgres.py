"""Pulls from PostgreSQL: the rows of a configured query or table that are new since the
last pull, taken as one batch through the same checks, quarantine, duplicates and
provenance as a file.

A pull runs in one read-only REPEATABLE READ transaction on the PostgreSQL side: it reads
the largest watermark among the new rows, then copies exactly the rows up to it (``COPY
... TO STDOUT``, CSV) into a spool file, which ingest reads as it reads a CSV file
(monitor.ingest.batches.ingest_spooled).  The new watermark is written to
``source_watermarks`` inside the DuckDB transaction that stores the batch, so a crash at
any point leaves either the batch with its watermark or neither, and the next pull takes
the same rows again: nothing is lost or stored twice.

Values travel as PostgreSQL's text output, in the session settings fixed here (UTC,
ISO dates), which is what a CSV export of the same rows would hold; ``double precision``
prints the shortest text that reads back to the same number.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import duckdb

from monitor.config import Config, PostgresSourceConfig
from monitor.errors import UserError
from monitor.store.rules import utc_now

RECORDED_FORMAT = "postgresql"


class SourceUnavailable(UserError):
    """A configured PostgreSQL source cannot be used as configured (no connection string)."""


class SourceFailed(Exception):
    """A pull could not read its source (connection refused, a query error): one line,
    recorded as a failed batch; the watermark stays where it was."""


def configured_sources(config: Config, kind: str | None = None) -> dict[str, PostgresSourceConfig]:
    """The kinds that have a ``from_postgres`` section (only ``kind`` when given)."""
    out: dict[str, PostgresSourceConfig] = {}
    if config.decisions.from_postgres is not None:
        out["decisions"] = config.decisions.from_postgres
    if config.outcomes is not None and config.outcomes.from_postgres is not None:
        out["outcomes"] = config.outcomes.from_postgres
    return {k: v for k, v in out.items() if kind is None or k == kind}


def connection_string(source: PostgresSourceConfig, kind: str) -> str:
    """The libpq connection string from the environment; one sentence when it is missing."""
    value = os.environ.get(source.url_env, "").strip()
    if not value:
        raise SourceUnavailable(
            f"[{kind}.from_postgres] reads its connection string from the environment "
            f"variable {source.url_env}, which is not set."
        )
    return value


def describe_source(source: PostgresSourceConfig, url: str) -> str:
    """A description of the source for ``batches.path`` and messages: server, database,
    the variable that holds the connection string and the table or the query's digest;
    never the user's password (nor any other secret the string may carry)."""
    from psycopg.conninfo import conninfo_to_dict

    try:
        parts = conninfo_to_dict(url)
    except Exception:  # a malformed string: the connection attempt will say why
        parts = {}
    host = str(parts.get("host") or "local socket")
    port = str(parts.get("port") or "5432")
    db = str(parts.get("dbname") or parts.get("user") or "?")
    what = (
        f"table {source.table}"
        if source.table is not None
        else f"query sha256:{hashlib.sha256(_query_text(source).encode()).hexdigest()[:12]}"
    )
    return f"postgresql://{host}:{port}/{db} (${source.url_env}) {what}"


def _query_text(source: PostgresSourceConfig) -> str:
    return (source.query or "").strip().rstrip(";").strip()


def _source_sql(source: PostgresSourceConfig):
    """The configured rows as a composable FROM item."""
    from psycopg import sql

    if source.table is not None:
        return sql.Identifier(*source.table.split("."))
    return sql.SQL("({})").format(sql.SQL(_query_text(source)))


def stored_watermark(con: duckdb.DuckDBPyConnection, kind: str) -> str | None:
    row = con.execute("SELECT watermark FROM source_watermarks WHERE kind = ?", [kind]).fetchone()
    return row[0] if row else None


@dataclass(frozen=True)
class Spool:
    path: Path
    rows: int
    watermark: str | None  # the largest watermark among the rows (None: no rows)

    def label(self, described: str, source: PostgresSourceConfig, after: str | None) -> str:
        """``batches.path`` of the pull: the source and the watermark range it took."""
        return f"{described} {source.watermark} in ({after or '-inf'}, {self.watermark}]"


def spool_new_rows(
    url: str, source: PostgresSourceConfig, after: str | None, target: Path
) -> Spool:
    """Copy the source's rows whose watermark is above ``after`` (all rows with one
    when None), ordered by it, to ``target`` as CSV with a header.  Rows whose watermark
    is NULL are never taken: no later pull could tell whether they were.  Raises
    ``SourceFailed`` when PostgreSQL cannot be reached or refuses the query."""
    import psycopg

    try:
        return _spool(url, source, after, target)
    except psycopg.Error as exc:
        lines = str(exc).strip().splitlines()
        raise SourceFailed(f"PostgreSQL: {lines[0] if lines else type(exc).__name__}") from None


def _spool(url: str, source: PostgresSourceConfig, after: str | None, target: Path) -> Spool:
    import psycopg
    from psycopg import sql

    wm = sql.Identifier(source.watermark)
    rows = sql.SQL("SELECT * FROM {} AS cuewatch_source").format(_source_sql(source))
    above = (
        sql.SQL("{} IS NOT NULL").format(wm)
        if after is None
        else sql.SQL("{} > {}").format(wm, sql.Literal(after))
    )
    with psycopg.connect(url, connect_timeout=10, autocommit=False) as pg:
        pg.isolation_level = psycopg.IsolationLevel.REPEATABLE_READ
        pg.read_only = True
        with pg.cursor() as cur:
            cur.execute("SET TIME ZONE 'UTC'")
            cur.execute("SET DateStyle TO 'ISO, YMD'")
            cur.execute("SET IntervalStyle TO 'iso_8601'")
            cur.execute(
                sql.SQL(
                    "SELECT max({wm})::text, count(*) FROM ({rows}) AS cuewatch_rows WHERE {above}"
                ).format(wm=wm, rows=rows, above=above)
            )
            top, count = cur.fetchone()
            if not count:
                return Spool(target, 0, None)
            # The same snapshot as the max above: exactly the rows it counted.
            copy = sql.SQL(
                "COPY (SELECT * FROM ({rows}) AS cuewatch_rows WHERE {above} AND {wm} <= {top} "
                "ORDER BY {wm}) TO STDOUT (FORMAT csv, HEADER true, ENCODING 'UTF8')"
            ).format(rows=rows, above=above, wm=wm, top=sql.Literal(top))
            with open(target, "wb") as out, cur.copy(copy) as stream:
                for chunk in stream:
                    out.write(chunk)
        pg.rollback()
    return Spool(target, int(count), top)


SPOOL_PREFIX = ".cuewatch-pull-"


def spool_folder(store_folder: Path) -> Path:
    """A new folder beside the store for one pull's spool (the rows are the store's data,
    so they stay under its permissions and on its disk, not in a shared /tmp).  Spools a
    killed pull left behind are removed first: the caller holds the writer lock, so no
    other pull is using them."""
    for stale in store_folder.glob(SPOOL_PREFIX + "*"):
        shutil.rmtree(stale, ignore_errors=True)
    return Path(tempfile.mkdtemp(prefix=SPOOL_PREFIX, dir=store_folder))


def spool_config(config: Config) -> Config:
    """``config`` as it reads a spool: CSV as PostgreSQL writes it (comma, UTF-8),
    whatever the files' own ``[ingest]`` delimiter and encoding are."""
    spool = config.ingest.model_copy(update={"delimiter": ",", "encoding": "utf-8"})
    return config.model_copy(update={"ingest": spool})


def advance_watermark(
    con: duckdb.DuckDBPyConnection, kind: str, described: str, watermark: str, batch_id: int
) -> None:
    """Record that ``kind``'s source has been read up to ``watermark`` by ``batch_id``;
    called inside that batch's transaction."""
    con.execute(
        "INSERT OR REPLACE INTO source_watermarks VALUES (?, ?, ?, ?, ?)",
        [kind, described, watermark, batch_id, utc_now()],
    )
