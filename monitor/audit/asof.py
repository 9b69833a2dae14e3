"""What the store held at the as-of time, beyond the fits: coverage, alerts as they
stood, and restatements between two as-of times (no I/O, no SQL)."""

from __future__ import annotations

import json
from datetime import timedelta

import numpy as np
import pandas as pd

from monitor.audit.figures import groups_of
from monitor.audit.formats import Table, clean_float, make_table, spec

# --- coverage ----------------------------------------------------------------------------------


def coverage_table(rows, quarantine: pd.DataFrame) -> Table:
    """Counts and outcome lag per decision-maker and for all; quarantine per (kind, reason).

    ``rows`` is an ``audit.QuarterRows``; only its quarter rows count here."""
    q = rows.frame[rows.in_quarter].reset_index(drop=True)
    groups, missing = groups_of(q), rows.missing_cues
    out = []
    lag_days = (q["observed_s"] - q["decided_s"]).to_numpy(float) / 86400.0
    for scope, key, _, m in groups:
        if scope == "team":
            continue
        linked = m & np.isfinite(q["criterion"].to_numpy(float))
        miss = sum(missing.values()) if scope == "all" else missing.get(key, 0)
        lag = lag_days[linked]
        figures = [
            ("decisions_used", m.sum()),
            ("decisions_missing_cues", miss),
            ("outcomes_linked", linked.sum()),
            ("linked_share", linked.sum() / m.sum() if m.sum() else None),
            ("outcomes_corrected", (q["o_versions"].to_numpy()[m] > 1).sum()),
        ]
        for name, fn in (
            ("median", np.median),
            ("p90", lambda v: np.percentile(v, 90)),
            ("max", np.max),
        ):
            figures.append((f"outcome_lag_days_{name}", fn(lag) if len(lag) else None))
        out += [(name, scope, key, None, v) for name, v in figures]
    for kind, reason, n in quarantine.itertuples(index=False):
        out.append(("quarantined_rows", "all", "all", f"{kind}: {reason}", n))
    # Counts, a share and lags in one column: ``number``, so a count is written as one.
    cols = spec("measure:str scope:str decision_maker:str detail:str value:number")
    return make_table("coverage", "Rows, outcomes and quarantine behind the figures", cols, out)


# --- alerts as of T ---------------------------------------------------------------------------


def _text(value) -> str | None:
    """A text cell of a history frame, None for SQL NULL (which pandas may read as NaN)."""
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return None
    return str(value)


def _ts(value) -> str | None:
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return None
    return pd.Timestamp(value).tz_convert("UTC").isoformat()


def alerts_table(alerts: pd.DataFrame, history: pd.DataFrame, span, tz: str) -> Table:
    """Alerts active at any time in the quarter (by window date or by wall clock), in
    the state their history (rows changed by T) gives them."""
    first, last = span
    q0 = pd.Timestamp(first).tz_localize(tz)
    q1 = pd.Timestamp(last + timedelta(days=1)).tz_localize(tz)
    out = []
    for a in alerts.itertuples(index=False):
        h = history[history["alert_id"] == a.alert_id]
        if h.empty:
            continue
        opened = pd.Timestamp(h["changed_at"].iloc[0])
        res = h[h["to_state"] == "resolved"]
        resolved = pd.Timestamp(res["changed_at"].iloc[0]) if len(res) else None
        ack = h[h["to_state"] == "acknowledged"]
        w_open = pd.Timestamp(a.opened_window_end).date()
        w_res = (
            None
            if resolved is None or pd.isna(a.resolved_window_end)
            else pd.Timestamp(a.resolved_window_end).date()
        )
        by_window = w_open <= last and (w_res is None or w_res >= first)
        by_clock = opened < q1 and (resolved is None or resolved >= q0)
        if not (by_window or by_clock):
            continue
        ev = [e for e in h["evidence"] if isinstance(e, str) and e]
        evidence = ev[-1] if ev else None
        out.append(
            (
                int(a.alert_id),
                a.kind,
                a.scope,
                a.decision_maker,
                a.team,
                a.cue,
                h["to_state"].iloc[-1],
                _ts(opened),
                w_open,
                _ts(resolved),
                w_res,
                ack["changed_by"].iloc[-1] if len(ack) else None,
                _ts(ack["changed_at"].iloc[-1]) if len(ack) else None,
                ack["note"].iloc[-1] if len(ack) else None,
                evidence,
                json.dumps(
                    [
                        {
                            "changed_at": _ts(r.changed_at),
                            "from": _text(r.from_state),
                            "to": _text(r.to_state),
                            "by": _text(r.changed_by),
                        }
                        for r in h.itertuples(index=False)
                    ],
                    allow_nan=False,
                ),
            )
        )
    cols = spec(
        "alert_id:int kind:str scope:str decision_maker:str team:str cue:str state:str "
        "opened_at:str opened_window_end:date resolved_at:str resolved_window_end:date "
        "acknowledged_by:str acknowledged_at:str note:str evidence:str history:str"
    )
    return make_table("alerts", "Alerts active in the quarter, as of the as-of time", cols, out)


