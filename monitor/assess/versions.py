"""Stored findings keep their history: each assessment adds only what changed.

A finding is one row of ``finding_versions`` (a proxy part one of
``proxy_part_versions``), identified by a hash of its key and figures.  An assessment
that reproduces a stored current row leaves it alone, so its ``evaluated_at`` is the
time it was first evaluated with those figures; a row the assessment changes or no
longer produces gets ``superseded_at`` and the new version is added.  The views
``policy_findings`` and ``policy_proxy_parts`` are the current versions (what assess,
the alerts and the dashboard read); ``store.rules.version_known_at`` gives the versions
that stood at a moment (what the audit pack reads as of its time).
"""

from __future__ import annotations

from datetime import datetime

import numpy as np
import pandas as pd

from monitor.store.rules import CURRENT_VERSION, quote_ident

# Floats enter the hash with 40 of their 52 mantissa bits (about 12 significant
# digits): a refit that reproduces a figure up to rounding noise keeps its version.
_MANTISSA_BITS = 40


def _rounded(values: np.ndarray) -> np.ndarray:
    mantissa, exponent = np.frexp(values)
    scale = float(2**_MANTISSA_BITS)
    return np.ldexp(np.round(mantissa * scale) / scale, exponent)


def row_hashes(frame: pd.DataFrame) -> np.ndarray:
    """One uint64 per row over every column (floats rounded, see ``_MANTISSA_BITS``)."""
    canon = pd.DataFrame(index=frame.index)
    for col in frame.columns:
        values = frame[col]
        if pd.api.types.is_float_dtype(values):
            canon[col] = _rounded(values.to_numpy(dtype=float))
        elif pd.api.types.is_bool_dtype(values) or pd.api.types.is_numeric_dtype(values):
            canon[col] = values
        else:
            # Objects (text, dates, nullable booleans): one spelling per value.
            canon[col] = values.map(lambda v: "\x00" if v is None or v is pd.NA else str(v))
    if frame.empty:
        return np.zeros(0, dtype=np.uint64)
    return pd.util.hash_pandas_object(canon, index=False).to_numpy(dtype=np.uint64)


def write_versions(con, table: str, frame: pd.DataFrame, now: datetime) -> tuple[int, int]:
    """Bring the current versions in ``table`` to ``frame``: supersede the current rows
    ``frame`` does not reproduce, add its rows that are not current yet.  Runs inside
    the caller's transaction.  Returns (added, superseded)."""
    rows = frame.copy()
    rows["row_hash"] = row_hashes(frame)
    rows.insert(0, "evaluated_at", now)
    target = quote_ident(table)
    con.register("_new_versions", rows[["row_hash"]])
    try:
        superseded = con.execute(
            f"UPDATE {target} SET superseded_at = ? WHERE {CURRENT_VERSION} "
            "AND row_hash NOT IN (SELECT row_hash FROM _new_versions) "
            "OR row_hash IS NULL AND superseded_at IS NULL",
            [now],
        ).fetchone()[0]
    finally:
        con.unregister("_new_versions")
    # DuckDB reads pandas NaN as NULL: "not estimable" stays missing in SQL.
    con.register("_rows", rows)
    try:
        cols = ", ".join(quote_ident(c) for c in rows.columns)
        added = con.execute(
            f"INSERT INTO {target} ({cols}) SELECT {cols} FROM _rows WHERE row_hash NOT IN "
            f"(SELECT row_hash FROM {target} WHERE {CURRENT_VERSION})"
        ).fetchone()[0]
    finally:
        con.unregister("_rows")
    return int(added or 0), int(superseded or 0)
