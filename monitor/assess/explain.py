"""Why an alert was raised (`cuewatch alerts show ID`) and the alert listings with filters
and history (`cuewatch alerts [--person ..] [--team ..] [--kind ..] [--history]`).

Reads only.  An alert's explanation: the finding in one sentence (the notification's own
wording, ``assess.wording``), the evidence of every window of its episode and the series
around it from the stored findings, for a proxy alert the part each permitted cue
carries, the alert's state changes, and the caution.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from monitor.assess.alerts import (
    ALERT_KINDS,
    STATES,
    AlertUsageError,
    finite_or_none,
    list_alerts,
)
from monitor.assess.wording import describe_finding
from monitor.cautions import CAUTION, LINKED_OUTCOMES_NOTE
from monitor.config import Config
from monitor.store.connection import Store

KINDS = tuple(dict.fromkeys(ALERT_KINDS.values()))
CHECK_OF_KIND = {kind: check for check, kind in ALERT_KINDS.items()}
# What the size in an alert's evidence is, by kind (listing column text and chart label).
SIZE_NAME = {
    "forbidden_cue": "std weight",
    "proxy_use": "std indirect",
    "drift": "std change",
    "consistency": "R_s adj.",
    "achievement": "r_a",
}
# Windows shown before and after the episode in the text chart.
CONTEXT_WINDOWS = 6


def select_alerts(
    config: Config,
    *,
    state: str | None = None,
    person: str | None = None,
    team: str | None = None,
    kind: str | None = None,
    history: bool = False,
) -> list[dict]:
    """``alerts --json`` objects filtered by state, decision-maker (``person``: alerts
    on their own series), team (alerts on the team series and on its members'), kind."""
    from monitor.people import check_name

    if kind is not None and kind not in KINDS:
        raise AlertUsageError(f"--kind must be one of {', '.join(KINDS)}, not '{kind}'.")
    if state is not None and state not in STATES:
        raise AlertUsageError(f"--state must be one of {', '.join(STATES)}, not '{state}'.")
    if person is not None:
        check_name(config, person, teams_too=False, all_too=False)
    if team is not None:
        check_name(config, team)
    docs = list_alerts(config, state, history=history)
    return [
        d
        for d in docs
        if (kind is None or d["kind"] == kind)
        and (person is None or (d["scope"] == "decision_maker" and d["decision_maker"] == person))
        and (
            team is None
            or d["team"] == team
            or (d["scope"] == "team" and d["decision_maker"] == team)
        )
    ]


def size_text(doc: dict) -> str:
    """The alert's size named for what it is: 'std weight +0.32', 'R_s adj. 0.41'."""
    size = (doc.get("evidence") or {}).get("std_weight")
    name = SIZE_NAME.get(doc["kind"], "size")
    if size is None:
        return f"{name} -"
    signed = doc["kind"] in ("forbidden_cue", "proxy_use", "drift")
    return f"{name} {size:+.2f}" if signed else f"{name} {size:.2f}"


def describe_listing(docs: list[dict], *, history: bool = False, width: int | None = None) -> str:
    """The alerts as a table with a header (opened = the day assess opened it; window = the
    window that opened it), each alert's state changes below when ``history``, then the
    caution."""
    if not docs:
        return "No alerts match."
    from monitor.textual import render_table

    rows = [
        [str(d["id"]), d["state"], d["kind"], d["decision_maker"]
         + ("" if d["scope"] == "decision_maker" else f" ({d['scope']})"), d["cue"] or "-",
         (d["opened_at"] or "")[:10], _window(d), size_text(d),
         _q(d), str((d.get("evidence") or {}).get("n") or "-"), d["acknowledged_by"] or ""]
        for d in docs
    ]  # fmt: skip
    text = render_table(
        f"Alerts ({len(docs)})",
        ["id", "state", "kind", "who", "cue", "opened", "window", "figure", "q", "n", "ack by"],
        rows,
        width=width,
        no_wrap=("id", "opened"),
    )
    if history:
        lines = []
        for d in docs:
            lines.append(f"Alert {d['id']} ({d['kind']}, {d['decision_maker']}):")
            lines += [f"  {history_line(h)}" for h in d.get("history") or []]
        text += "\n".join(lines) + "\n"
    from monitor.textual import paragraphs

    return text + paragraphs(
        ["Figure: the size each check compares (std = standardised).", CAUTION], width
    )


def history_line(h: dict) -> str:
    who = h.get("by") or "-"
    extra = ", ".join(x for x in (h.get("os_user") and f"os user {h['os_user']}",
                                  h.get("via") and f"via {h['via']}") if x)  # fmt: skip
    return (
        f"{(h.get('at') or '')[:19]}  {h.get('from') or '(new)'} -> {h.get('to')}  by {who}"
        + (f" ({extra})" if extra else "")
        + (f": {h['note']}" if h.get("note") else "")
    )


@dataclass(frozen=True)
class AlertExplanation:
    """One alert with what lies behind it.  ``series``: every stored window of the alert's
    check, series and cue, oldest first (window_start, window_end, n, size, ci_low,
    ci_high, p_value, q_value, flagged, assessable, reason, in_episode); ``proxies``:
    for a proxy alert, each permitted cue's part of the indirect weight in the evidence
    window (proxy_cue, level, part, std_part)."""

    alert: dict
    finding: str
    size_name: str
    series: list[dict]
    proxies: list[dict]
    cautions: list[str]

    def to_json(self) -> dict:
        return {
            "alert": self.alert,
            "finding": self.finding,
            "size_name": self.size_name,
            "series": self.series,
            "proxies": self.proxies,
            "cautions": self.cautions,
        }

    def describe(self, width: int | None = None) -> str:
        from monitor.textual import bar, paragraphs, render_table

        a = self.alert
        out = [
            f"Alert {a['id']}: {a['kind']} on {a['decision_maker']}"
            + (f", {a['cue']}" if a["cue"] else "")
            + f" - {a['state']}, opened {(a['opened_at'] or '')[:10]} (window ending "
            f"{a['opened_window_end']})"
            + (f", resolved {(a['resolved_at'] or '')[:10]}" if a["resolved_at"] else "")
            + ".",
        ]
        episode = [w for w in self.series if w["in_episode"]]
        text = paragraphs([*out, self.finding], width) + "\n"
        text += render_table(
            f"Evidence, window by window, of the episode ({len(episode)} window(s); "
            "flagged = counted towards the alert)",
            ["window", "n", self.size_name, "95% interval", "p", "q", "verdict"],
            [[f"{w['window_start']}..{w['window_end']}", w["n"], _f(w["size"]),
              _interval(w), _p(w["p_value"]), _p(w["q_value"]), _verdict(w)] for w in episode],
            width=width,
        )  # fmt: skip
        shown = _around(self.series)
        if shown:
            scale = max((abs(w["size"]) for w in shown if w["size"] is not None), default=0.0)
            lines = [
                f"The series around it ({self.size_name} by window end; * flagged, "
                "? not assessable, | zero; the episode between the brackets):"
            ]
            for w in shown:
                mark = "*" if w["flagged"] else ("?" if not w["assessable"] else " ")
                edge = "[" if w["in_episode"] else " "
                lines.append(
                    f" {edge}{w['window_end']} {mark} {_f(w['size']):>6} "
                    f"{bar(w['size'], scale or 1.0, 16)}"
                )
            text += "\n".join(lines) + "\n\n"
        if self.proxies:
            text += render_table(
                "The indirect part carried by each permitted cue (evidence window)",
                ["proxy cue", "level", "part (judgment units)", "std part"],
                [[p["proxy_cue"], p["level"] or "-", _f(p["part"], 3), _f(p["std_part"], 3)]
                 for p in self.proxies],
                width=width,
            )  # fmt: skip
        text += "History of state changes:\n"
        text += "\n".join(f"  {history_line(h)}" for h in a.get("history") or []) + "\n\n"
        return text + paragraphs(self.cautions, width)


def explain_alert(config: Config, alert_id: int) -> AlertExplanation:
    """Alert ``alert_id`` with its episode's evidence, series, proxy parts and history."""
    docs = [d for d in list_alerts(config, history=True) if d["id"] == alert_id]
    if not docs:
        raise AlertUsageError(
            f"there is no alert with id {alert_id}; 'cuewatch alerts' lists them."
        )
    alert = docs[0]
    store = Store(config)
    with store.reader() as con:
        findings = _series_findings(con, alert)
        proxies = _proxy_parts(con, alert) if alert["kind"] == "proxy_use" else pd.DataFrame()
    series = _series(findings, alert, config.policy.consecutive_windows)
    cautions = [CAUTION] if alert["kind"] in ("forbidden_cue", "proxy_use") else []
    if alert["kind"] == "achievement":
        cautions.append(LINKED_OUTCOMES_NOTE)
    cautions.append(
        "Every window's figure rests on its n decisions; overlapping windows share most of "
        "their rows, so neighbouring windows are not independent evidence."
    )
    return AlertExplanation(
        alert=alert,
        finding=describe_finding(alert),
        size_name=SIZE_NAME.get(alert["kind"], "size"),
        series=series,
        proxies=[
            {
                "proxy_cue": r.proxy_cue,
                "level": r.level if isinstance(r.level, str) else None,
                "part": finite_or_none(r.part),
                "std_part": finite_or_none(r.std_part),
            }
            for r in proxies.itertuples(index=False)
        ],  # fmt: skip
        cautions=cautions,
    )


def _series_findings(con, alert: dict) -> pd.DataFrame:
    """The current findings of the alert's check, series and cue (every window; where the
    store marks a categorical cue's per-level rows as detail, its verdict rows only)."""
    columns = {c[0] for c in con.execute("SELECT * FROM policy_findings LIMIT 0").description}
    verdicts = " AND NOT coalesce(level_detail, FALSE)" if "level_detail" in columns else ""
    return con.execute(
        "SELECT window_start, window_end, level, n, std_weight, std_indirect, statistic, "
        "ci_low, ci_high, p_value, q_value, flagged, assessable, reason FROM policy_findings "
        f"WHERE check_kind = ? AND scope = ? AND decision_maker = ? AND cue = ?{verdicts} "
        "ORDER BY window_end, level",
        [CHECK_OF_KIND[alert["kind"]], alert["scope"], alert["decision_maker"], alert["cue"]],
    ).df()


def _proxy_parts(con, alert: dict) -> pd.DataFrame:
    end = (alert["evidence"].get("window") or {}).get("end")
    level = alert["evidence"].get("level")
    return con.execute(
        "SELECT proxy_cue, level, part, std_part FROM policy_proxy_parts "
        "WHERE decision_maker = ? AND cue = ? AND window_end = ? "
        "AND (? IS NULL OR level IS NOT DISTINCT FROM ?) ORDER BY abs(part) DESC",
        [alert["decision_maker"], alert["cue"], end, level, level],
    ).df()


def _series(f: pd.DataFrame, alert: dict, consecutive: int) -> list[dict]:
    """One row per window (the level with the largest size, as assess combines them)."""
    if f.empty:
        return []
    kind = alert["kind"]
    if kind == "proxy_use":
        f["size"] = f["std_indirect"]
    elif kind in ("consistency", "achievement"):
        f["size"] = f["statistic"]
    else:
        f["size"] = f["std_weight"]
    f["flagged"] = f["flagged"].fillna(False).astype(bool)
    f["assessable"] = f["assessable"].fillna(False).astype(bool)
    f["_abs"] = f["size"].abs()
    f = f.sort_values(["window_end", "_abs"], ascending=[True, False], na_position="last")
    top = f.groupby("window_end", sort=True).head(1).reset_index(drop=True)
    agg = f.groupby("window_end", sort=True)[["flagged", "assessable"]].any().reset_index(drop=True)
    top["flagged"], top["assessable"] = agg["flagged"], agg["assessable"]
    ends = [_day(v) for v in top["window_end"]]
    opened = alert["opened_window_end"]
    last = alert["resolved_window_end"] or ends[-1]
    first = opened
    if opened in ends:
        # Back from the opening window over the flagged windows that opened it
        # (windows that could not be assessed neither count nor break the run).
        at = j = ends.index(opened)
        need = consecutive - 1
        while need > 0 and j > 0:
            j -= 1
            if not top.loc[j, "assessable"]:
                continue
            if not top.loc[j, "flagged"]:
                break
            at, need = j, need - 1
        first = ends[at]
    return [
        {
            "window_start": _day(r.window_start),
            "window_end": end,
            "level": r.level if isinstance(r.level, str) else None,
            "n": None if pd.isna(r.n) else int(r.n),
            "size": finite_or_none(r.size),
            "ci_low": finite_or_none(r.ci_low),
            "ci_high": finite_or_none(r.ci_high),
            "p_value": finite_or_none(r.p_value),
            "q_value": finite_or_none(r.q_value),
            "flagged": bool(r.flagged),
            "assessable": bool(r.assessable),
            "reason": r.reason if isinstance(r.reason, str) and r.reason else None,
            "in_episode": first <= end <= last,
        }
        for r, end in zip(top.itertuples(index=False), ends, strict=True)
    ]


def _around(series: list[dict]) -> list[dict]:
    at = [i for i, w in enumerate(series) if w["in_episode"]]
    if not at:
        return series[-2 * CONTEXT_WINDOWS :]
    return series[max(0, at[0] - CONTEXT_WINDOWS) : at[-1] + CONTEXT_WINDOWS + 1]


def _verdict(w: dict) -> str:
    if not w["assessable"]:
        return "not assessable" + (f" ({w['reason']})" if w["reason"] else "")
    return "flagged" if w["flagged"] else "clear"


def _window(d: dict) -> str:
    w = (d.get("evidence") or {}).get("window") or {}
    return f"{w.get('start')}..{w.get('end')}"


def _q(d: dict) -> str:
    return _p((d.get("evidence") or {}).get("q_value"))


def _interval(w: dict) -> str:
    if w["ci_low"] is None or w["ci_high"] is None:
        return "-"
    return f"[{w['ci_low']:.2f}, {w['ci_high']:.2f}]"


def _p(v) -> str:
    if v is None:
        return "-"
    return f"{v:.3f}" if v >= 0.001 else f"{v:.1e}"


def _f(v, digits: int = 2) -> str:
    return "-" if v is None else f"{v:+.{digits}f}"


def _day(v) -> str | None:
    if v is None or (not isinstance(v, str) and pd.isna(v)):
        return None
    return pd.Timestamp(v).date().isoformat()
