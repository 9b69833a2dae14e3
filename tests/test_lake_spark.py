"""The Spark path ([lake]): the demo scenario's files written as Parquet datasets and
summed on Spark (local mode, the session's one Spark) give the same `fits --json` and
`alerts --json` as the same scenario ingested from files (numbers to 1e-9 relative), the
same quarantine reasons, an incremental run over two loads the same as one full run, and
a Spark job that fails leaves the store as it was.

The reference is the file path (tests/helpers/demo_store.py: one year, 12 handlers), the
code the rest of the suite checks against statsmodels and hand-worked examples.
"""

from __future__ import annotations

import shutil
from datetime import date
from pathlib import Path

import duckdb
import pytest
from helpers.cli import command_json, json_differences
from helpers.demo_store import build_demo_store
from helpers.lake import demo_lake, lake_config, write_loads
from helpers.store_rows import query

from monitor.assess import assess
from monitor.config import load_config
from monitor.lake import sums
from monitor.refit import refit
from monitor.store.connection import Store

pytest.importorskip("pyspark", reason="pyspark is not installed (pip extra 'spark')")


@pytest.fixture(scope="module")
def files_cfg(tmp_path_factory) -> Path:
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def _check_spans_to_the_stretch(from_files: list, from_lake: list, step: int) -> None:
    """A lake store knows a series' first and last day of data to the stretch of its
    bucket (``refit.fits_read.data_spans``): the lake's span holds the file store's and
    is at most ``step - 1`` days longer at either end.  The span fields are then taken
    out of both, so the rest is compared exactly."""
    wider = 0
    for f, k in zip(from_files, from_lake, strict=True):
        early = (date.fromisoformat(f["data_from"]) - date.fromisoformat(k["data_from"])).days
        late = (date.fromisoformat(k["data_to"]) - date.fromisoformat(f["data_to"])).days
        assert 0 <= early < step and 0 <= late < step, (f, k)
        wider += early > 0 or late > 0
        for fit in (f, k):
            for field in ("data_from", "data_to", "partial"):
                fit.pop(field)
    assert wider  # the demo has series whose data start or end inside a stretch


def _quarantined(folder: Path) -> list[tuple]:
    """(kind, reason, count) of the Parquet quarantine datasets beside the lake's inputs."""
    con = duckdb.connect()
    out = []
    for kind in ("decisions", "outcomes"):
        found = sorted((folder / "lake").glob(f"{kind}_quarantine/through=*/*.parquet"))
        if found:
            files = ", ".join(f"'{f}'" for f in found)
            out += [(kind, *r) for r in con.execute(
                f"SELECT reason, count(*) FROM read_parquet([{files}]) GROUP BY 1").fetchall()]  # fmt: skip
    return sorted(out)


