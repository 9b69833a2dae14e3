"""Everything the oversight dashboard reads, shaped as plain DataFrames and dataclasses.

Each function opens one short-lived read-only connection (``Store.reader``), runs its
queries and closes it, so the nightly writer is never kept waiting for long.  None of
them imports Streamlit: the pages only lay out what these return, and the tests call
them directly.  A busy store raises ``monitor.store.connection.StoreBusy`` (the caller decides
how long to retry); a missing store raises ``StoreMismatch``.

The data-health page, the audit pack and launching the app live in
``monitor.dashboard.health``, ``monitor.dashboard.download`` and
``monitor.dashboard.start``.
"""

from __future__ import annotations

import hmac
import os
import time
from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.cautions import CAUTION
from monitor.config import Config
from monitor.dashboard.reads import read_frames
from monitor.store.connection import StoreBusy

LENS_FIGURES = {
    "r_a": "achievement r_a",
    "R_s": "consistency R_s",
    "R_e": "environment predictability R_e",
    "G": "matching G",
    "C": "unmodelled agreement C",
    "model_of_judge_r": "model of the judge G·R_e",
}
OPEN_STATES = ("open", "acknowledged")


def store_stamp(config: Config) -> tuple[float, float]:
    """Modification times of the store file and its write-ahead log (0 when absent);
    a cache key that changes whenever a writer has committed something."""
    path = Path(config.store.path)
    wal = path.with_name(path.name + ".wal")
    return tuple(p.stat().st_mtime if p.exists() else 0.0 for p in (path, wal))  # type: ignore[return-value]


def forbidden_design_columns(config: Config) -> set[str]:
    """Design columns ("cue" or "cue=level") that belong to a forbidden cue."""
    groups = config.design_groups()
    names = config.design_columns()
    return {names[i] for cue in config.policy.forbidden for i in groups[cue]}


# --- overview ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Overview:
    """The latest window of every series within a period.

    ``rows``: one row per series (scope decision_maker, team, all) with n_decisions,
    n_linked, R_s, R_e, r_a, G, C, model_of_judge_r, window_start/end, R_s_trend (the
    series' defined R_s values over the period's windows, oldest first), open_alerts and
    why (the open or acknowledged alerts as "kind cue" text).  ``flagged``:
    decision-makers with an open or acknowledged alert and why, most alerts first.
    ``period``: the window ends used; ``span``: the first and last stored window end
    (None before the first refit); ``teams``: every team with fits.
    """

    rows: pd.DataFrame
    flagged: pd.DataFrame
    period: tuple[date, date] | None
    span: tuple[date, date] | None
    teams: list[str]


def window_range(config: Config) -> tuple[date, date] | None:
    """First and last stored window end, or None before the first refit."""
    (df,) = read_frames(config, (_SPAN_SQL, []))
    return _span(df)


_SPAN_SQL = "SELECT min(window_end) AS lo, max(window_end) AS hi FROM fits"
_TEAMS_SQL = "SELECT DISTINCT decision_maker FROM fits WHERE scope = 'team' ORDER BY 1"


def _span(df: pd.DataFrame) -> tuple[date, date] | None:
    if df.empty or pd.isna(df["lo"].iloc[0]):
        return None
    return pd.Timestamp(df["lo"].iloc[0]).date(), pd.Timestamp(df["hi"].iloc[0]).date()


def teams(config: Config) -> list[str]:
    (df,) = read_frames(config, (_TEAMS_SQL, []))
    return df["decision_maker"].tolist()


def decision_makers(config: Config, team: str | None = None) -> pd.DataFrame:
    """decision_maker, team for every decision-maker with stored fits (of ``team``)."""
    sql = "SELECT DISTINCT decision_maker, team FROM fits WHERE scope = 'decision_maker'"
    params: list = []
    if team:
        sql, params = sql + " AND team = ?", [team]
    (df,) = read_frames(config, (sql + " ORDER BY decision_maker", params))
    return df


