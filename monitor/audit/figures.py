"""The audit tables' figures, computed from one export's rows (no I/O, no SQL).

Input is ``audit.QuarterRows`` (decision-id order) and the alert frames; output is a
list of ``audit_formats.Table``.  Quarter fits are QR fits on the raw rows
(``lens.fit_lens_rows``) per decision-maker, team and for all; rolling windows use the
moment path (``lens.fit_lens``) with the QR fallback where conditioning is poor.
"""

from __future__ import annotations

import warnings
from datetime import date, timedelta

import numpy as np
import pandas as pd

from monitor.audit.formats import Table, make_table, spec, table_from_columns
from monitor.config import Config
from monitor.stats.design import cue_of
from monitor.stats.lens import CUE_FIGURES, LENS_FIGURES, fit_lens_or_rows
from monitor.stats.moments import Moments, moments_from_rows
from monitor.stats.monitoring import forbidden_cue_limit
from monitor.stats.policy import flag_forbidden, forbidden_cue_decomposition

DM_COLUMNS = (
    "scope:str decision_maker:str team:str n_decisions:int n_linked:int R_s R_e r_a G C "
    "model_of_judge_r window_start:date window_end:date R_s_linked reason:str"
)
CUE_COLUMNS = (
    "scope:str decision_maker:str cue:str weight std_error ci_low ci_high std_weight "
    "utilization_r validity_r p_value estimable:bool n_decisions:int t_value env_weight reason:str"
)
# Intervals stand on the scale of the figure beside them: ci_low / ci_high around the
# standardised weight, direct_ci_low / direct_ci_high around the raw direct weight,
# indirect_ci_low / indirect_ci_high around the standardised indirect part.
FORBIDDEN_COLUMNS = (
    "decision_maker:str cue:str disparity direct indirect std_weight ci_low ci_high q_value "
    "flagged:bool n:int direct_se direct_ci_low direct_ci_high p_value std_disparity "
    "std_indirect indirect_ci_low indirect_ci_high indirect_se indirect_p indirect_q_value "
    "proxy_flagged:bool joint_p_value assessable:bool reason:str level_detail:bool"
)
LOGIT_COLUMNS = (
    "scope:str decision_maker:str cue:str coef std_error z_value p_value odds_ratio or_ci_low "
    "or_ci_high n:int estimable:bool reason:str"
)
SUMMARY_FIGURES = ("R_s", "r_a", "G")


def _texts(values) -> list[str | None]:
    return [str(v) if v else None for v in values]


def groups_of(f: pd.DataFrame) -> list[tuple[str, str, str | None, np.ndarray]]:
    """(scope, key, team, mask) for every decision-maker, team and 'all', sorted."""
    out = []
    for dm in sorted(f["decision_maker"].unique()):
        mask = (f["decision_maker"] == dm).to_numpy()
        teams = f.loc[mask, "team"]
        out.append(("decision_maker", str(dm), teams.iloc[-1] if len(teams) else None, mask))
    for team in sorted(t for t in f["team"].dropna().unique()):
        out.append(("team", str(team), str(team), (f["team"] == team).to_numpy()))
    out.append(("all", "all", None, np.ones(len(f), dtype=bool)))
    return out


def fit_masks(x, ys, ye, masks, names, min_rows: int):
    """Lens fits of the row subsets ``masks`` (one window each) and their all-rows
    moments over (x, Ys).

    The moments come from the rows in their fixed order (deterministic); windows whose
    conditioning is poor are refitted from their rows by QR, as the refit stage does.
    """
    z = np.column_stack([x, ys, ye])
    k = len(names)
    alls = _stack_moments([moments_from_rows(z[m][:, : k + 1]) for m in masks])
    links = _stack_moments([moments_from_rows(z[m & np.isfinite(ye)]) for m in masks])
    fits, _ = fit_lens_or_rows(
        alls,
        links,
        names,
        min_rows=min_rows,
        rows_of=lambda i: (x[masks[i]], ys[masks[i]], ye[masks[i]]),
    )
    return fits, alls


