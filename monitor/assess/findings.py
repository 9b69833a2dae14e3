"""Evaluate the policy checks on the stored window fits.

Reads the window statistics that `refit` stored, re-derives each window's judge model
from its sufficient statistics (``lens.fit_lens``), and runs the checks of
``policy``: forbidden-cue use (direct and through proxies, with Benjamini-Hochberg
control across decision-makers and forbidden cues of each window end), weight drift
between non-overlapping windows, consistency and achievement floors.  The result is
one row per (check, series, cue level, window): the ``policy_findings`` table.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from monitor.config import Config
from monitor.stats.design import cue_columns, cue_of, level_of
from monitor.stats.lens import LensFits, fit_lens
from monitor.stats.limits import normal_half_width
from monitor.stats.moments import Moments
from monitor.stats.monitoring import drift_limit, forbidden_cue_limit
from monitor.stats.policy import flag_forbidden, forbidden_cue_decomposition
from monitor.stats.trends import (
    achievement_floor,
    change_point,
    consistency_floor,
    cue_drift,
    weight_drift,
)

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
FORBIDDEN_DRIFT = "a forbidden cue: its weight is watched by the forbidden-cue check, not by drift"


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


def _base_rows(meta: pd.DataFrame, index: np.ndarray, kind: str) -> pd.DataFrame:
    out = meta.iloc[index][["scope", "decision_maker", "team", "window_start", "window_end"]].copy()
    out.insert(0, "check_kind", kind)
    out["n"] = meta["n_decisions"].to_numpy()[index]
    return out.reset_index(drop=True)


def _std_scale(w: StoredWindows, col: int) -> np.ndarray:
    """sd(x_col) / sd(Ys) per window: turns a raw weight into a standardised one."""
    k = len(w.fits.names)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(w.moments.comoment[:, col, col] / w.moments.comoment[:, k, k])


def _forbidden_rows(w: StoredWindows, idx: np.ndarray, d, fl, flp) -> list[pd.DataFrame]:
    """The rows of one forbidden cue: per kind (direct, proxy) one verdict row per
    window; a categorical cue's verdict row (level NULL) carries the reference-invariant
    size and the joint test, and its levels follow as ``level_detail`` rows with their
    own figures and no verdict of their own."""
    names = list(w.fits.names)
    base = w.meta.iloc[idx].reset_index(drop=True)
    single = len(d.columns) == 1
    out = []
    for kind in ("forbidden_direct", "forbidden_proxy"):
        direct = kind == "forbidden_direct"
        verdict = {
            "p_value": fl.p_value if direct else flp.proxy_p_value,
            "q_value": fl.q_value if direct else flp.proxy_q_value,
            "statistic": d.joint_F if direct else d.indirect_joint_F,
            "flagged": fl.flagged if direct else flp.proxy_flagged,
        }
        if not single:
            rows = _base_rows(base, np.arange(len(idx)), kind)
            rows["cue"], rows["level"], rows["level_detail"] = d.cue, None, False
            rows["std_weight"] = d.cue_direct_size
            rows["std_indirect"] = d.cue_indirect_size
            for col, values in verdict.items():
                rows[col] = values
            rows["assessable"] = fl.assessable
            rows["reason"] = [r or None for r in d.reason]
            out.append(rows)
        for j, column in enumerate(d.columns):
            scale = _std_scale(w, names.index(column))[idx]
            rows = _base_rows(base, np.arange(len(idx)), kind)
            rows["cue"], rows["level"], rows["level_detail"] = d.cue, level_of(column), not single
            rows["disparity"] = d.disparity[:, j]
            rows["direct"] = d.direct[:, j]
            rows["indirect"] = d.indirect[:, j]
            rows["std_disparity"] = d.std_disparity[:, j]
            rows["std_weight"] = d.std_direct[:, j]
            rows["std_indirect"] = d.std_indirect[:, j]
            low, high = (
                (d.direct_ci_low, d.direct_ci_high)
                if direct
                else (d.indirect_ci_low, d.indirect_ci_high)
            )
            rows["ci_low"], rows["ci_high"] = low[:, j] * scale, high[:, j] * scale
            if single:
                for col, values in verdict.items():
                    rows[col] = values
            else:  # a level's own test; the verdict is the cue's row above
                rows["p_value"] = d.direct_p[:, j] if direct else d.indirect_p[:, j]
                rows["q_value"] = np.nan
                rows["statistic"] = np.nan
                rows["flagged"] = None
            rows["assessable"] = fl.assessable
            rows["reason"] = [r or None for r in d.reason]
            out.append(rows)
    return out


def forbidden_findings(config: Config, w: StoredWindows) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Direct and proxy findings for every decision-maker window and forbidden cue."""
    idx = np.flatnonzero(w.meta["scope"].to_numpy() == "decision_maker")
    if not len(idx) or not config.policy.forbidden:
        return pd.DataFrame(columns=FINDING_COLUMNS), pd.DataFrame(columns=PROXY_COLUMNS)
    sub_m, sub_f = w.moments.take(idx), w.fits.take(idx)
    decomps = [forbidden_cue_decomposition(sub_m, sub_f, cue) for cue in config.policy.forbidden]
    # One evaluation family per window end: all decision-makers x forbidden cues.
    ends = w.meta["window_end"].to_numpy()[idx]
    family = pd.factorize(ends)[0]
    tol = config.policy.tolerance
    limit = forbidden_cue_limit(config.policy, config.windows)
    rule = {
        "fdr": config.policy.fdr,
        "family": family,
        "p_limit": None if limit is None else limit.p_limit,
    }
    flags = flag_forbidden(decomps, tolerance=tol, **rule)
    proxy_tol = config.policy.proxy_tolerance or tol
    if proxy_tol != tol:
        flags_proxy = flag_forbidden(decomps, tolerance=proxy_tol, **rule)
    else:
        flags_proxy = flags
    frames, proxies = [], []
    for d, fl, flp in zip(decomps, flags, flags_proxy, strict=True):
        frames += _forbidden_rows(w, idx, d, fl, flp)
        for j, column in enumerate(d.columns):
            for pi, proxy in enumerate(d.proxies):
                proxies.append(
                    pd.DataFrame(
                        {
                            "decision_maker": w.meta["decision_maker"].to_numpy()[idx],
                            "cue": d.cue,
                            "level": level_of(column),
                            "window_end": ends,
                            "proxy_cue": proxy,
                            "part": d.proxy_parts[:, j, pi],
                            "std_part": d.std_proxy_parts[:, j, pi],
                        }
                    )
                )
    proxy_rows = (
        pd.concat(proxies, ignore_index=True) if proxies else pd.DataFrame(columns=PROXY_COLUMNS)
    )
    return pd.concat(frames, ignore_index=True), proxy_rows


