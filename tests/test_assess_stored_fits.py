"""The policy checks use the judge model as stored: where the refit fell back to a QR
fit from raw rows (poor conditioning), the checks must not re-derive a less accurate
moment fit."""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
import statsmodels.api as sm
from helpers.configs import write_config

from monitor.assess.findings import evaluate, forbidden_findings
from monitor.assess.stored import load_windows
from monitor.config import load_config
from monitor.ingest import ingest
from monitor.refit import refit
from monitor.store.connection import Store


def _one_handler_store(tmp_path, x, y, names, days, policy):
    """A store of one decision-maker's rows (x columns named ``names``, judgment y) spread
    evenly over ``days`` days from 2024-02-05, ingested and refitted."""
    n = len(y)
    day = [date(2024, 2, 5) + timedelta(days=int(d)) for d in (np.arange(n) * days) // n]
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "decided": [f"{d.isoformat()} 10:00:00" for d in day],
            "who": "dm1",
            "y": y,
            **{name: x[:, j] for j, name in enumerate(names)},
        }
    )
    frame.to_csv(tmp_path / "decisions.csv", index=False, float_format="%.17g")
    doc = {
        "store": {"path": "store/cw.duckdb"},
        "decisions": {"id": "case_id", "decided_at": "decided", "decision_maker": "who",
                      "judgment": "y", "timezone": "UTC"},
        "cues": {name: {"type": "binary" if name == "gender" else "numeric"} for name in names},
        "windows": {"length_days": 90, "step_days": 7, "min_rows": 40},
        "policy": policy,
    }  # fmt: skip
    config = load_config(write_config(tmp_path / "cw.toml", doc))
    Store(config).init()
    ingest(config, [str(tmp_path / "decisions.csv")], kind="decisions")
    refit(config)
    return config


def test_checks_use_the_stored_qr_fit_of_a_poorly_conditioned_window(tmp_path):
    rng = np.random.default_rng(4)
    n = 500
    a = rng.normal(size=n)
    gender = rng.integers(0, 2, size=n).astype(float)
    # x0 and x1 nearly collinear: cue correlation condition number ~1e7-1e8 -> QR refit.
    x = np.column_stack([a, a + 3e-4 * rng.normal(size=n), gender])
    y = x @ [1.0, 2.0, 0.8] + rng.normal(size=n)
    config = _one_handler_store(
        tmp_path, x, y, ["x0", "x1", "gender"], 40, {"forbidden": ["gender"], "min_rows": 100}
    )
    with Store(config).reader() as con:
        method = con.execute(
            "SELECT method FROM fits WHERE scope = 'decision_maker' AND n_decisions = ?", [n]
        ).fetchall()
        windows = load_windows(con, config)
        stored = con.execute(
            "SELECT c.window_end, c.cue_index, c.weight, c.std_error FROM cue_weights c "
            "JOIN fits f USING (scope, decision_maker, window_end) "
            "WHERE c.scope = 'decision_maker' AND f.n_decisions = ? ORDER BY 1, 2",
            [n],
        ).df()
    assert method and all(m == ("qr",) for m in method)
    found, _ = forbidden_findings(config, windows)
    direct = found[(found["check_kind"] == "forbidden_direct") & (found["n"] == n)]
    assert len(direct)
    # Source: statsmodels OLS on the same rows (pinv); ~8 digits survive cond ~1e8.
    ref = sm.OLS(y, sm.add_constant(x)).fit()
    np.testing.assert_allclose(direct["direct"].to_numpy(), ref.params[3], rtol=1e-6)
    i = np.flatnonzero(windows.meta["n_decisions"].to_numpy() == n)
    # The checks see exactly the stored (QR) figures, not a re-derived moment fit.
    k = 3
    assert np.array_equal(windows.fits.weights[i].ravel(), stored["weight"].to_numpy())
    assert np.array_equal(windows.fits.std_errors[i].ravel(), stored["std_error"].to_numpy())
    assert len(stored) == k * len(i)
    np.testing.assert_allclose(
        windows.fits.weights[i], np.tile(ref.params[1:], (len(i), 1)), rtol=1e-6
    )
    np.testing.assert_allclose(windows.fits.std_errors[i, 2], ref.bse[3], rtol=1e-6)


def test_windows_below_the_policy_minimum_show_estimates_but_are_not_assessed(tmp_path):
    rng = np.random.default_rng(9)
    n = 600
    gender = rng.integers(0, 2, size=n).astype(float)
    x = np.column_stack([rng.normal(size=n), gender])
    y = x @ [1.0, 2.0] + rng.normal(size=n)
    policy = {"forbidden": ["gender"], "min_rows": 200, "tolerance": 0.05}
    config = _one_handler_store(tmp_path, x, y, ["x0", "gender"], 60, policy)
    with Store(config).reader() as con:
        found, _ = evaluate(con, config)
    direct = found[found["check_kind"] == "forbidden_direct"]
    small, large = direct[direct["n"] < 200], direct[direct["n"] >= 200]
    assert len(small) and len(large)
    # Planted: a direct weight of 2 on gender, estimated in every window, small or not.
    assert np.isfinite(small["direct"]).all() and np.allclose(small["direct"], 2.0, atol=0.6)
    assert not small["assessable"].any() and not small["flagged"].any()
    assert small["reason"].str.contains("not assessed").all()
    assert large["flagged"].all()