def _stack_moments(moms: list[Moments]) -> Moments:
    return Moments(
        *(np.concatenate([getattr(m, a) for m in moms]) for a in ("n", "mean", "comoment"))
    )


def quarter_tables(config: Config, rows, span: tuple[date, date]) -> list[Table]:
    """The fitted tables of the quarter ``span`` = (first day, last day): decision_makers,
    cue_weights, forbidden_cues, window_summary, forbidden_proxy_parts and, for a 0/1
    judgment, logistic_weights.  ``rows`` is an ``audit.QuarterRows``."""
    names = list(rows.names)
    q = rows.frame[rows.in_quarter].reset_index(drop=True)
    x = rows.x(rows.in_quarter)
    ys, ye = q["judgment"].to_numpy(float), q["criterion"].to_numpy(float)
    groups = groups_of(q)
    min_rows = config.windows.min_rows
    fits, moms = fit_masks(x, ys, ye, [g[3] for g in groups], names, min_rows)
    first, last = span
    scopes, keys = [g[0] for g in groups], [g[1] for g in groups]
    m, k = len(groups), len(names)
    dm = {"scope": scopes, "decision_maker": keys, "team": [g[2] for g in groups]}
    dm |= {"n_decisions": fits.n, "n_linked": fits.n_linked, "window_start": [first] * m}
    dm |= {f: getattr(fits, f) for f in LENS_FIGURES}
    dm |= {"window_end": [last] * m, "R_s_linked": fits.R_s_linked, "reason": _texts(fits.reason)}
    cw = {"scope": np.repeat(scopes, k), "decision_maker": np.repeat(keys, k)}
    cw |= {"cue": names * m, "n_decisions": np.repeat(fits.n, k)}
    for col, field in CUE_FIGURES.items():
        cw[col] = getattr(fits, field).ravel()
    cw["reason"] = _texts(fits.cue_reason.ravel())
    makers = np.array([s == "decision_maker" for s, _, _, _ in groups])
    keys = [k for s, k, _, _ in groups if s == "decision_maker"]
    forbidden, proxies = _forbidden_tables(config, fits.take(makers), moms.take(makers), keys)
    tables = [
        table_from_columns("decision_makers", "Quarter fit per group", DM_COLUMNS, dm),
        table_from_columns("cue_weights", "Judge-model cue weights, quarter fit", CUE_COLUMNS, cw),
        forbidden,
        _window_summary(config, rows, span),
        proxies,
    ]
    if config.judgment_is_binary:
        tables.append(_logit_table(groups, x, ys, names, min_rows))
    return tables


# --- forbidden cues ----------------------------------------------------------------------


