"""Specification of monitor.refit.windows: bucket statistics and the rolling-window refresh.

The store is fed the Ostwyn Mutual scenario (synthetic_logs.ostwyn) through the real
ingest; the references are a full refit of a copy of the same store, statsmodels OLS on
the window's raw rows fetched with plain SQL, and window arithmetic done here by hand.
"""

from __future__ import annotations

import json
import shutil
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers.cli import run_cli, text
from helpers.configs import write_config
from helpers.scenario import concat_csv, scenario_config
from helpers.store_rows import query_store as read_table

from monitor.config import Config, load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.store.connection import THREADS_ENV, Store
from synthetic_logs.ostwyn import day_files, generate

ORIGIN = date(2000, 1, 2)  # windows.origin default: window ends fall on this weekday

# --------------------------------------------------------------------------- helpers


def ingest_files(config: Config, paths: list[Path]) -> None:
    for kind in ("decisions", "outcomes"):
        mine = [str(p) for p in paths if p.name.startswith(kind)]
        if mine:
            summary = ingest(config, mine, kind=kind)
            assert not summary.failed_files


def copy_store(config_path: Path, folder: Path) -> Path:
    """A second configuration whose store is a byte copy of the first one's."""
    config = load_config(config_path)
    new_cfg = scenario_config(folder)
    target = load_config(new_cfg).store.path
    target.parent.mkdir(parents=True, exist_ok=True)
    shutil.copy(config.store.path, target)
    return new_cfg


FIT_KEYS = ["scope", "decision_maker", "window_end"]
CUE_KEYS = [*FIT_KEYS, "cue_index"]


def stored_fits(config: Config) -> tuple[pd.DataFrame, pd.DataFrame]:
    fits = read_table(config, f"SELECT * FROM fits ORDER BY {', '.join(FIT_KEYS)}")
    cues = read_table(config, f"SELECT * FROM cue_weights ORDER BY {', '.join(CUE_KEYS)}")
    return fits.reset_index(drop=True), cues.reset_index(drop=True)


def assert_same_figures(a: pd.DataFrame, b: pd.DataFrame, keys: list[str], rtol: float) -> None:
    """Same rows, same NULLs and texts, every number equal to ``rtol`` relative.

    A value that is zero up to rounding (a correlation of 1e-17) cannot agree
    relatively; the absolute floor is ``rtol`` times the largest magnitude in its
    column (or in its own array, for the co-moment and covariance lists).
    """
    assert len(a) == len(b)
    pd.testing.assert_frame_equal(a[keys], b[keys])
    skip = {"fitted_at", "software_version", "design_signature", *keys}
    for col in [c for c in a.columns if c not in skip]:
        x, y = a[col].to_numpy(), b[col].to_numpy()
        if a[col].dtype == object and len(x) and isinstance(x[0], list | np.ndarray):
            for i, (u, v) in enumerate(zip(x, y, strict=True)):
                u, v = np.asarray(u, float), np.asarray(v, float)
                scale = np.abs(u[np.isfinite(u)]).max(initial=0.0)
                np.testing.assert_allclose(
                    u, v, rtol=rtol, atol=rtol * scale, err_msg=f"{col} row {i}"
                )
        elif a[col].dtype.kind in "fiu":
            x, y = x.astype(float), y.astype(float)
            np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=col)
            scale = np.abs(x[np.isfinite(x)]).max(initial=0.0)
            np.testing.assert_allclose(x, y, rtol=rtol, atol=rtol * scale, err_msg=col)
        else:
            assert list(a[col].fillna("<null>")) == list(b[col].fillna("<null>")), col


def aligned_end_on_or_after(day: date, step: int = 7) -> date:
    return day + timedelta(days=(ORIGIN - day).days % step)


# --------------------------------------------------------------------------- the store