def _previous_window(meta: pd.DataFrame, length_days: int) -> np.ndarray:
    """For each window, the index of the latest window of the same series that ends at
    least ``length_days`` earlier (so the two do not overlap), or -1."""
    prev = np.full(len(meta), -1)
    ends = pd.to_datetime(meta["window_end"]).to_numpy()
    gap = np.timedelta64(length_days, "D")
    for _, g in meta.groupby(["scope", "decision_maker"], sort=False).indices.items():
        e = ends[g]
        pos = np.searchsorted(e, e - gap, side="right") - 1
        prev[g] = np.where(pos >= 0, g[np.clip(pos, 0, None)], -1)
    return prev


def drift_findings(config: Config, w: StoredWindows) -> pd.DataFrame:
    """Wald tests of weight change against the previous non-overlapping window of the
    same series: one verdict per cue (a categorical cue's joint test over its dummies,
    with its levels as ``level_detail`` rows beneath), and the joint test over all cues
    (reported, not alerted)."""
    prev = _previous_window(w.meta, config.windows.length_days)
    cur = np.flatnonzero(prev >= 0)
    if not len(cur):
        return pd.DataFrame(columns=FINDING_COLUMNS)
    first, second = w.fits.take(cur), w.fits.take(prev[cur])
    # Both windows of a pair must reach the policy's minimum to be assessed.
    n_all = w.meta["n_decisions"].to_numpy(dtype=float)
    both_large = np.minimum(n_all[cur], n_all[prev[cur]]) >= config.policy.min_rows
    drift = weight_drift(first, second)
    limit = drift_limit(config.policy, config.windows)
    # Calibrated rule: the control limit's p (flag when p <= it); else the fixed alpha.
    alpha = config.policy.drift_alpha if limit is None else np.nextafter(limit.p_limit, 1.0)
    min_std = config.policy.drift_min_std_change
    frames = []
    names = list(w.fits.names)
    for cue in dict.fromkeys(cue_of(n) for n in names):
        columns = cue_columns(names, cue)
        single = len(columns) == 1
        # A forbidden cue's weight is watched by the forbidden-cue check (is it non-zero?);
        # a second check on the same weight (did it move?) would double its false-alarm
        # budget, so its drift is reported, never flagged.
        watched = cue in config.policy.forbidden
        levels = []
        for j in columns:
            rows = _base_rows(w.meta, cur, "drift")
            scale = _std_scale(w, j)[cur]
            rows["cue"], rows["level"] = cue, level_of(names[j])
            rows["level_detail"] = not single
            rows["direct"] = drift.change[:, j]
            rows["std_weight"] = drift.change[:, j] * scale
            half = normal_half_width(drift.std_error[:, j] * scale, 0.05)
            rows["ci_low"] = rows["std_weight"] - half
            rows["ci_high"] = rows["std_weight"] + half
            rows["p_value"] = drift.p_value[:, j]
            rows["statistic"] = drift.z[:, j]
            ok = np.isfinite(drift.p_value[:, j]) & both_large
            rows["assessable"] = ok
            rows["reason"] = [r or None for r in drift.reason]
            if single and watched:
                rows["flagged"] = False
                rows["reason"] = [_joined(r, FORBIDDEN_DRIFT) for r in drift.reason]
            elif single:
                with np.errstate(invalid="ignore"):
                    rows["flagged"] = (
                        ok
                        & (drift.p_value[:, j] < alpha)
                        & (np.abs(rows["std_weight"].to_numpy()) >= min_std)
                    )
                _since_when(rows, w, cur, [j], config.windows.length_days)
            else:
                rows["flagged"] = None
            levels.append(rows)
        if not single:
            verdict = _cue_drift_row(
                w,
                cur,
                first,
                second,
                columns,
                cue,
                alpha,
                min_std,
                both_large,
                drift.reason,
                config.windows.length_days,
                watched,
            )
            frames.append(verdict)
        frames += levels
    joint = _base_rows(w.meta, cur, "drift")
    joint["cue"] = JOINT
    joint["level"] = None
    joint["level_detail"] = False
    joint["p_value"] = drift.joint_p
    joint["statistic"] = drift.joint_stat
    joint["flagged"] = False  # reported, not alerted: per-cue findings are actionable
    joint["assessable"] = np.isfinite(drift.joint_p)
    joint["reason"] = [r or None for r in drift.reason]
    frames.append(joint)
    return pd.concat(frames, ignore_index=True)


