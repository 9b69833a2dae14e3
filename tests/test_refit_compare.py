"""`cuewatch compare`: two decision-makers, or one and the rest of their team, window by
window, on a real store built by the command line, checked against statsmodels."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers.cli import run_cli, text
from helpers.configs import make_config
from helpers.files import write_csv
from helpers.store_rows import design_frame, read_store

from monitor.config import load_config
from monitor.refit.compare import compare
from monitor.stats.moments import merge, moments_from_rows, remove


def _rows(rng, handler: str, n: int, slope: float, start: int) -> list[dict]:
    """Decisions of one handler over 70 days; the judgment leans on amount by ``slope``
    (invented data: a known difference between the two handlers)."""
    out = []
    for i in range(n):
        amount = rng.uniform(0, 1000)
        report = rng.integers(0, 2)
        witness = rng.integers(0, 2)
        region = rng.choice(["north", "south"])
        band = rng.choice(["a", "b", "c"])
        age = rng.integers(0, 365)
        score = 20 + slope * amount + 6 * report - 4 * witness + 0.01 * age
        score += 3 * (band == "b") + rng.normal(0, 6 if handler == "h0" else 3)
        day = 1 + (i * 70) // n
        out.append(
            {
                "case_id": f"{handler}-{start + i:05d}",
                "decided": str(pd.Timestamp("2024-01-01") + pd.Timedelta(days=day - 1, hours=9)),
                "handler": handler,
                "team": "t1",
                "score": f"{min(max(score, 0), 100):.3f}",
                "amount": f"{amount:.2f}",
                "age_days": str(age),
                "report": "Y" if report else "N",
                "witness": str(witness),
                "region": region,
                "band": band,
            }
        )
    return out


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("compare")
    cfg = make_config(root)
    rng = np.random.default_rng(20240101)
    rows = _rows(rng, "h0", 420, 0.03, 0) + _rows(rng, "h1", 380, 0.05, 1000)
    write_csv(root / "landing" / "decisions" / "d.csv", rows)
    for args in (("init",), ("ingest",), ("refit",)):
        proc = run_cli(cfg, *args)
        assert proc.returncode == 0, text(proc)
    return cfg


def _window_rows(cfg: Path, who: str, start: str, end: str) -> pd.DataFrame:
    return read_store(
        cfg,
        "SELECT * FROM decisions WHERE decision_maker = ? AND decided_day BETWEEN ? AND ? "
        "ORDER BY decision_id",
        [who, start, end],
    )


def test_moments_remove_gives_the_moments_of_the_rest():
    # Reference: the moments computed directly from the remaining rows.
    rng = np.random.default_rng(3)
    a, b = rng.normal(5, 2, (37, 4)), rng.normal(-1, 3, (91, 4))
    whole = merge(moments_from_rows(a), moments_from_rows(b))
    rest = remove(whole, moments_from_rows(a))
    direct = moments_from_rows(b)
    assert rest.n[0] == 91
    np.testing.assert_allclose(rest.mean, direct.mean, rtol=1e-12)
    np.testing.assert_allclose(rest.comoment, direct.comoment, rtol=1e-10)
    nothing = remove(whole, whole)
    assert nothing.n[0] == 0 and not nothing.comoment.any()


def test_difference_test_matches_a_pooled_regression_in_statsmodels(store):
    cfg = load_config(store)
    result = compare(cfg, "h0", "h1")
    assert result.against == "decision_maker" and len(result.windows) >= 2
    for w in (result.windows[-1], result.windows[len(result.windows) // 2]):
        a = _window_rows(store, "h0", w["window_start"], w["window_end"])
        b = _window_rows(store, "h1", w["window_start"], w["window_end"])
        assert (len(a), len(b)) == (w["n_first"], w["n_second"])
        xa, xb = design_frame(cfg, a), design_frame(cfg, b)
        names = list(xa.columns)
        # Reference (statsmodels): one OLS on the pooled rows with a group dummy and its
        # interaction with every cue; the interaction coefficients are b_h0 - b_h1.
        x = pd.concat([xb, xa], ignore_index=True)
        d = np.r_[np.zeros(len(b)), np.ones(len(a))]
        design = np.column_stack([np.ones(len(x)), x, d, x.to_numpy() * d[:, None]])
        y = np.r_[b["judgment"], a["judgment"]]
        pooled = sm.OLS(y, design).fit()
        k = len(names)
        diff = pooled.params[k + 2 :]
        # The same model by WLS with each group's own residual variance (from its own
        # OLS) and the scale fixed at 1: the interaction's standard error is then
        # sqrt(se1^2 + se2^2), the Welch-type comparison of two independent regressions.
        s2 = {
            g: sm.OLS(rows["judgment"], sm.add_constant(xx)).fit().scale
            for g, rows, xx in (("a", a, xa), ("b", b, xb))
        }
        weights = 1 / np.r_[np.full(len(b), s2["b"]), np.full(len(a), s2["a"])]
        wls = sm.WLS(y, design, weights=weights).fit(cov_type="fixed scale", cov_kwds={"scale": 1})
        got = pd.DataFrame(w["cues"]).set_index("cue").loc[names]
        np.testing.assert_allclose(got["difference"], diff, rtol=1e-7, atol=1e-10)
        np.testing.assert_allclose(got["std_error"], wls.bse[k + 2 :], rtol=1e-7)
        np.testing.assert_allclose(got["z"], wls.tvalues[k + 2 :], rtol=1e-6)
        # The joint test: the Wald chi-square of all interaction terms at once.
        r = np.zeros((k, design.shape[1]))
        r[:, k + 2 :] = np.eye(k)
        wald = wls.wald_test(r, scalar=True, use_f=False)
        np.testing.assert_allclose(w["joint_stat"], float(wald.statistic), rtol=1e-6)
    # The planted difference in the amount weight (0.03 vs 0.05) is found.
    amount = next(c for c in result.windows[-1]["cues"] if c["cue"] == "amount")
    assert amount["difference"] == pytest.approx(-0.02, abs=0.004) and amount["p_value"] < 1e-6


def test_against_the_team_the_person_is_left_out_of_the_team(store):
    # Team t1 = h0 + h1, so "h0 against the rest of t1" must equal "h0 against h1".
    cfg = load_config(store)
    team, other = compare(cfg, "h0"), compare(cfg, "h0", "h1")
    assert team.against == "rest_of_team" and team.second_label == "team t1 without h0"
    assert [w["window_end"] for w in team.windows] == [w["window_end"] for w in other.windows]
    for wt, wo in zip(team.windows, other.windows, strict=True):
        assert wt["n_second"] == wo["n_second"]
        pairs = [(wt["R_s_second"], wo["R_s_second"])]
        pairs += [
            (ct[f], co[f])
            for ct, co in zip(wt["cues"], wo["cues"], strict=True)
            for f in ("difference", "std_error")
        ]
        for got, want in pairs:
            assert (got is None) == (want is None)
            assert want is None or got == pytest.approx(want, rel=1e-6, abs=1e-9)
    assert sum(w["R_s_second"] is not None for w in team.windows) >= 2
    assert any("team t1 without h0" in n for n in team.notes)


def test_compare_on_the_command_line(store):
    proc = run_cli(store, "compare", "h0", "h1", "--json")
    out, err = text(proc)
    assert proc.returncode == 0, err
    doc = json.loads(out)
    assert doc["first"] == "h0" and doc["second"] == "h1" and "sqrt(se1^2 + se2^2)" in doc["test"]
    first = doc["windows"][0]
    # The first window starts before the data: labelled by the days it holds.
    assert first["partial"] and first["data_from"] == "2024-01-01" > first["window_start"]
    proc = run_cli(store, "compare", "h0", env={"COLUMNS": "100"})
    out, err = text(proc)
    assert proc.returncode == 0, err
    assert "h0 compared with team t1 without h0" in out and "(partial)" in out
    assert max(len(line) for line in out.splitlines() if line.startswith(("┃", "│"))) <= 100
    proc = run_cli(store, "compare", "H0", "h1")
    assert proc.returncode == 2
    assert text(proc)[1].strip() == (
        "cuewatch: there is no decision-maker 'H0' in the store (names are case-sensitive): "
        "did you mean 'h0'?"
    )