@pytest.fixture(scope="module")
def day_by_day(tmp_path_factory) -> dict:
    """A scenario ingested in bulk, then day by day with a refit after every day,
    including late outcomes and hand-made outcome corrections; a spare next day of
    decisions is held back."""
    root = tmp_path_factory.mktemp("day_by_day")
    start = date(2024, 11, 1)
    generate(
        root / "scenario", seed=5, start=start, days=150, n_handlers=6,
        outcome_horizon=start + timedelta(days=150),
    )  # fmt: skip
    days = day_files(root / "scenario")
    # Hold back the newest decision file: it is the "one new day" of a later test.
    last = max(i for i, (_, files) in enumerate(days) if files[0].name.startswith("decisions"))
    spare = (days[last][0], [days[last][1][0]])
    days[last] = (days[last][0], days[last][1][1:])
    days = [(d, files) for d, files in days if files]
    bulk, tail = days[:-11], days[-11:]
    cfg_path = scenario_config(root / "live")
    config = load_config(cfg_path)
    Store(config).init()
    bulk_files = [p for _, files in bulk for p in files]
    ingest_files(
        config,
        [
            concat_csv([p for p in bulk_files if p.name.startswith("decisions")],
                       root / "bulk" / "decisions_bulk.csv"),
            concat_csv([p for p in bulk_files if p.name.startswith("outcomes")],
                       root / "bulk" / "outcomes_bulk.csv"),
        ],
    )  # fmt: skip
    summaries = [refit(config)]
    corrections = _hand_made_outcomes(config, root / "extra", tail[3][0])
    for i, (_, files) in enumerate(tail):
        ingest_files(config, files + (corrections if i == 3 else []))
        summaries.append(refit(config))
    spare_cfg = copy_store(cfg_path, root / "spare")
    return {"config": cfg_path, "summaries": summaries, "spare": spare, "spare_cfg": spare_cfg,
            "root": root}  # fmt: skip