def test_the_demo_in_two_loads_through_spark_equals_the_files_and_a_failed_job_changes_nothing(
    files_cfg, tmp_path_factory, spark, monkeypatch
):
    """The demo scenario as a lake, in two loads: decisions up to the scenario's ninth
    month and the outcomes known then, then the rest (new decisions, outcomes of the first
    load's decisions arriving late, restated outcomes).  The first refit is full, the
    second incremental, and together they must give what the files give in one go: the
    same quarantine reasons and counts, and the same `fits --json` and `alerts --json`.
    Then a third refit fails in Spark: the store is as it was.  (One test for both: each
    Spark refit of the demo costs ~15-30 s.)"""
    config = load_config(files_cfg)
    folder = tmp_path_factory.mktemp("demo_lake_loads")
    decisions_csv = Path(config.decisions.landing) / "decisions_all.csv"
    outcomes_csv = Path(config.outcomes.landing) / "outcomes_all.csv"
    n_dec = sum(1 for _ in decisions_csv.open()) - 1
    n_out = sum(1 for _ in outcomes_csv.open()) - 1
    staging = folder / "staging"
    write_loads(decisions_csv, staging / "decisions", [int(n_dec * 0.75)])
    write_loads(outcomes_csv, staging / "outcomes", [int(n_out * 0.6)])
    lake_cfg = lake_config(files_cfg, folder)
    for kind in ("decisions", "outcomes"):
        (folder / "lake" / kind).mkdir(parents=True)
        shutil.copy(staging / kind / "load-000.parquet", folder / "lake" / kind)
    lake = load_config(lake_cfg)
    Store(lake).init()
    assert refit(lake).mode == "full"
    for kind in ("decisions", "outcomes"):
        shutil.copy(staging / kind / "load-001.parquet", folder / "lake" / kind)
    second = refit(lake)
    assert second.mode == "incremental" and second.buckets_recomputed > 0
    assess(lake)
    # The same rows were rejected over the two runs, for the same reasons (the file
    # store's quarantine table against the lake's quarantine datasets), and counted in
    # the batches; the store holds no row of the lake: only buckets came back.
    by_reason = "SELECT kind, reason, count(*) FROM quarantine GROUP BY ALL ORDER BY ALL"
    assert _quarantined(folder) == [tuple(r) for r in query(files_cfg, by_reason)]
    counts = "SELECT kind, sum(rows_read), sum(rows_quarantined) FROM batches GROUP BY 1 ORDER BY 1"
    assert query(lake_cfg, counts) == query(files_cfg, counts)
    assert query(lake_cfg, "SELECT count(*) FROM decisions")[0][0] == 0
    for args in (("fits",), ("alerts",)):
        from_files, from_lake = command_json(files_cfg, *args), command_json(lake_cfg, *args)
        assert from_files, f"{args}: the file store has nothing to compare"
        if args == ("fits",):
            _check_spans_to_the_stretch(from_files, from_lake, lake.windows.step_days)
        assert json_differences(from_files, from_lake) == [], args
    runs = query(
        lake_cfg,
        "SELECT kind, watermark_after, watermark_through FROM lake_runs ORDER BY kind, watermark_through",
    )
    assert runs == [
        ("decisions", None, int(n_dec * 0.75)), ("decisions", int(n_dec * 0.75), n_dec),
        ("outcomes", None, int(n_out * 0.6)), ("outcomes", int(n_out * 0.6), n_out),
    ]  # fmt: skip

    tables = (
        "batches",
        "lake_runs",
        "bucket_stats",
        "bucket_shifts",
        "fits",
        "cue_weights",
        "dirty_buckets",
    )
    # repr: NaN figures compare equal as text.
    before = {t: repr(query(lake_cfg, f"SELECT * FROM {t} ORDER BY ALL")) for t in tables}

    # A full refit that fails after Spark has checked the rows, written the quarantine
    # and numbered the run's batches, while the buckets come back.
    def broken(*_args, **_kw):
        raise RuntimeError("the executors went away")

    monkeypatch.setattr(sums, "collect_sets", broken)
    with pytest.raises(RuntimeError, match="executors went away"):
        refit(lake, full=True)
    assert {t: repr(query(lake_cfg, f"SELECT * FROM {t} ORDER BY ALL")) for t in tables} == before


def test_a_catalog_table_reads_the_same_rows_as_its_parquet_folder(
    files_cfg, tmp_path_factory, spark
):
    """``decisions_table`` / ``outcomes_table``: the lake's rows named in the Spark catalog
    (here temporary views over the same Parquet folders) are read as the folders are,
    row for row, watermark included; a missing table is a clear error."""
    from monitor.lake import records, source

    folder = tmp_path_factory.mktemp("demo_lake_tables")
    by_path = load_config(demo_lake(files_cfg, folder))
    for kind in ("decisions", "outcomes"):
        spark.read.parquet(str(folder / "lake" / kind)).createOrReplaceTempView(f"lake_{kind}")
    text = (folder / "ostwyn_lake.toml").read_text(encoding="utf-8")
    for kind in ("decisions", "outcomes"):
        text = text.replace(f'{kind} = "{folder / "lake" / kind}"', f'{kind}_table = "lake_{kind}"')
    text = text.replace("[lake]\n", f'[lake]\nquarantine = "{folder / "quarantine"}"\n')
    tables_cfg = folder / "ostwyn_tables.toml"
    tables_cfg.write_text(text, encoding="utf-8")
    by_table = load_config(tables_cfg)
    assert by_table.lake.decisions is None and by_table.lake.decisions_table == "lake_decisions"
    for kind in ("decisions", "outcomes"):
        a = source._read(spark, by_path, kind)
        b = source._read(spark, by_table, kind)
        assert a.count() == b.count() > 0
        assert a.exceptAll(b).count() == 0 and b.exceptAll(a).count() == 0
    assert source.quarantine_folder(by_table, "decisions", 9) == str(
        folder / "quarantine" / "decisions" / "through=9"
    )
    spark.catalog.dropTempView("lake_outcomes")
    with pytest.raises(records.LakeUnreadable, match="table lake_outcomes"):
        source._read(spark, by_table, "outcomes")