def overview(
    config: Config, period: tuple[date, date] | None = None, team: str | None = None
) -> Overview:
    """The page's data in one short connection; ``period`` None means every stored
    window.  Reads only the fits and alerts tables (never raw decisions), so its cost
    does not grow with the number of decisions stored."""
    lo, hi = period if period else (date.min, date.max)
    series_filter = "TRUE"
    params: list = [lo, hi]
    if team:
        series_filter = (
            "(scope = 'all' OR (scope = 'team' AND decision_maker = ?) "
            "OR (scope = 'decision_maker' AND team = ?))"
        )
        params += [team, team]
    fits_sql = f"""
        WITH f AS (
            SELECT scope, decision_maker, team, window_start, window_end, n_decisions, n_linked,
                   R_s, R_e, r_a, G, C, model_of_judge_r, reason
            FROM fits WHERE window_end BETWEEN ? AND ? AND {series_filter}),
        trend AS (
            SELECT scope, decision_maker,
                   list(R_s ORDER BY window_end) FILTER (WHERE isfinite(R_s)) AS R_s_trend
            FROM f GROUP BY scope, decision_maker)
        SELECT f.*, trend.R_s_trend FROM f JOIN trend USING (scope, decision_maker)
        QUALIFY row_number() OVER (PARTITION BY f.scope, f.decision_maker
                                   ORDER BY f.window_end DESC) = 1"""
    alerts_sql = """
        SELECT scope, decision_maker, count(*) AS open_alerts,
               string_agg(kind || coalesce(' ' || cue, ''), '; ' ORDER BY alert_id) AS why
        FROM alerts WHERE state IN ('open', 'acknowledged') GROUP BY scope, decision_maker"""
    fits, alerts, span, team_df = read_frames(
        config, (fits_sql, params), (alerts_sql, []), (_SPAN_SQL, []), (_TEAMS_SQL, [])
    )
    rows = fits.merge(alerts, on=["scope", "decision_maker"], how="left")
    rows["open_alerts"] = rows["open_alerts"].fillna(0).astype(int)
    rows["why"] = rows["why"].fillna("")
    # Windows where R_s is undefined are left out of the sparkline (it cannot draw gaps).
    rows["R_s_trend"] = rows["R_s_trend"].apply(
        lambda v: [] if v is None else [float(x) for x in v]
    )
    order = {"decision_maker": 0, "team": 1, "all": 2}
    rows = rows.sort_values(
        ["scope", "decision_maker"], key=lambda s: s.map(order) if s.name == "scope" else s
    ).reset_index(drop=True)
    people = rows[(rows["scope"] == "decision_maker") & (rows["open_alerts"] > 0)]
    flagged = people[["decision_maker", "team", "open_alerts", "why"]].sort_values(
        ["open_alerts", "decision_maker"], ascending=[False, True]
    )
    return Overview(
        rows=rows,
        flagged=flagged.reset_index(drop=True),
        period=tuple(period) if period else _span(span),
        span=_span(span),
        teams=team_df["decision_maker"].tolist(),
    )


# --- one decision-maker ---------------------------------------------------------------------


@dataclass(frozen=True)
class PersonHistory:
    """One decision-maker's windows.

    ``weights``: long frame, one row per (window_end, cue) with weight, std_weight,
    std_ci_low/std_ci_high (the weight's t interval rescaled by the same factor as the
    standardised weight, sd(x)/sd(Ys)), estimable, reason, forbidden and team_median
    (median standardised weight of the same cue over the team's decision-makers in that
    window; NaN without a team).  ``lens``: one row per (window_end, figure) with value,
    n_decisions and n_linked.  ``alert_spans``: alert_id, kind, cue, state, start, end
    (window ends; an unresolved alert runs to the last window).  ``latest``: the
    newest window's rows of ``weights``.
    """

    decision_maker: str
    team: str | None
    weights: pd.DataFrame
    lens: pd.DataFrame
    alert_spans: pd.DataFrame
    latest: pd.DataFrame