def _cue_drift_row(
    w, cur, first, second, columns, cue, alpha, min_std, both_large, reason, length, watched
) -> pd.DataFrame:
    """A categorical cue's drift verdict: the joint Wald test over its dummies, sized by
    the reference-invariant change sqrt(d' S d) / sd(Ys) (S the dummies' covariance in
    the current window: the spread of the judgment the change moves).  ``watched``: a
    forbidden cue, reported and never flagged (see ``drift_findings``)."""
    stat, df, p = cue_drift(first, second, columns)
    rows = _base_rows(w.meta, cur, "drift")
    rows["cue"], rows["level"], rows["level_detail"] = cue, None, False
    idx = np.asarray(columns)
    k = len(w.fits.names)
    co = w.moments.comoment[cur]
    change = np.nan_to_num(first.weights[:, idx] - second.weights[:, idx])
    with np.errstate(invalid="ignore", divide="ignore"):
        spread = np.einsum("mi,mij,mj->m", change, co[:, idx][:, :, idx], change)
        size = np.sqrt(np.maximum(spread, 0.0) / co[:, k, k])
    size = np.where(np.isfinite(p), size, np.nan)
    rows["std_weight"] = size
    rows["p_value"], rows["statistic"] = p, stat
    ok = np.isfinite(p) & both_large
    rows["assessable"] = ok
    if watched:
        rows["flagged"] = False
        rows["reason"] = [_joined(r, FORBIDDEN_DRIFT) for r in reason]
        return rows
    with np.errstate(invalid="ignore"):
        rows["flagged"] = ok & (p < alpha) & (size >= min_std)
    rows["reason"] = [r or None for r in reason]
    _since_when(rows, w, cur, list(columns), length)
    return rows


def _joined(reason: str, note: str) -> str:
    return f"{reason}; {note}" if reason else note


def _floor_interval(rows: pd.DataFrame, check) -> None:
    """The floor check's interval (and bias-adjusted estimate) beside its statistic."""
    if check.ci_low is not None:
        rows["std_weight"] = check.estimate
        rows["ci_low"], rows["ci_high"] = check.ci_low, check.ci_high


def _since_when(
    rows: pd.DataFrame, w: StoredWindows, cur: np.ndarray, columns: list[int], length: int
) -> None:
    """For each flagged drift row, when the weight most likely changed (change-point
    estimate and interval over the series' windows up to that one).  For a categorical
    cue the level whose weight moved most (largest |change| / SE) stands for the cue."""
    out = {c: [pd.NaT] * len(rows) for c in ("change_day", "change_low", "change_high")}
    flagged = np.flatnonzero(rows["flagged"].to_numpy(dtype=bool))
    if len(flagged):
        meta = w.meta
        ends = pd.to_datetime(meta["window_end"]).to_numpy().astype("datetime64[D]")
        day = ends.astype(np.int64)
        series = (meta["scope"] + "\x1f" + meta["decision_maker"]).to_numpy()
        for r in flagged:
            i = cur[r]
            same = np.flatnonzero((series == series[i]) & (day <= day[i]))
            j = _moved_most(w, same, columns)
            cp = change_point(
                day[same], w.fits.weights[same, j], w.fits.std_errors[same, j], length
            )
            for col, value in zip(out, (cp.day, cp.low, cp.high), strict=True):
                if np.isfinite(value):
                    out[col][r] = pd.Timestamp(np.datetime64(int(value), "D"))
    for col, values in out.items():
        rows[col] = pd.to_datetime(pd.Series(values, dtype="datetime64[ns]")).dt.date.to_numpy()


