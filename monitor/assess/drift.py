"""Weight drift: did a decision-maker's (or team's) weight on a cue move?

Each window is compared with the latest window of the same series that ends at least a
window length earlier (so the two do not overlap), by a Wald test of the weight change:
one verdict per cue (a categorical cue's joint test over its dummies, its levels as
``level_detail`` rows beneath), at the drift control limit, with a change-point
estimate ("since when?") for each flagged row.  A forbidden cue's drift is reported and
never flagged: the forbidden-cue check watches that weight.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.assess.stored import FINDING_COLUMNS, JOINT, StoredWindows, base_rows, std_scale
from monitor.config import Config
from monitor.stats.design import cue_columns, cue_of, level_of
from monitor.stats.limits import normal_half_width
from monitor.stats.monitoring import drift_limit
from monitor.stats.trends import change_point, cue_drift, weight_drift

FORBIDDEN_DRIFT = "a forbidden cue: its weight is watched by the forbidden-cue check, not by drift"


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
            rows = base_rows(w.meta, cur, "drift")
            scale = std_scale(w, j)[cur]
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
    joint = base_rows(w.meta, cur, "drift")
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
    rows = base_rows(w.meta, cur, "drift")
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
