"""The stored window fits as the policy checks read them.

``load_windows`` reads the window statistics that `refit` stored and re-derives each
window's judge model from its sufficient statistics (``lens.fit_lens``), keeping the
stored QR fit where the refit fell back to raw rows.  The finding columns and the row
helpers shared by the checks (``monitor.assess.findings``, ``monitor.assess.drift``)
live here too.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from monitor.config import Config
from monitor.stats.lens import LensFits, fit_lens
from monitor.stats.moments import Moments

FINDING_COLUMNS = [
    "check_kind",
    "scope",
    "decision_maker",
    "team",
    "cue",
    "level",
    "window_start",
    "window_end",
    "n",
    "disparity",
    "direct",
    "indirect",
    "std_disparity",
    "std_weight",
    "std_indirect",
    "ci_low",
    "ci_high",
    "p_value",
    "q_value",
    "statistic",
    "flagged",
    "assessable",
    "reason",
    "change_day",
    "change_low",
    "change_high",
    "level_detail",
]
PROXY_COLUMNS = ["decision_maker", "cue", "level", "window_end", "proxy_cue", "part", "std_part"]
JOINT = "(all cues)"


@dataclass(frozen=True)
class StoredWindows:
    """The stored fits of one or more scopes, ordered by (scope, key, window_end)."""

    meta: (
        pd.DataFrame
    )  # scope, decision_maker, team, window_start, window_end, n_decisions, n_linked, R_s, r_a
    moments: Moments  # over (x, Ys)
    fits: LensFits  # judge model re-derived from the moments


def load_windows(
    con, config: Config, scopes: tuple[str, ...] = ("decision_maker", "team")
) -> StoredWindows:
    names = config.design_columns()
    p = len(names) + 1
    placeholders = ", ".join("?" for _ in scopes)
    df = con.execute(
        "SELECT scope, decision_maker, team, window_start, window_end, n_decisions, n_linked, "
        "R_s, r_a, method, sigma, df_resid, weight_cov, cue_mean, comoment FROM fits "
        f"WHERE scope IN ({placeholders}) ORDER BY scope, decision_maker, window_end",
        list(scopes),
    ).df()
    m = len(df)
    mean = np.array(df["cue_mean"].tolist(), dtype=float).reshape(m, p) if m else np.zeros((0, p))
    co = (
        np.array(df["comoment"].tolist(), dtype=float).reshape(m, p, p)
        if m
        else np.zeros((0, p, p))
    )
    moments = Moments(df["n_decisions"].to_numpy(dtype=float), mean, co)
    # Fitted at the windows' own minimum so small windows still show their estimates;
    # ``evaluate`` marks those below the policy's minimum as not assessed.
    fits = fit_lens(moments, None, names, min_rows=config.windows.min_rows)
    qr = np.flatnonzero(df["method"].to_numpy() == "qr") if m else np.zeros(0, int)
    if len(qr):
        fits = _stored_judge(con, df, qr, fits)
    meta = df.drop(columns=["cue_mean", "comoment", "weight_cov"]).reset_index(drop=True)
    # Keep the stored lens figures (they use the linked rows, which the moments here lack).
    return StoredWindows(meta, moments, fits)


def _stored_judge(con, df: pd.DataFrame, rows: np.ndarray, fits: LensFits) -> LensFits:
    """The judge model of the windows the refit fitted from raw rows (QR, where the
    moments were too poorly conditioned), as stored, in place of the moment fit."""
    from dataclasses import replace

    k = len(fits.names)
    keys = df.iloc[rows][["scope", "decision_maker", "window_end"]].reset_index(drop=True)
    con.register("_qr_keys", keys)
    try:
        cw = con.execute(
            "SELECT c.scope, c.decision_maker, c.window_end, c.cue_index, c.weight, "
            "c.std_error, c.t_value, c.p_value, c.ci_low, c.ci_high, c.std_weight, "
            "c.estimable, c.reason FROM cue_weights c JOIN _qr_keys USING "
            "(scope, decision_maker, window_end) ORDER BY 1, 2, 3, 4"
        ).df()
    finally:
        con.unregister("_qr_keys")
    position = {tuple(r): i for i, r in enumerate(keys.itertuples(index=False))}
    at = np.array(
        [position[t] for t in cw[["scope", "decision_maker", "window_end"]].itertuples(index=False)]
    )
    arrays = {}
    for field, column in (
        ("weights", "weight"),
        ("std_errors", "std_error"),
        ("t_values", "t_value"),
        ("p_values", "p_value"),
        ("ci_low", "ci_low"),
        ("ci_high", "ci_high"),
        ("std_weights", "std_weight"),
    ):
        values = np.array(getattr(fits, field), dtype=float, copy=True)
        values[rows[at], cw["cue_index"].to_numpy()] = cw[column].to_numpy(dtype=float)
        arrays[field] = values
    estimable = np.array(fits.estimable, copy=True)
    estimable[rows[at], cw["cue_index"].to_numpy()] = cw["estimable"].to_numpy(dtype=bool)
    cov = np.array(fits.cov, dtype=float, copy=True)
    for i, row in zip(rows, df.iloc[rows].itertuples(index=False), strict=True):
        cov[i] = np.asarray(row.weight_cov, dtype=float).reshape(k, k)
    sigma = np.array(fits.sigma, dtype=float, copy=True)
    sigma[rows] = df["sigma"].to_numpy(dtype=float)[rows]
    return replace(fits, estimable=estimable, cov=cov, sigma=sigma, **arrays)


def base_rows(meta: pd.DataFrame, index: np.ndarray, kind: str) -> pd.DataFrame:
    out = meta.iloc[index][["scope", "decision_maker", "team", "window_start", "window_end"]].copy()
    out.insert(0, "check_kind", kind)
    out["n"] = meta["n_decisions"].to_numpy()[index]
    return out.reset_index(drop=True)


def std_scale(w: StoredWindows, col: int) -> np.ndarray:
    """sd(x_col) / sd(Ys) per window: turns a raw weight into a standardised one."""
    k = len(w.fits.names)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(w.moments.comoment[:, col, col] / w.moments.comoment[:, k, k])