def _moved_most(w: StoredWindows, series: np.ndarray, columns: list[int]) -> int:
    """Of ``columns``, the one whose weight changed most between the series' first and
    last window, in units of its last standard error."""
    if len(columns) == 1:
        return columns[0]
    b, se = w.fits.weights[series][:, columns], w.fits.std_errors[series][:, columns]
    with np.errstate(invalid="ignore", divide="ignore"):
        moved = np.abs(b[-1] - b[0]) / se[-1]
    return columns[int(np.nanargmax(np.where(np.isfinite(moved), moved, -1.0)))]


def floor_findings(config: Config, w: StoredWindows) -> pd.DataFrame:
    """Consistency and achievement below their floors.  Under the calibrated rule the
    floor is crossed when the figure's interval (at the forbidden-cue checks' control
    limit) lies wholly below it."""
    pol = config.policy
    limit = forbidden_cue_limit(pol, config.windows)
    z = None if limit is None else limit.z
    idx = np.flatnonzero(w.meta["scope"].to_numpy() == "decision_maker")
    frames = []
    stored = w.fits.take(idx)
    meta = w.meta.iloc[idx].reset_index(drop=True)
    if pol.consistency_floor is not None:
        r_s = meta["R_s"].to_numpy(dtype=float)
        check = consistency_floor(
            _with(stored, R_s=r_s), floor=pol.consistency_floor, min_rows=pol.min_rows, z=z
        )
        rows = _base_rows(meta, np.arange(len(idx)), "consistency")
        rows["cue"], rows["level"], rows["statistic"] = "R_s", None, r_s
        _floor_interval(rows, check)
        rows["flagged"], rows["assessable"] = check.flagged, check.assessable
        frames.append(rows)
    if pol.achievement_floor is not None:
        r_a = meta["r_a"].to_numpy(dtype=float)
        n_linked = meta["n_linked"].to_numpy(dtype=float)
        check = achievement_floor(
            _with(stored, r_a=r_a, n_linked=n_linked),
            floor=pol.achievement_floor,
            min_linked=pol.achievement_min_linked,
            z=z,
        )
        rows = _base_rows(meta, np.arange(len(idx)), "achievement")
        rows["n"] = n_linked.astype(int)
        rows["cue"], rows["level"], rows["statistic"] = "r_a", None, r_a
        _floor_interval(rows, check)
        rows["flagged"], rows["assessable"] = check.flagged, check.assessable
        frames.append(rows)
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=FINDING_COLUMNS)


def _with(fits: LensFits, **arrays) -> LensFits:
    from dataclasses import replace

    return replace(fits, **arrays)


def evaluate(con, config: Config) -> tuple[pd.DataFrame, pd.DataFrame]:
    """All findings on the stored fits: (policy_findings rows, policy_proxy_parts rows)."""
    w = load_windows(con, config)
    forbidden, proxies = forbidden_findings(config, w)
    parts = [forbidden, drift_findings(config, w), floor_findings(config, w)]
    parts = [p for p in parts if len(p)]
    findings = (
        pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=FINDING_COLUMNS)
    )
    findings = findings.reindex(columns=FINDING_COLUMNS)
    findings["level_detail"] = findings["level_detail"].astype("boolean").fillna(False)
    findings["level_detail"] = findings["level_detail"].astype(bool)
    _below_policy_minimum(findings, config.policy.min_rows)
    return findings, proxies


def _below_policy_minimum(findings: pd.DataFrame, min_rows: int) -> None:
    """Windows with fewer decisions than the policy's minimum keep their estimates but
    are not assessed: never flagged, with the reason beside them."""
    n = pd.to_numeric(findings["n"], errors="coerce").to_numpy(dtype=float)
    small = (n < min_rows) & (findings["check_kind"] != "achievement").to_numpy()
    if not small.any():
        return
    detail = findings["level_detail"].fillna(False).astype(bool).to_numpy()
    findings.loc[small & ~detail, "flagged"] = False
    findings.loc[small, "assessable"] = False
    note = f"below the policy minimum of {min_rows} decisions: shown, not assessed"
    old = findings.loc[small, "reason"]
    findings.loc[small, "reason"] = [
        f"{r}; {note}" if isinstance(r, str) and r else note for r in old
    ]