def person_history(config: Config, decision_maker: str) -> PersonHistory:
    weights_sql = """
        SELECT c.window_end, c.cue_index, c.cue, c.weight, c.std_error, c.ci_low, c.ci_high,
               c.std_weight, c.p_value, c.utilization_r, c.validity_r, c.estimable, c.reason,
               f.team, f.n_decisions
        FROM cue_weights c JOIN fits f USING (scope, decision_maker, window_end)
        WHERE c.scope = 'decision_maker' AND c.decision_maker = ?
        ORDER BY c.window_end, c.cue_index"""
    median_sql = """
        SELECT c.window_end, c.cue, median(c.std_weight) AS team_median
        FROM cue_weights c JOIN fits f USING (scope, decision_maker, window_end)
        WHERE c.scope = 'decision_maker' AND f.team = (
            SELECT any_value(team) FROM fits
            WHERE scope = 'decision_maker' AND decision_maker = ?)
        GROUP BY c.window_end, c.cue"""
    lens_sql = """
        SELECT window_end, n_decisions, n_linked, R_s, R_e, r_a, G, C, model_of_judge_r
        FROM fits WHERE scope = 'decision_maker' AND decision_maker = ? ORDER BY window_end"""
    alerts_sql = """
        SELECT alert_id, kind, cue, state, opened_window_end AS start,
               resolved_window_end AS "end"
        FROM alerts WHERE scope = 'decision_maker' AND decision_maker = ? ORDER BY alert_id"""
    w, med, lens, spans = read_frames(
        config,
        (weights_sql, [decision_maker]),
        (median_sql, [decision_maker]),
        (lens_sql, [decision_maker]),
        (alerts_sql, [decision_maker]),
    )
    team = None if w.empty or pd.isna(w["team"].iloc[0]) else str(w["team"].iloc[0])
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(w["weight"].to_numpy(float) != 0, w["std_weight"] / w["weight"], np.nan)
    w["std_ci_low"] = w["ci_low"] * scale
    w["std_ci_high"] = w["ci_high"] * scale
    w["forbidden"] = w["cue"].isin(forbidden_design_columns(config))
    w = w.merge(med, on=["window_end", "cue"], how="left")
    long = lens.melt(
        id_vars=["window_end", "n_decisions", "n_linked"],
        value_vars=list(LENS_FIGURES),
        var_name="figure",
        value_name="value",
    )
    last_end = lens["window_end"].max() if len(lens) else pd.NaT
    spans["end"] = spans["end"].fillna(last_end)
    latest = w[w["window_end"] == w["window_end"].max()].reset_index(drop=True)
    return PersonHistory(decision_maker, team, w.drop(columns=["team"]), long, spans, latest)


# --- forbidden cues ------------------------------------------------------------------------


@dataclass(frozen=True)
class ForbiddenEvidence:
    """Latest-window forbidden-cue decomposition per decision-maker and cue level.

    ``rows``: decision_maker, team, cue, level, window_start, window_end, n, disparity,
    direct, indirect (judgment units), std_disparity, std_weight (direct, standardised)
    with ci_low/ci_high, std_indirect with indirect_ci_low/high, p_/q_direct,
    p_/q_indirect, flagged_direct, flagged_indirect, assessable, reason.  One verdict per
    cue: a categorical cue's first row (level NULL) carries its verdict (reference-
    invariant size, joint test); its ``level_detail`` rows follow with their own
    figures and no verdict (flagged NULL), as the stored findings hold them.  ``proxies``: the per-proxy
    parts of the indirect effect for the same windows (decision_maker, cue, level,
    proxy_cue, part, std_part).
    """

    rows: pd.DataFrame
    proxies: pd.DataFrame
    caution: str = CAUTION


def forbidden_evidence(config: Config, team: str | None = None) -> ForbiddenEvidence:
    team_filter, params = ("AND team = ?", [team]) if team else ("", [])
    rows_sql = f"""
        WITH latest AS (
            SELECT * FROM policy_findings
            WHERE scope = 'decision_maker' AND check_kind IN ('forbidden_direct', 'forbidden_proxy')
              {team_filter}
            QUALIFY window_end = max(window_end) OVER (PARTITION BY decision_maker))
        SELECT d.decision_maker, d.team, d.cue, d.level, d.level_detail,
               d.window_start, d.window_end, d.n,
               d.disparity, d.direct, d.indirect, d.std_disparity, d.std_weight,
               d.ci_low, d.ci_high, p.std_indirect, p.ci_low AS indirect_ci_low,
               p.ci_high AS indirect_ci_high, d.p_value AS p_direct, d.q_value AS q_direct,
               p.p_value AS p_indirect, p.q_value AS q_indirect,
               CASE WHEN NOT d.level_detail THEN coalesce(d.flagged, FALSE) END
                   AS flagged_direct,
               CASE WHEN NOT d.level_detail THEN coalesce(p.flagged, FALSE) END
                   AS flagged_indirect,
               d.assessable, d.reason
        FROM latest d LEFT JOIN latest p
          ON p.check_kind = 'forbidden_proxy' AND p.decision_maker = d.decision_maker
         AND p.cue = d.cue AND p.level IS NOT DISTINCT FROM d.level
        WHERE d.check_kind = 'forbidden_direct'
        ORDER BY d.decision_maker, d.cue, d.level NULLS FIRST"""
    proxies_sql = f"""
        SELECT p.decision_maker, p.cue, p.level, p.proxy_cue, p.part, p.std_part
        FROM policy_proxy_parts p
        WHERE p.window_end = (SELECT max(window_end) FROM policy_findings f
                              WHERE f.decision_maker = p.decision_maker
                                AND f.scope = 'decision_maker')
          AND p.decision_maker IN (SELECT decision_maker FROM fits
                                   WHERE scope = 'decision_maker' {team_filter})
        ORDER BY p.decision_maker, p.cue, p.level, abs(p.part) DESC"""
    rows, proxies = read_frames(config, (rows_sql, params), (proxies_sql, params))
    return ForbiddenEvidence(rows=rows, proxies=proxies)


