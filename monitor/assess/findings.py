"""Evaluate the policy checks on the stored window fits.

Reads the window statistics that `refit` stored, re-derives each window's judge model
from its sufficient statistics (``lens.fit_lens``), and runs the checks of
``policy``: forbidden-cue use (direct and through proxies, with Benjamini-Hochberg
control across decision-makers and forbidden cues of each window end), weight drift
between non-overlapping windows (``monitor.assess.drift``), consistency and
achievement floors.  Reading the stored windows: ``monitor.assess.stored``.  The result is
one row per (check, series, cue level, window): the ``policy_findings`` table.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.assess.drift import drift_findings
from monitor.assess.stored import (
    FINDING_COLUMNS,
    PROXY_COLUMNS,
    StoredWindows,
    base_rows,
    load_windows,
    std_scale,
)
from monitor.config import Config
from monitor.stats.design import level_of
from monitor.stats.lens import LensFits
from monitor.stats.monitoring import forbidden_cue_limit
from monitor.stats.policy import flag_forbidden, forbidden_cue_decomposition
from monitor.stats.trends import achievement_floor, consistency_floor


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
            rows = base_rows(base, np.arange(len(idx)), kind)
            rows["cue"], rows["level"], rows["level_detail"] = d.cue, None, False
            rows["std_weight"] = d.cue_direct_size
            rows["std_indirect"] = d.cue_indirect_size
            for col, values in verdict.items():
                rows[col] = values
            rows["assessable"] = fl.assessable
            rows["reason"] = [r or None for r in d.reason]
            out.append(rows)
        for j, column in enumerate(d.columns):
            scale = std_scale(w, names.index(column))[idx]
            rows = base_rows(base, np.arange(len(idx)), kind)
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


def _floor_interval(rows: pd.DataFrame, check) -> None:
    """The floor check's interval (and bias-adjusted estimate) beside its statistic."""
    if check.ci_low is not None:
        rows["std_weight"] = check.estimate
        rows["ci_low"], rows["ci_high"] = check.ci_low, check.ci_high


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
        rows = base_rows(meta, np.arange(len(idx)), "consistency")
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
        rows = base_rows(meta, np.arange(len(idx)), "achievement")
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
