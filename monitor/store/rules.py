"""Relational rules shared by the stages: the one place each is decided.

* which outcome counts for a decision (the latest ingested; ties: the later batch, then
  the later line, a missing line ranking first);
* the as-of filter of the audit pack (rows ingested by a moment) and which version of a
  policy finding stood at a moment;
* identifier quoting and literals for SQL built from configuration strings;
* the store's clock (every stored timestamp is UTC).
"""

from __future__ import annotations

from datetime import UTC, datetime


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


# --- which outcome counts for a decision ----------------------------------------------

# The order in which outcomes of one decision supersede each other - latest ingested,
# then the later batch, then the later line (a missing line ranks first) - packed into
# one HUGEINT: arg_max over it took 0.22 s against 0.43 s over the equivalent STRUCT
# (2.4M outcomes).  Batch ids and line numbers stay below 2^32.
OUTCOME_ORDER = (
    "((epoch_us(ingested_at)::HUGEINT << 64) + (batch_id::HUGEINT << 32) "
    "+ coalesce(source_line, -1))"
)


def current_outcome_sql(decision_filter: str | None = None) -> str:
    """(decision_id, criterion) of the outcome that counts per decision, optionally
    restricted to outcomes matched by ``decision_filter`` (a SQL predicate on
    ``outcomes``)."""
    clause = f"WHERE {decision_filter}" if decision_filter else ""
    return (
        f"SELECT decision_id, arg_max(criterion, {OUTCOME_ORDER}) AS criterion "
        f"FROM outcomes {clause} GROUP BY decision_id"
    )


def current_outcome_rows_sql(where: str | None = None, *, count_versions: bool = False) -> str:
    """Every column of the outcome row that counts per decision among the outcomes
    matched by ``where`` (a SQL predicate on ``outcomes``); with ``count_versions`` also
    ``n_versions``, how many of those outcomes the decision has."""
    clause = f"WHERE {where}" if where else ""
    versions = ", count(*) OVER (PARTITION BY decision_id) AS n_versions" if count_versions else ""
    return (
        f"SELECT *{versions} FROM outcomes {clause} "
        f"QUALIFY row_number() OVER (PARTITION BY decision_id ORDER BY {OUTCOME_ORDER} DESC) = 1"
    )


# --- as-of ---------------------------------------------------------------------------


def ingested_by(column: str = "ingested_at") -> str:
    """The as-of predicate: the row had arrived by the moment bound to its ``?``."""
    return f"{column} <= ?::TIMESTAMPTZ"


# --- versions of the policy findings ---------------------------------------------------

# A stored finding is current until a later assessment supersedes it.
CURRENT_VERSION = "superseded_at IS NULL"


def version_known_at(prefix: str = "") -> str:
    """The as-of predicate of a versioned finding: it had been evaluated by the moment
    bound to its two ``?`` (the same moment twice) and not yet superseded then."""
    return (
        f"{prefix}evaluated_at <= ?::TIMESTAMPTZ AND ({prefix}superseded_at IS NULL "
        f"OR {prefix}superseded_at > ?::TIMESTAMPTZ)"
    )


# --- names the store keeps for itself -------------------------------------------------

# Every column of `decisions`, `outcomes` and their views (lower-case; DuckDB's
# identifiers ignore case): a cue cannot take one of these names.  Written out so that
# loading a configuration does not build a database; tests/test_config_validation.py
# holds it equal to what the migrations actually create
# (monitor.store.schema.reserved_column_names), so a new column cannot slip past it.
RESERVED_COLUMN_NAMES = frozenset(
    {
        "batch_id",
        "criterion",
        "decided_at",
        "decided_day",
        "decision_id",
        "decision_maker",
        "ingested_at",
        "judgment",
        "observed_at",
        "outcome_batch_id",
        "outcome_ingested_at",
        "source_line",
        "team",
    }
)
