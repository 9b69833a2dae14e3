"""Helpers for the tests that re-derive stored figures from the store's raw rows: a
read-only query on the store, and the judge model's design columns built here from raw
cue values, independently of monitor.stats.lens and of the store's SQL."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd

from monitor.config import Config, load_config


def query_store(config: Config, query: str, params: list | None = None) -> pd.DataFrame:
    """Run one query on a short-lived read-only connection to the configured store."""
    con = duckdb.connect(str(config.store.path), read_only=True)
    try:
        return con.execute(query, params or []).df()
    finally:
        con.close()


def read_store(config_path: Path, query: str, params: list | None = None) -> pd.DataFrame:
    """``query_store`` for the configuration file at ``config_path``."""
    return query_store(load_config(config_path), query, params)


def design_frame(config: Config, rows: pd.DataFrame) -> pd.DataFrame:
    """One column per design column, on ``rows``' index, in the configuration's cue order:
    numeric and binary cues as stored, and for a categorical cue one 0/1 dummy per level
    other than its reference, named ``cue=level`` (DESIGN.md)."""
    out = pd.DataFrame(index=rows.index)
    for name, cue in config.cues.items():
        if cue.type == "categorical":
            for level in cue.levels:
                if level != cue.reference:
                    out[f"{name}={level}"] = (rows[name] == level).astype(float)
        else:
            out[name] = rows[name].astype(float)
    return out


def store_path(config: Path) -> Path:
    from monitor.config import load_config

    return Path(load_config(config).store.path)


def query(config: Path, sql: str, params: list | None = None) -> list[tuple]:
    """Read the store directly (read-only) and return all rows."""
    con = duckdb.connect(str(store_path(config)), read_only=True)
    try:
        return con.execute(sql, params or []).fetchall()
    finally:
        con.close()