def _forbidden_tables(config: Config, fits, moms, keys: list[str]) -> tuple[Table, Table]:
    """One verdict row per decision-maker x forbidden cue, by the alerts' own rule
    (``stats.policy.flag_forbidden``: the quarter is one look, all its decision-makers
    and cues one family).  A categorical cue's verdict row (``cue`` = the cue) carries
    its reference-invariant size and joint test; its levels follow as ``level_detail``
    rows (``cue`` = the design column) with their own figures and no verdict."""
    policy = config.policy
    cols: dict[str, list] = {c: [] for c, _ in spec(FORBIDDEN_COLUMNS)}
    parts: dict[str, list] = {
        c: [] for c in ("decision_maker", "cue", "proxy_cue", "part", "std_part")
    }
    fields = {
        "disparity": "disparity",
        "direct": "direct",
        "indirect": "indirect",
        "std_weight": "std_direct",
        "direct_ci_low": "direct_ci_low",
        "direct_ci_high": "direct_ci_high",
        "direct_se": "direct_se",
        "p_value": "direct_p",
        "std_disparity": "std_disparity",
        "std_indirect": "std_indirect",
        "indirect_se": "indirect_se",
        "indirect_p": "indirect_p",
    }
    # Raw figures -> the standardised scale of std_weight (sd(column) / sd(Ys)).
    scaled = {
        "ci_low": "direct_ci_low",
        "ci_high": "direct_ci_high",
        "indirect_ci_low": "indirect_ci_low",
        "indirect_ci_high": "indirect_ci_high",
    }
    decomps = [forbidden_cue_decomposition(moms, fits, cue) for cue in policy.forbidden]
    limit = forbidden_cue_limit(policy, config.windows)
    rule = {"fdr": policy.fdr, "p_limit": None if limit is None else limit.p_limit}
    flags = flag_forbidden(decomps, tolerance=policy.tolerance, **rule)
    proxy_tol = policy.proxy_tolerance or policy.tolerance
    flags_proxy = (
        flags
        if proxy_tol == policy.tolerance
        else flag_forbidden(decomps, tolerance=proxy_tol, **rule)
    )

    def add(values: dict) -> None:
        for name in cols:
            cols[name].append(values.get(name))

    for d, fl, flp in zip(decomps, flags, flags_proxy, strict=True):
        single = len(d.columns) == 1
        for i, key in enumerate(keys):
            ok = d.reason[i] == ""
            common = {
                "decision_maker": key,
                "n": d.n[i],
                "assessable": ok,
                "reason": d.reason[i] or None,
                "joint_p_value": d.joint_p[i] if not single else np.nan,
            }
            verdict = {
                "q_value": fl.q_value[i],
                "flagged": bool(fl.flagged[i]),
                "indirect_q_value": flp.proxy_q_value[i],
                "proxy_flagged": bool(flp.proxy_flagged[i]),
                "level_detail": False,
            }
            if not single:
                add(
                    common
                    | verdict
                    | {
                        "cue": d.cue,
                        "std_weight": d.cue_direct_size[i],
                        "p_value": d.joint_p[i],
                        "std_indirect": d.cue_indirect_size[i],
                        "indirect_p": d.indirect_joint_p[i],
                    }
                )
            for j, col in enumerate(d.columns):
                row = dict(common, cue=col)
                row |= {name: getattr(d, field)[i, j] for name, field in fields.items()}
                row |= {
                    name: getattr(d, field)[i, j] * d.std_scale[i, j]
                    for name, field in scaled.items()
                }
                add(row | (verdict if single else {"level_detail": True}))
                for p, proxy in enumerate(d.proxies if ok else ()):
                    for name, v in zip(
                        parts,
                        (key, col, proxy, d.proxy_parts[i, j, p], d.std_proxy_parts[i, j, p]),
                        strict=True,
                    ):
                        parts[name].append(v)
    return (
        table_from_columns(
            "forbidden_cues",
            "Forbidden-cue use over the whole quarter: disparity = direct + indirect "
            "(one verdict per cue; a categorical cue's levels follow as detail rows)",
            FORBIDDEN_COLUMNS,
            cols,
        ),
        table_from_columns(
            "forbidden_proxy_parts",
            "Indirect use carried by each permitted cue",
            "decision_maker:str cue:str proxy_cue:str part std_part",
            parts,
        ),
    )


# --- logistic fit ----------------------------------------------------------------------------


def logit_fit(x: np.ndarray, y: np.ndarray, names: list[str], min_rows: int) -> list[tuple]:
    """Logistic regression of a 0/1 judgment on the cues (statsmodels Logit, Newton).

    Returns one (cue, coef, se, z, p, OR, OR_low, OR_high, estimable, reason) per design
    column.  Constant cues are left out (not estimable); too few rows, perfect
    separation, a singular Hessian or no convergence give NaN with the reason.
    """
    import statsmodels.api as sm
    from statsmodels.tools.sm_exceptions import PerfectSeparationError

    keep = np.ptp(x, axis=0) > 0 if len(x) else np.zeros(len(names), bool)
    k_eff = int(keep.sum())
    nan = [np.nan] * 7
    why = None
    if len(y) < max(min_rows, k_eff + 2):
        why = f"too few rows: n={len(y)}"
    elif np.ptp(y) == 0:
        why = "judgment constant"
    if why is None:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error")  # separation / non-convergence are findings
                res = sm.Logit(y, sm.add_constant(x[:, keep], has_constant="add")).fit(
                    method="newton", maxiter=100, disp=0
                )
            if not res.mle_retvals.get("converged", True):
                why = "did not converge"
        except (PerfectSeparationError, np.linalg.LinAlgError, Warning) as exc:
            why = f"not estimable: {str(exc).splitlines()[0][:120] or type(exc).__name__}"
    out, at = [], 1
    for j, cue in enumerate(names):
        if not keep[j]:
            out.append((cue, *nan, False, "constant in quarter"))
            continue
        if why is not None:
            out.append((cue, *nan, False, why))
            continue
        b, se = float(res.params[at]), float(res.bse[at])
        lo, hi = res.conf_int()[at]
        out.append(
            (
                cue,
                b,
                se,
                float(res.tvalues[at]),
                float(res.pvalues[at]),
                np.exp(b),
                np.exp(lo),
                np.exp(hi),
                True,
                None,
            )
        )
        at += 1
    return out