def history_table(history: pd.DataFrame) -> Table:
    cols = spec("alert_id:int changed_at:str from_state:str to_state:str changed_by:str note:str")
    rows = [
        (r.alert_id, _ts(r.changed_at), r.from_state, r.to_state, r.changed_by, r.note)
        for r in history.itertuples(index=False)
    ]
    return make_table("alert_history", "Alert state changes up to the as-of time", cols, rows)


# --- restatements ---------------------------------------------------------------------------

_COMPARED = {
    "decision_makers": (
        ("scope", "decision_maker"),
        ("n_decisions", "n_linked", "R_s", "R_e", "r_a", "G", "C", "model_of_judge_r"),
    ),
    "cue_weights": (
        ("scope", "decision_maker", "cue"),
        ("weight", "std_error", "std_weight", "p_value", "validity_r"),
    ),
    "forbidden_cues": (
        ("decision_maker", "cue"),
        ("disparity", "direct", "indirect", "std_weight", "q_value", "flagged"),
    ),
    "logistic_weights": (("scope", "decision_maker", "cue"), ("coef", "odds_ratio", "p_value")),
}


def _changes(
    before: pd.DataFrame, after: pd.DataFrame, mask: np.ndarray, mask_before: np.ndarray | None
) -> dict[str, int]:
    """Row-level reasons for a group's restatement (``mask`` over ``after``,
    ``mask_before`` over ``before``: the group's rows in each snapshot).  A decision
    whose stored version changed (another batch) was corrected; one in the group before
    and in neither group nor snapshot after was retracted."""
    a = after[mask].set_index("decision_id")
    b = before.set_index("decision_id")
    common = a.index.intersection(b.index)
    cb, ca = b.loc[common, "criterion"], a.loc[common, "criterion"]
    was = (
        before[mask_before]["decision_id"] if mask_before is not None else before["decision_id"][:0]
    )
    every_after = after.set_index("decision_id")
    both = a.index.union(pd.Index(was)).intersection(b.index).intersection(every_after.index)
    moved = b.loc[both, "batch_id"].to_numpy() != every_after.loc[both, "batch_id"].to_numpy()
    return {
        "late_decisions": int(len(a.index.difference(b.index))),
        "newly_linked": int((cb.isna() & ca.notna()).sum()),
        "corrected_outcomes": int((cb.notna() & ca.notna() & (cb != ca)).sum()),
        "corrected_decisions": int(moved.sum()),
        "retracted_decisions": int((~pd.Index(was).isin(every_after.index)).sum()),
    }


def restatement_table(before, after) -> Table:
    """Every compared figure whose value moved between two snapshots, and why.  A row
    that the later snapshot no longer has (every decision of a person retracted, say)
    is listed with each of its figures moved to no value."""
    old_q = before.rows.frame[before.rows.in_quarter]
    new_q = after.rows.frame[after.rows.in_quarter].reset_index(drop=True)
    old_q = old_q.reset_index(drop=True)
    was = {(s, k): m for s, k, _, m in groups_of(old_q)}
    why = {(s, k): _changes(old_q, new_q, m, was.get((s, k))) for s, k, _, m in groups_of(new_q)}
    nowhere = np.zeros(len(new_q), dtype=bool)
    for key, m in was.items():  # groups with no row left
        if key not in why:
            why[key] = _changes(old_q, new_q, nowhere, m)
    t_old = {t.name: t for t in before.tables}
    out = []

    def moved(table: str, row: dict, prev: dict, figures) -> None:
        scope = row.get("scope", "decision_maker")
        c = why.get((scope, row["decision_maker"]), {})
        for fig in figures:
            v0, v1 = prev.get(fig), row.get(fig)
            if v0 == v1:
                continue
            num = [None if v is None else float(v) for v in (v0, v1)]
            change = None if None in num else clean_float(num[1] - num[0])
            text = ", ".join(f"{n} {w.replace('_', ' ')}" for w, n in c.items() if n)
            out.append(
                (
                    table,
                    scope,
                    row["decision_maker"],
                    row.get("cue"),
                    fig,
                    num[0],
                    num[1],
                    change,
                    c.get("newly_linked", 0),
                    c.get("corrected_outcomes", 0),
                    c.get("late_decisions", 0),
                    c.get("corrected_decisions", 0),
                    c.get("retracted_decisions", 0),
                    text or "no row-level change found",
                )
            )

    for t in after.tables:
        if t.name not in _COMPARED or t.name not in t_old:
            continue
        keys, figures = _COMPARED[t.name]
        old = {tuple(r[k] for k in keys): r for r in t_old[t.name].records()}
        kept = set()
        for r in t.records():
            key = tuple(r[k] for k in keys)
            kept.add(key)
            moved(t.name, r, old.get(key, {}), figures)
        for key, prev in old.items():
            if key not in kept:  # the row is gone: its figures now have no value
                moved(t.name, {k: prev[k] for k in keys}, prev, figures)
    cols = spec(
        "table:str scope:str decision_maker:str cue:str figure:str value_before:number "
        "value_after:number change:number newly_linked:int corrected_outcomes:int late_decisions:int "
        "corrected_decisions:int retracted_decisions:int why:str"
    )
    title = f"Restatements between {before.as_of} and {after.as_of}"
    return make_table("restatements", title, cols, out)
