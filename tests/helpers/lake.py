"""A data lake for the Spark path's tests: the demo scenario's decision and outcome files
written as Parquet datasets, a configuration that reads them through ``[lake]``, and the
session's Spark (local mode, one session for every test: ``spark`` fixture).

The Parquet columns are text, as the files hold them, plus ``load_seq`` (BIGINT): the
row's line in its file, the watermark.  A dataset may be written in parts (``upto``):
the rows up to a line, so a later call adds the next load as another file."""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pytest

from monitor.config import Config, load_config

WATERMARK = "load_seq"


def write_loads(csv_path: Path, folder: Path, cuts: list[int]) -> None:
    """Write the CSV's rows as Parquet files under ``folder``, one per load: lines
    (1-based, header excluded) in (previous cut, cut], the last load up to the end."""
    folder.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect()
    con.execute(
        "CREATE TABLE rows AS SELECT row_number() OVER () AS load_seq, * "
        f"FROM read_csv('{csv_path}', all_varchar = true, header = true)"
    )
    bounds = [0, *cuts, con.execute("SELECT count(*) FROM rows").fetchone()[0]]
    for i, (lo, hi) in enumerate(zip(bounds, bounds[1:], strict=False)):
        if hi <= lo:
            continue
        con.execute(
            f"COPY (SELECT * FROM rows WHERE load_seq > {lo} AND load_seq <= {hi} ORDER BY load_seq) "
            f"TO '{folder / f'load-{i:03d}.parquet'}' (FORMAT parquet)"
        )
    con.close()


def lake_config(files_cfg: Path, folder: Path, *, master: str = "local[2]") -> Path:
    """The file store's configuration, reading the lake in ``folder`` into a store of its
    own there (landing folders left out)."""
    body = files_cfg.read_text(encoding="utf-8")
    body = body.replace('path = "./cuewatch.duckdb"', f'path = "{folder / "cuewatch.duckdb"}"')
    body = body.replace('file = "./alerts.jsonl"', f'file = "{folder / "alerts.jsonl"}"')
    body = "\n".join(line for line in body.splitlines() if not line.startswith("landing ="))
    body += f"""
[lake]
decisions = "{folder / "lake" / "decisions"}"
outcomes = "{folder / "lake" / "outcomes"}"
watermark = "{WATERMARK}"
master = "{master}"
spark_conf = {{ "spark.sql.shuffle.partitions" = "4", "spark.default.parallelism" = "2" }}
"""
    path = folder / "ostwyn_lake.toml"
    path.write_text(body, encoding="utf-8")
    return path


def demo_lake(files_cfg: Path, folder: Path, cuts: tuple[list[int], list[int]] = ([], [])) -> Path:
    """The demo's files as a lake under ``folder`` (decision loads cut at ``cuts[0]``,
    outcome loads at ``cuts[1]``) and its configuration."""
    config = load_config(files_cfg)
    write_loads(
        Path(config.decisions.landing) / "decisions_all.csv", folder / "lake" / "decisions", cuts[0]
    )
    write_loads(
        Path(config.outcomes.landing) / "outcomes_all.csv", folder / "lake" / "outcomes", cuts[1]
    )
    return lake_config(files_cfg, folder)


def _strict() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("true", "1")


@pytest.fixture(scope="session")
def spark():
    """The session's Spark in local mode (started once, stopped at the end)."""
    pytest.importorskip("pyspark", reason="pyspark is not installed (pip extra 'spark')")
    from monitor.lake.session import spark_session

    config = Config.model_validate(
        {
            "decisions": {"id": "i", "decided_at": "t", "decision_maker": "m", "judgment": "j"},
            "cues": {"c": {"type": "numeric"}},
            "lake": {
                "decisions": "/nonexistent",
                "watermark": WATERMARK,
                "master": "local[2]",
                "spark_conf": {
                    "spark.sql.shuffle.partitions": "4",
                    "spark.default.parallelism": "2",
                },
            },
        }
    )
    session = spark_session(config)
    yield session
    session.stop()