def _hand_made_outcomes(config: Config, folder: Path, day: date) -> list[Path]:
    """Restate 15 current outcomes (flipped) and give 10 old decisions a first one."""
    cur = read_table(
        config,
        "SELECT o.decision_id, o.criterion FROM current_outcomes o ORDER BY o.decision_id",
    )
    fix = cur.iloc[:: max(len(cur) // 15, 1)].head(15)
    missing = read_table(
        config,
        "SELECT decision_id FROM decisions d WHERE NOT EXISTS (SELECT 1 FROM outcomes o "
        f"WHERE o.decision_id = d.decision_id) AND decided_day < DATE '{day - timedelta(days=20)}' "
        "ORDER BY decision_id LIMIT 10",
    )
    stamp = f"{day.isoformat()} 16:00:00"
    rows = [
        (i, stamp, "No" if v == 1 else "Yes")
        for i, v in zip(fix.decision_id, fix.criterion, strict=True)
    ]
    rows += [(i, stamp, "Yes") for i in missing.decision_id]
    path = folder / f"outcomes_extra_{day.isoformat()}.csv"
    folder.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(rows, columns=["claim_id", "closed_at", "fraud_confirmed"]).to_csv(
        path, index=False
    )
    return [path]


def test_day_by_day_refits_were_incremental_and_saw_corrections(day_by_day):
    modes = [s.mode for s in day_by_day["summaries"]]
    assert modes[0] == "full" and set(modes[1:]) == {"incremental"}
    assert all(s.dirty_buckets > 0 for s in day_by_day["summaries"][1:])
    config = load_config(day_by_day["config"])
    restated = read_table(
        config, "SELECT count(*) AS n FROM (SELECT decision_id FROM outcomes "
        "GROUP BY decision_id HAVING count(DISTINCT criterion) > 1)",
    )["n"].iloc[0]  # fmt: skip
    assert restated >= 15  # the hand-made corrections (plus the scenario's own)


def test_incremental_refits_equal_a_full_refit_of_a_copy(day_by_day, tmp_path):
    live = load_config(day_by_day["config"])
    copy_cfg = copy_store(day_by_day["config"], tmp_path / "copy")
    assert refit(load_config(copy_cfg), full=True).mode == "full"
    inc_fits, inc_cues = stored_fits(live)
    full_fits, full_cues = stored_fits(load_config(copy_cfg))
    assert len(inc_fits) > 100
    # Reference: the full recomputation from raw rows (refit --full), 1e-10 relative.
    assert_same_figures(inc_fits, full_fits, FIT_KEYS, rtol=1e-10)
    assert_same_figures(inc_cues, full_cues, CUE_KEYS, rtol=1e-10)


def test_cli_refit_full_gives_the_same_numbers(day_by_day, tmp_path):
    copy_cfg = copy_store(day_by_day["config"], tmp_path / "copy")
    proc = run_cli(copy_cfg, "refit", "--full", "--json")
    assert proc.returncode == 0, text(proc)
    assert json.loads(text(proc)[0])["mode"] == "full"
    a, _ = stored_fits(load_config(day_by_day["config"]))
    b, _ = stored_fits(load_config(copy_cfg))
    assert_same_figures(a, b, FIT_KEYS, rtol=1e-10)


def _fitted_at(config: Config) -> pd.DataFrame:
    return read_table(config, "SELECT scope, decision_maker, window_end, fitted_at FROM fits")


def _touched(before: pd.DataFrame, after: pd.DataFrame) -> set[tuple]:
    m = after.merge(before, on=FIT_KEYS, how="left", suffixes=("", "_old"))
    hit = m[m["fitted_at_old"].isna() | (m["fitted_at"] != m["fitted_at_old"])]
    return {(s, k, pd.Timestamp(e).date()) for s, k, e in hit[FIT_KEYS].itertuples(index=False)}


def test_one_new_day_touches_only_the_windows_covering_it(day_by_day):
    cfg_path = day_by_day["spare_cfg"]
    config = load_config(cfg_path)
    day, files = day_by_day["spare"]
    decisions = [p for p in files if p.name.startswith("decisions")]
    before = _fitted_at(config)
    ingest_files(config, decisions)
    summary = refit(config)
    touched = _touched(before, _fitted_at(config))
    # Expected, by hand: the newest window ends on the first aligned date on or after
    # the new day and is the only one covering it; it is refitted for each handler who
    # decided that day, their teams and everyone.
    rows = pd.read_csv(decisions[0], dtype=str)
    end = aligned_end_on_or_after(day)
    assert end <= before["window_end"].max().date()  # no new window end: see next test
    want = {("decision_maker", h, end) for h in rows["handler_id"]}
    want |= {("team", t, end) for t in rows["team"]} | {("all", "all", end)}
    assert touched == want
    assert summary.windows_fitted == len(want)


def test_a_new_week_gives_every_series_its_new_window(day_by_day, tmp_path):
    """One handler decides on a day past the newest window end: a full refit gives
    every series a window ending on the new aligned date, so the refresh must too."""
    cfg_path = copy_store(day_by_day["spare_cfg"], tmp_path / "week")
    config = load_config(cfg_path)
    newest = pd.Timestamp(_fitted_at(config)["window_end"].max()).date()
    day = newest + timedelta(days=2)
    rows = pd.read_csv(day_by_day["spare"][1][0], dtype=str)
    one = rows[rows["handler_id"] == rows["handler_id"].iloc[0]].copy()
    one["claim_id"] = [f"NEW{i:05d}" for i in range(len(one))]
    one["scored_at"] = f"{day.isoformat()} 11:00:00"
    path = tmp_path / f"decisions_{day.isoformat()}.csv"
    one.to_csv(path, index=False)
    before = _fitted_at(config)
    ingest_files(config, [path])
    assert refit(config).mode == "incremental"
    end = aligned_end_on_or_after(day)
    touched = _touched(before, _fitted_at(config))
    active = read_table(
        config,
        "SELECT DISTINCT decision_maker, team FROM decisions "
        f"WHERE decided_day BETWEEN DATE '{end - timedelta(days=89)}' AND DATE '{end}'",
    )
    want = {("decision_maker", h, end) for h in active["decision_maker"]}
    want |= {("team", t, end) for t in active["team"]} | {("all", "all", end)}
    assert touched == want
    full_cfg = copy_store(cfg_path, tmp_path / "week_full")
    refit(load_config(full_cfg), full=True)
    assert_same_figures(stored_fits(config)[0], stored_fits(load_config(full_cfg))[0],
                        FIT_KEYS, rtol=1e-10)  # fmt: skip


def test_outcomes_before_their_decisions_and_a_new_handler_refit_like_a_full_refit(
    day_by_day, tmp_path
):
    """Outcomes ingested before their decisions (kept, linked when the decisions come),
    decisions arriving with their outcome in the same refresh, and a handler never seen
    before (a new bucket shift): the incremental refresh equals a full refit."""
    cfg_path = copy_store(day_by_day["spare_cfg"], tmp_path / "early")
    config = load_config(cfg_path)
    # A day of decisions no store has seen (the spare day's rows under new ids; other
    # tests may have ingested the spare file into the shared store).
    day = day_by_day["spare"][0] + timedelta(days=1)
    rows = pd.read_csv(day_by_day["spare"][1][0], dtype=str)
    rows["claim_id"] = [f"EARLY{i:05d}" for i in range(len(rows))]
    rows["scored_at"] = [f"{day.isoformat()} {t[11:]}" for t in rows["scored_at"]]
    newcomer = rows.head(25).copy()
    newcomer["claim_id"] = [f"NEWH{i:04d}" for i in range(len(newcomer))]
    newcomer["handler_id"] = "H900"
    decisions = tmp_path / f"decisions_{day.isoformat()}.csv"
    pd.concat([rows, newcomer]).to_csv(decisions, index=False)
    closed = f"{(day + timedelta(days=1)).isoformat()} 10:00:00"
    early = pd.DataFrame({"claim_id": rows["claim_id"].iloc[::3], "closed_at": closed,
                          "fraud_confirmed": "Yes"})  # fmt: skip
    with_them = pd.DataFrame({"claim_id": newcomer["claim_id"].iloc[::2], "closed_at": closed,
                              "fraud_confirmed": "No"})  # fmt: skip
    first = tmp_path / "outcomes_early.csv"
    second = tmp_path / "outcomes_with_decisions.csv"
    early.to_csv(first, index=False)
    with_them.to_csv(second, index=False)
    ingest_files(config, [first])
    assert refit(config).windows_fitted == 0  # nothing to link yet
    ingest_files(config, [decisions, second])
    assert refit(config).mode == "incremental"
    linked = read_table(
        config,
        "SELECT n_linked FROM fits WHERE scope = 'decision_maker' AND decision_maker = 'H900'",
    )
    assert linked["n_linked"].tolist() == [len(with_them)]
    full_cfg = copy_store(cfg_path, tmp_path / "early_full")
    refit(load_config(full_cfg), full=True)
    inc_fits, inc_cues = stored_fits(config)
    full_fits, full_cues = stored_fits(load_config(full_cfg))
    # Reference: the full recomputation from raw rows (refit --full), 1e-10 relative.
    assert_same_figures(inc_fits, full_fits, FIT_KEYS, rtol=1e-10)
    assert_same_figures(inc_cues, full_cues, CUE_KEYS, rtol=1e-10)


def test_late_outcomes_touch_only_the_windows_covering_their_decisions(day_by_day, tmp_path):
    config = load_config(copy_store(day_by_day["spare_cfg"], tmp_path / "late"))
    old = read_table(
        config,
        "SELECT d.decision_id, d.decision_maker, d.team, d.decided_day FROM decisions d "
        "WHERE NOT EXISTS (SELECT 1 FROM outcomes o WHERE o.decision_id = d.decision_id) "
        "AND d.decided_day < (SELECT max(decided_day) - 40 FROM decisions) "
        "ORDER BY d.decision_id LIMIT 3",
    )
    assert len(old) == 3
    newest = read_table(config, "SELECT max(window_end) AS e FROM fits")["e"].iloc[0]
    newest = pd.Timestamp(newest).date()
    path = tmp_path / "outcomes_late.csv"
    pd.DataFrame(
        {"claim_id": old.decision_id, "closed_at": f"{newest} 10:00:00", "fraud_confirmed": "Yes"}
    ).to_csv(path, index=False)
    before = _fitted_at(config)
    ingest_files(config, [path])
    refit(config)
    touched = _touched(before, _fitted_at(config))
    want = set()
    for r in old.itertuples(index=False):
        d = pd.Timestamp(r.decided_day).date()
        e = aligned_end_on_or_after(d)
        while e <= min(d + timedelta(days=89), newest):  # every window holding day d
            want |= {("decision_maker", r.decision_maker, e), ("team", r.team, e)}
            want.add(("all", "all", e))
            e += timedelta(days=7)
    assert touched == want


# --------------------------------------------------------------------------- threads


def test_results_do_not_depend_on_duckdb_thread_count(day_by_day, tmp_path, monkeypatch):
    one = load_config(copy_store(day_by_day["config"], tmp_path / "one"))
    many = load_config(copy_store(day_by_day["config"], tmp_path / "many"))
    monkeypatch.setenv(THREADS_ENV, "1")
    refit(one, full=True)
    monkeypatch.setenv(THREADS_ENV, "4")
    refit(many, full=True)
    a_fits, a_cues = stored_fits(one)
    b_fits, b_cues = stored_fits(many)
    assert_same_figures(a_fits, b_fits, FIT_KEYS, rtol=1e-12)
    assert_same_figures(a_cues, b_cues, CUE_KEYS, rtol=1e-12)


def test_thread_setting_is_validated(day_by_day, monkeypatch):
    from monitor.store.schema import StoreMismatch

    monkeypatch.setenv(THREADS_ENV, "zero")
    with pytest.raises(StoreMismatch, match=THREADS_ENV):
        with Store(load_config(day_by_day["config"])).reader():
            pass


# --------------------------------------------------------------------------- fits --json

FIT_JSON_KEYS = {
    "scope", "decision_maker", "team", "window_start", "window_end", "n_decisions",
    "n_linked", "R_s", "R_e", "r_a", "G", "C", "model_of_judge_r", "cues",
}  # fmt: skip
CUE_JSON_KEYS = {
    "cue", "weight", "std_error", "ci_low", "ci_high", "std_weight", "utilization_r",
    "validity_r", "p_value", "estimable", "reason",
}  # fmt: skip


def _fits_json(cfg_path: Path, *args: str) -> list[dict]:
    """The real command (click's in-process runner: no interpreter start-up per call)."""
    from click.testing import CliRunner

    from monitor.cli import main

    result = CliRunner().invoke(main, ["--config", str(cfg_path), "fits", "--json", *args])
    assert result.exit_code == 0, result.output
    return json.loads(result.output)


def test_fits_json_follows_the_contract(day_by_day):
    config = load_config(day_by_day["config"])
    docs = _fits_json(day_by_day["config"])
    n_rows = read_table(config, "SELECT count(*) AS n FROM fits")["n"].iloc[0]
    assert len(docs) == n_rows
    design = config.design_columns()
    for d in docs:
        # DESIGN.md, Contracts: these keys (more may be added).
        assert FIT_JSON_KEYS <= set(d)
        assert d["scope"] in ("decision_maker", "team", "all")
        assert [c["cue"] for c in d["cues"]] == design
        # ISO dates, the window spanning windows.length_days days (inclusive ends).
        start, end = date.fromisoformat(d["window_start"]), date.fromisoformat(d["window_end"])
        assert (end - start).days == config.windows.length_days - 1, d
        for c in d["cues"]:
            assert CUE_JSON_KEYS <= set(c)
            assert isinstance(c["estimable"], bool)
            if c["weight"] is None:  # not estimable: null with its reason
                assert not c["estimable"] and c["reason"]
        figures = [d[k] for k in ("R_s", "R_e", "r_a", "G", "C", "model_of_judge_r")]
        if any(v is None for v in figures):
            assert d.get("reason"), d
    assert {d["scope"] for d in docs} == {"decision_maker", "team", "all"}
    # Degenerate windows exist in this scenario and are reported, not dropped.
    short = [d for d in docs if d["n_decisions"] < config.windows.min_rows]
    assert short and all(d["R_s"] is None and "too few rows" in d["reason"] for d in short)
    assert all(c["reason"] == "too few rows" for d in short for c in d["cues"])
    thin = [d for d in docs if d["n_linked"] < config.windows.min_rows]
    assert thin and all(d["R_e"] is None and "linked" in d["reason"] for d in thin)


def test_fits_json_carries_the_lens_model_equation(day_by_day):
    # Source: the lens model equation (Tucker 1964), exact in-sample with the judge model
    # refitted on the linked rows: r_a = G R_e R_s + C sqrt(1 - R_e^2) sqrt(1 - R_s^2).
    docs = [d for d in _fits_json(day_by_day["config"]) if d["r_a"] is not None]
    assert docs
    for d in docs:
        re_, rs = d["R_e"], d["R_s_linked"]
        rhs = d["G"] * re_ * rs + d["C"] * np.sqrt(1 - re_**2) * np.sqrt(1 - rs**2)
        assert abs(d["r_a"] - rhs) < 1e-9, d


def test_fits_table_says_what_the_outcome_figures_rest_on(day_by_day):
    from click.testing import CliRunner

    from monitor.cautions import LINEAR_PROBABILITY_NOTE, LINKED_OUTCOMES_NOTE
    from monitor.cli import main
    from monitor.refit.fits_read import describe_fits

    out = CliRunner().invoke(main, ["--config", str(day_by_day["config"]), "fits", "--latest"])
    assert out.exit_code == 0, out.output
    text = " ".join(out.output.split())
    assert " ".join(LINKED_OUTCOMES_NOTE.split()) in text
    assert " ".join(LINEAR_PROBABILITY_NOTE.split()) not in text  # the priority is 0-100
    docs = _fits_json(day_by_day["config"], "--latest")
    # The notes are wrapped to the terminal's width: compared with spacing ignored.
    assert LINEAR_PROBABILITY_NOTE in " ".join(describe_fits(docs, binary_judgment=True).split())


def test_fits_json_filters_by_decision_maker_and_latest(day_by_day):
    docs = _fits_json(day_by_day["config"], "--decision-maker", "H002")
    assert docs and {d["decision_maker"] for d in docs} == {"H002"}
    ends = [d["window_end"] for d in docs]
    assert ends == sorted(ends)
    latest = _fits_json(day_by_day["config"], "--decision-maker", "H002", "--latest")
    assert len(latest) == 1 and latest[0]["window_end"] == max(ends)
    every_latest = _fits_json(day_by_day["config"], "--latest")
    keys = [(d["scope"], d["decision_maker"]) for d in every_latest]
    assert len(keys) == len(set(keys))


# --------------------------------------------------------------------------- numerics


def _small_log(tmp_path: Path, frame: pd.DataFrame, cues: list[str]) -> Config:
    doc = {
        "store": {"path": "store/cw.duckdb"},
        "decisions": {"id": "case_id", "decided_at": "decided", "decision_maker": "who",
                      "judgment": "y", "timezone": "UTC"},
        "cues": {c: {"type": "numeric"} for c in cues},
        "windows": {"length_days": 90, "step_days": 7, "min_rows": 40},
    }  # fmt: skip
    cfg = write_config(tmp_path / "cw.toml", doc)
    path = tmp_path / "decisions.csv"
    frame.to_csv(path, index=False, float_format="%.17g")
    config = load_config(cfg)
    Store(config).init()
    ingest(config, [str(path)], kind="decisions")
    refit(config)
    return config


def _rows_frame(rng, x: np.ndarray, y: np.ndarray, days: int = 40) -> pd.DataFrame:
    n = len(y)
    day = [date(2024, 2, 5) + timedelta(days=int(d)) for d in (np.arange(n) * days) // n]
    frame = pd.DataFrame({"case_id": [f"c{i}" for i in range(n)]})
    frame["decided"] = [f"{d.isoformat()} 10:00:00" for d in day]
    frame["who"] = "dm1"
    frame["y"] = y
    for j in range(x.shape[1]):
        frame[f"x{j}"] = x[:, j]
    return frame


def _window_with_all(config: Config, n: int) -> tuple[pd.Series, pd.DataFrame]:
    fit = read_table(
        config,
        f"SELECT * FROM fits WHERE scope = 'decision_maker' AND n_decisions = {n} "
        "ORDER BY window_end LIMIT 1",
    ).iloc[0]
    cues = read_table(
        config,
        "SELECT * FROM cue_weights WHERE scope = 'decision_maker' "
        f"AND window_end = DATE '{pd.Timestamp(fit.window_end).date()}' ORDER BY cue_index",
    )
    return fit, cues


def test_large_cue_means_keep_accuracy(tmp_path):
    rng = np.random.default_rng(3)
    n = 600
    x = rng.normal(size=(n, 3)) * [1.0, 2.0, 0.5] + [1e4, -3e4, 5e3]
    y = x @ [2.0, -0.5, 1.5] + rng.normal(size=n)
    config = _small_log(tmp_path, _rows_frame(rng, x, y), ["x0", "x1", "x2"])
    fit, cues = _window_with_all(config, n)
    assert fit["method"] == "moments"
    # Reference: statsmodels OLS; the slopes do not depend on where the cues are
    # centred, so the reference is fitted on numpy-centred cues to keep it exact.
    ref = sm.OLS(y, sm.add_constant(x - x.mean(axis=0))).fit()
    np.testing.assert_allclose(cues["weight"], ref.params[1:], rtol=1e-9)
    np.testing.assert_allclose(cues["std_error"], ref.bse[1:], rtol=1e-9)
    np.testing.assert_allclose(fit["R_s"] ** 2, ref.rsquared, rtol=1e-9)


def test_cue_names_like_the_refit_own_columns_refit_incrementally(tmp_path):
    """Cues named like the refit's working columns (w, linked_only, u0, day, sums) do
    not disturb it: a second file refitted incrementally equals statsmodels OLS."""
    rng = np.random.default_rng(4)
    names = ["w", "linked_only", "u0", "day", "sums"]
    n = 400
    x = rng.normal(size=(n, len(names))) + [3.0, 1.0, -2.0, 10.0, 0.0]
    y = x @ [1.0, -1.0, 0.5, 0.2, 2.0] + rng.normal(size=n)
    frame = _rows_frame(rng, x, y).rename(columns={f"x{j}": c for j, c in enumerate(names)})
    config = _small_log(tmp_path, frame.iloc[: n // 2], names)
    later = tmp_path / "decisions_later.csv"
    frame.iloc[n // 2 :].to_csv(later, index=False, float_format="%.17g")
    ingest(config, [str(later)], kind="decisions")
    assert refit(config).mode == "incremental"
    fit, cues = _window_with_all(config, n)
    # Reference: statsmodels OLS on all rows of the window.
    ref = sm.OLS(y, sm.add_constant(x)).fit()
    np.testing.assert_allclose(cues["weight"], ref.params[1:], rtol=1e-9)
    np.testing.assert_allclose(fit["R_s"] ** 2, ref.rsquared, rtol=1e-9)


def test_poorly_conditioned_window_is_refit_from_raw_rows(tmp_path):
    rng = np.random.default_rng(4)
    n = 500
    a = rng.normal(size=n)
    x = np.column_stack([a, a + 3e-4 * rng.normal(size=n), rng.normal(size=n)])
    y = x @ [1.0, 2.0, -1.0] + rng.normal(size=n)
    config = _small_log(tmp_path, _rows_frame(rng, x, y), ["x0", "x1", "x2"])
    fit, cues = _window_with_all(config, n)
    # Condition number of the cue correlation matrix ~ 1e7-1e8: above the refit limit.
    assert fit["condition_number"] > 1e7
    assert fit["method"] == "qr"
    # Reference: statsmodels OLS (pinv) on the same rows; ~8 digits survive cond ~1e8.
    ref = sm.OLS(y, sm.add_constant(x)).fit()
    np.testing.assert_allclose(cues["weight"], ref.params[1:], rtol=1e-6)
    np.testing.assert_allclose(cues["std_error"], ref.bse[1:], rtol=1e-6)