def _logit_table(groups, x, ys, names, min_rows) -> Table:
    rows = []
    for scope, key, _, m in groups:
        for cue, *fig, est, why in logit_fit(x[m], ys[m], names, min_rows):
            rows.append((scope, key, cue, *fig, int(m.sum()), est, why))
    return make_table(
        "logistic_weights",
        "Logistic fit of the binary judgment (odds ratios)",
        spec(LOGIT_COLUMNS),
        rows,
    )


# --- rolling windows -----------------------------------------------------------------------


def window_ends(config: Config, first: date, last: date) -> list[date]:
    """Window end dates aligned to ``windows.origin`` every ``step_days`` in [first, last]."""
    w = config.windows
    origin = date.fromisoformat(w.origin)
    step = w.step_days
    k = -((origin - first).days // step)  # ceil((first - origin) / step)
    out, end = [], origin + timedelta(days=k * step)
    while end <= last:
        out.append(end)
        end += timedelta(days=step)
    return out


def _window_summary(config: Config, rows, span) -> Table:
    """Per group: the quarter's rolling windows (ending in the quarter) in a few figures."""
    f = rows.frame
    names = list(rows.names)
    x, ys, ye = rows.x(), f["judgment"].to_numpy(float), f["criterion"].to_numpy(float)
    # Day ordinals as int64: comparing arrays of date objects is ~50x slower.
    day = np.fromiter((d.toordinal() for d in f["day"]), dtype=np.int64, count=len(f))
    ends = window_ends(config, *span)
    length = config.windows.length_days
    groups = groups_of(f)
    plan = []
    for g, (_, _, _, mask) in enumerate(groups):
        for end in ends:
            e = end.toordinal()
            m = mask & (day > e - length) & (day <= e)
            if m.any():
                plan.append((g, end, m))
    forbidden = [j for j, n in enumerate(names) if cue_of(n) in config.policy.forbidden]
    out = []
    if plan:
        masks = [p[2] for p in plan]
        fits, _ = fit_masks(x, ys, ye, masks, names, config.windows.min_rows)
        g_of = np.array([p[0] for p in plan])
        for g, (scope, key, _, _) in enumerate(groups):
            at = np.flatnonzero(g_of == g)
            if not len(at):
                continue
            row = [
                scope,
                key,
                len(at),
                int(np.isfinite(fits.R_s[at]).sum()),
                plan[at[0]][1],
                plan[at[-1]][1],
                int(fits.n[at].min()),
                int(fits.n[at].max()),
            ]
            for fig in SUMMARY_FIGURES:
                v = getattr(fits, fig)[at]
                v = v[np.isfinite(v)]
                row += [v.min(), np.median(v), v.max()] if len(v) else [None] * 3
            sw = np.abs(fits.std_weights[at][:, forbidden]) if forbidden else np.zeros((0,))
            row.append(np.nanmax(sw) if np.isfinite(sw).any() else None)
            out.append(row)
    cols = spec(
        "scope:str decision_maker:str n_windows:int n_windows_fitted:int first_window_end:date "
        "last_window_end:date min_n_decisions:int max_n_decisions:int"
    )
    cols += [(f"{fig}_{s}", "float") for fig in SUMMARY_FIGURES for s in ("min", "median", "max")]
    cols += [("max_abs_forbidden_std_weight", "float")]
    return make_table("window_summary", "Rolling windows ending in the quarter", cols, out)
