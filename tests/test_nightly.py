"""`cuewatch nightly` end to end over a landing folder that receives new files between
two runs: the second run ingests only the new files, refits incrementally (to the same
numbers a full refit gives) and assesses; both runs are recorded in `runs`."""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
from helpers.cli import run_cli, text

from monitor.config import load_config
from monitor.demo import prepare
from monitor.refit.windows import refit
from synthetic_logs.ostwyn import day_files

FIRST_DAYS = 40  # calendar days of files present for the first run
LAST_DAYS = 70  # ... and for the second


def _drop(config, files: list[Path]) -> None:
    for f in files:
        landing = (
            config.decisions.landing if f.parent.name == "decisions" else config.outcomes.landing
        )
        shutil.copy2(f, Path(landing) / f.name)


def _data_rows(files: list[Path]) -> int:
    total = 0
    for f in files:
        with open(f, newline="", encoding="utf-8") as fh:
            total += sum(1 for _ in csv.reader(fh)) - 1  # minus the header
    return total


def _nightly(cfg_path: Path) -> dict:
    proc = run_cli(cfg_path, "nightly", "--json")
    out, err = text(proc)
    assert proc.returncode == 0, err
    return json.loads(out)


def _fits(db: Path) -> pd.DataFrame:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.execute(
            "SELECT scope, decision_maker, window_end, n_decisions, n_linked, R_s, R_e, r_a "
            "FROM fits ORDER BY scope, decision_maker, window_end"
        ).df()
    finally:
        con.close()


def test_nightly_twice_over_a_growing_landing_folder(tmp_path):
    config = prepare(tmp_path / "demo", seed=11, days=70, n_handlers=6)
    cfg_path = Path(config.source)
    arrivals = day_files(tmp_path / "demo" / "scenario")
    day0 = arrivals[0][0].toordinal()
    old = [f for d, files in arrivals if d.toordinal() < day0 + FIRST_DAYS for f in files]
    new = [
        f for d, files in arrivals if day0 + FIRST_DAYS <= d.toordinal() < day0 + LAST_DAYS
        for f in files
    ]  # fmt: skip
    assert old and new

    # Before `init` the run is a user error: exit 2, one sentence, no traceback.
    proc = run_cli(cfg_path, "nightly")
    out, err = text(proc)
    assert proc.returncode == 2 and len(err.strip().splitlines()) == 1 and "init" in err
    assert "Traceback" not in err

    run_cli(cfg_path, "init").check_returncode()
    _drop(config, old)
    first = _nightly(cfg_path)
    assert first["status"] == "ok" and first["refit"]["mode"] == "full"
    assert {Path(f["path"]).name for f in first["ingest"]["files"]} == {f.name for f in old}

    _drop(config, new)
    second = _nightly(cfg_path)
    assert second["status"] == "ok"
    files = second["ingest"]["files"]
    ingested = {Path(f["path"]).name for f in files if f["status"] == "ingested"}
    # Files skipped as already ingested are counted, not listed (unless --list-skipped).
    assert ingested == {f.name for f in new} and second["ingest"]["skipped_files"] == len(old)
    assert not any(f["status"] == "skipped" for f in files)
    ing = second["ingest"]
    # Every data row of the new files is accounted for (counted here with csv).
    assert ing["accepted"] + ing["quarantined"] + ing["duplicates"] == _data_rows(new)
    ref = second["refit"]
    assert ref["mode"] == "incremental"
    assert second["assess"]["evaluated"] is True

    con = duckdb.connect(str(config.store.path), read_only=True)
    runs = con.execute(
        "SELECT command, status, finished_at >= started_at FROM runs ORDER BY started_at"
    ).fetchall()
    # Buckets the new files touch, found here from the files themselves: the (handler,
    # day) of each new decision, and of each decision a new outcome links to.
    touched = set()
    for f in new:
        rows = list(csv.DictReader(open(f, newline="", encoding="utf-8")))
        if f.parent.name == "decisions":
            touched |= {(r["handler_id"], f.stem.split("_")[1]) for r in rows}
        else:
            ids = [r["claim_id"] for r in rows]
            touched |= {
                (h, d.isoformat())
                for h, d in con.execute(
                    "SELECT decision_maker, decided_day FROM decisions "
                    "WHERE decision_id IN (SELECT unnest(?))",
                    [ids],
                ).fetchall()
            }
    con.close()
    assert runs == [("nightly", "ok", True), ("nightly", "ok", True)]
    assert ref["dirty_buckets"] == len(touched)

    # The incremental fits equal a full refit of the same store (windows.refit promise).
    incremental = _fits(config.store.path)
    copy = tmp_path / "copy"
    shutil.copytree(tmp_path / "demo", copy, ignore=shutil.ignore_patterns("scenario", "*.lock"))
    full_config = load_config(copy / cfg_path.name)
    assert refit(full_config, full=True).mode == "full"
    full = _fits(full_config.store.path)
    pd.testing.assert_frame_equal(
        incremental.drop(columns=["R_s", "R_e", "r_a"]), full.drop(columns=["R_s", "R_e", "r_a"])
    )
    for col in ("R_s", "R_e", "r_a"):
        np.testing.assert_allclose(incremental[col], full[col], rtol=0, atol=1e-9, equal_nan=True)
