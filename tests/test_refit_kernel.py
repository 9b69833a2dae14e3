"""The full refit's compiled bucket sums (``monitor.refit.kernel`` fed by
``monitor.refit.full``) against the SQL they replace (``monitor.refit.buckets.full_sql``,
DuckDB forming the same shifted sums and products), on a store built from the demo
scenario (invented data).

The reference here is the project's earlier implementation, itself checked against
statsmodels and the NIST Longley data (tests/test_refit_external_checks.py); both must
give the same buckets and the same fits to ~1e-9.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pytest

from monitor.config import Config, load_config
from monitor.refit import full, kernel
from monitor.refit import windows as refit_windows
from monitor.refit.buckets import full_sql, stored_shifts
from monitor.refit.plan import Buckets, aligned_ends, latest_teams


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Config:
    from helpers.demo_store import build_demo_store

    config = load_config(build_demo_store(tmp_path_factory.mktemp("demo"), days=150))
    refit_windows.refit(config, full=True)
    return config


def _sql_buckets(con, config: Config) -> Buckets:
    """The buckets as the SQL path sums them around the stored references."""
    layout = refit_windows._layout(config)
    rows = refit_windows._fetch_rows(con, layout, full_sql(config))
    keys, shift = stored_shifts(con, layout.p_linked)
    teams = latest_teams(len(keys), rows["ent"], rows["day"], rows["team"], rows["team_code"])
    return Buckets(keys, shift, teams, rows["ent"], rows["day"], rows["linked"],
                   rows["team"], rows["sums"])  # fmt: skip


def _fits_of(config: Config, buckets: Buckets) -> dict:
    """(decision-maker, end) -> (n, R_s, weights) of every decision-maker window."""
    ends = aligned_ends(config, int(buckets.day.min()), int(buckets.day.max()))
    w = refit_windows._all_windows(config, buckets, ends)["decision_maker"]
    fits, _ = refit_windows.fit_windows(config, w)
    return {
        (str(k), int(e)): (fits.n[i], fits.R_s[i], fits.weights[i])
        for i, (k, e) in enumerate(zip(w.keys, w.end, strict=True))
    }


def _same_fits(got: dict, want: dict) -> None:
    assert got.keys() == want.keys()
    assert len(want) > 100
    for key, (n, rs, weights) in want.items():
        assert got[key][0] == n, key
        np.testing.assert_allclose(got[key][1], rs, rtol=1e-9, atol=1e-12, err_msg=str(key))
        np.testing.assert_allclose(got[key][2], weights, rtol=1e-9, atol=1e-12, err_msg=str(key))


def test_stored_buckets_equal_the_sql_sums_around_the_same_references(demo):
    con = duckdb.connect(str(demo.store.path), read_only=True)
    try:
        sql = "SELECT decision_maker, day, linked_only, team, sums FROM ({}) ORDER BY 1, 2, 3"
        got = con.sql(sql.format("SELECT * FROM bucket_stats")).fetchnumpy()
        want = con.sql(sql.format(full_sql(demo))).fetchnumpy()
    finally:
        con.close()
    assert len(want["day"]) > 1000 and want["linked_only"].any()
    for col in ("decision_maker", "day", "linked_only", "team"):
        assert got[col].tolist() == want[col].tolist(), col
    a, b = np.stack(got["sums"]), np.stack(want["sums"])
    scale = np.abs(b).max(axis=0)  # each entry against its column's magnitude
    assert np.all(np.abs(a - b) <= 1e-9 * scale + 1e-300)


def test_fits_from_the_kernel_equal_fits_from_the_sql_buckets(demo):
    con = duckdb.connect(str(demo.store.path), read_only=True)
    try:
        want = _fits_of(demo, _sql_buckets(con, demo))
        got = _fits_of(demo, full.sum_buckets(con, demo, refit_windows._layout(demo)))
    finally:
        con.close()
    _same_fits(got, want)


def test_small_batches_a_growing_stack_and_short_reference_buffers_change_nothing(
    demo, monkeypatch
):
    """Every path of the kernel at once: batches of 1,000 rows, a stack that starts
    with no room and doubles, references from 7 rows (so nearly every decision-maker's
    rows are held back, then summed) - the references differ, the fits may not."""
    monkeypatch.setattr(full, "BATCH_ROWS", 1000)
    monkeypatch.setattr(kernel, "MAX_START_BUCKETS", 0)
    monkeypatch.setattr(kernel, "SHIFT_ROWS", 7)
    con = duckdb.connect(str(demo.store.path), read_only=True)
    try:
        want = _fits_of(demo, _sql_buckets(con, demo))
        small = full.sum_buckets(con, demo, refit_windows._layout(demo))
        stored = con.sql("SELECT shift FROM bucket_shifts ORDER BY decision_maker").fetchall()
    finally:
        con.close()
    assert not np.allclose(small.shift, np.array([s[0] for s in stored]))  # other references
    _same_fits(_fits_of(demo, small), want)


def test_rows_without_a_team_and_buckets_with_two_teams_match_the_sql(tmp_path):
    """Teams as the SQL has them: a bucket's team is the greatest of its rows' (two
    teams within one handler's week here), NULL when none of its rows has one, per set."""
    from helpers.cli import ingest_json, run_cli
    from helpers.configs import make_config
    from helpers.files import decision_row, outcome_row, write_csv

    cfg_path = make_config(tmp_path, windows={"length_days": 28, "step_days": 7, "min_rows": 5})
    assert run_cli(cfg_path, "init").returncode == 0
    # h1 (i % 3 == 1) only ever t1 or none; h0 and h2 both teams in every week.
    rows = [decision_row(i, team=None if i % 5 == 0 else ("t1" if i % 2 or i % 3 == 1 else "t2"))
            for i in range(400)]  # fmt: skip
    rows += [decision_row(i, handler="h9", team=None) for i in range(400, 460)]  # no team
    write_csv(tmp_path / "d.csv", rows)
    write_csv(tmp_path / "o.csv", [outcome_row(i) for i in range(0, 460, 3)])
    ingest_json(cfg_path, "--kind", "decisions", str(tmp_path / "d.csv"))
    ingest_json(cfg_path, "--kind", "outcomes", str(tmp_path / "o.csv"))
    assert run_cli(cfg_path, "refit", "--full").returncode == 0
    config = load_config(cfg_path)
    con = duckdb.connect(str(config.store.path), read_only=True)
    try:
        sql = "SELECT decision_maker, day, linked_only, team, sums FROM ({}) ORDER BY 1, 2, 3"
        got = con.sql(sql.format("SELECT * FROM bucket_stats")).fetchnumpy()
        want = con.sql(sql.format(full_sql(config))).fetchnumpy()
    finally:
        con.close()
    teams = want["team"].tolist()  # a masked array: NULL becomes None
    assert None in teams and "t1" in teams and "t2" in teams  # every case is there
    for col in ("decision_maker", "day", "linked_only", "team"):
        assert got[col].tolist() == want[col].tolist(), col
    a, b = np.stack(got["sums"]), np.stack(want["sums"])
    assert np.all(np.abs(a - b) <= 1e-9 * np.abs(b).max(axis=0) + 1e-300)