# --- alerts -------------------------------------------------------------------------------


def alerts_table(config: Config, state: str | None = None) -> pd.DataFrame:
    """The `alerts --json` objects flattened: evidence window, std_weight, interval,
    q_value and n become columns; ``history`` stays a list of state changes."""
    from monitor.assess.alerts import list_alerts

    docs = list_alerts(config, state=state, history=True)
    rows = []
    for d in docs:
        ev = d.get("evidence") or {}
        interval = ev.get("interval") or [None, None]
        window = ev.get("window") or {}
        rows.append(
            {
                **{k: v for k, v in d.items() if k != "evidence"},
                "window_start": window.get("start"),
                "window_end": window.get("end"),
                "std_weight": ev.get("std_weight"),
                "ci_low": interval[0],
                "ci_high": interval[1],
                "q_value": ev.get("q_value"),
                "n": ev.get("n"),
                "evidence": ev,
            }
        )
    return pd.DataFrame(rows)


@dataclass(frozen=True)
class AckResult:
    ok: bool
    message: str
    alert: dict | None = None


@dataclass(frozen=True)
class AckGate:
    """What the acknowledge form asks for and tells: ``secret_env`` names the variable
    holding the shared secret (None: no secret asked); ``notice`` says how an
    acknowledgement is recorded."""

    secret_env: str | None
    notice: str


BUSY_MESSAGE = "The store is busy (the nightly job is writing); try again in a minute."
# A wrong secret costs the guesser this long (per attempt, per browser session).
WRONG_SECRET_DELAY_S = 0.5


def ack_gate(config: Config) -> AckGate:
    """The acknowledge form's requirements under ``config`` ([dashboard] ack_secret_env)."""
    from monitor.assess.alerts import os_user

    env = config.dashboard.ack_secret_env
    notice = (
        "Recorded with the name you type and the operating-system account the dashboard "
        f"runs as ({os_user()})."
    )
    if env:
        notice += " Acknowledging needs the shared secret."
    return AckGate(env, notice)


def acknowledge_alert(
    config: Config, alert_id: int, by: str, note: str, *, secret: str | None = None
) -> AckResult:
    """Acknowledge through ``monitor.assess.alerts.acknowledge`` (the store's single writer,
    short lock timeout).  A busy store or a user error becomes a message, not a crash.

    With ``[dashboard] ack_secret_env`` set, ``secret`` must equal that variable's value
    in the dashboard's environment (compared in constant time; a wrong one waits
    WRONG_SECRET_DELAY_S); while the variable is unset or empty nothing can be
    acknowledged here.  The history row records how the acknowledgement came in.
    """
    from monitor.assess.alerts import AlertUsageError, acknowledge

    via = "dashboard"
    env = config.dashboard.ack_secret_env
    if env:
        expected = os.environ.get(env, "")
        if not expected:
            return AckResult(
                False,
                f"Acknowledging is switched off here: the shared secret ({env}, named by "
                "[dashboard] ack_secret_env) is not set for the dashboard.",
            )
        if not hmac.compare_digest((secret or "").encode(), expected.encode()):
            time.sleep(WRONG_SECRET_DELAY_S)
            return AckResult(False, "The shared secret is wrong; the alert was not acknowledged.")
        via = "dashboard, shared secret checked"
    try:
        alert = acknowledge(config, int(alert_id), by, note, timeout_s=3.0, via=via)
    except StoreBusy:
        return AckResult(False, BUSY_MESSAGE)
    except AlertUsageError as exc:
        return AckResult(False, str(exc))
    return AckResult(True, f"Alert {alert_id} acknowledged by {by}.", alert)
