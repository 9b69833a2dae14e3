"""Who is in the store: decision-makers and teams with their volume, first and last
decision day, latest consistency and open alerts (`cuewatch people`), and the check that
turns a mistyped name into a one-sentence user error with the close match.

Reads only: one short-lived read-only connection per call.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from datetime import date

import pandas as pd

from monitor.config import Config
from monitor.errors import UserError
from monitor.store.connection import Store

OPEN_STATES = ("open", "acknowledged")

_PEOPLE_SQL = """
    SELECT decision_maker, arg_max(team, decided_at) AS team, count(*) AS n_decisions,
           min(decided_day) AS first_day, max(decided_day) AS last_day
    FROM decisions GROUP BY decision_maker ORDER BY decision_maker"""
_TEAMS_SQL = """
    SELECT team, count(DISTINCT decision_maker) AS members, count(*) AS n_decisions,
           min(decided_day) AS first_day, max(decided_day) AS last_day
    FROM decisions WHERE team IS NOT NULL GROUP BY team ORDER BY team"""
_LATEST_SQL = """
    SELECT scope, decision_maker, window_end, R_s FROM fits
    QUALIFY row_number() OVER (PARTITION BY scope, decision_maker ORDER BY window_end DESC) = 1"""
_ALERTS_SQL = """
    SELECT scope, decision_maker, team,
           count(*) FILTER (WHERE state IN ('open', 'acknowledged')) AS open_alerts
    FROM alerts GROUP BY scope, decision_maker, team"""


class UnknownName(UserError):
    """A decision-maker or team the store does not know."""


@dataclass(frozen=True)
class Roster:
    """``decision_makers``: decision_maker, team (of their latest decision), n_decisions,
    first_day, last_day, latest_window_end, latest_R_s, open_alerts (open or
    acknowledged, on their own series).  ``teams``: team, members, n_decisions,
    first_day, last_day, latest_window_end, latest_R_s (the team's pooled series),
    open_alerts (on the team series) and members_open_alerts."""

    decision_makers: list[dict]
    teams: list[dict]

    def to_json(self) -> dict:
        return {"decision_makers": self.decision_makers, "teams": self.teams}

    def describe(self, width: int | None = None) -> str:
        if not self.decision_makers:
            return "No decisions stored yet: run 'cuewatch ingest'."
        from monitor.textual import paragraphs, render_table

        def rs(d: dict) -> str:
            if d["latest_R_s"] is None:
                return "-" if d["latest_window_end"] is None else "n/a"
            return f"{d['latest_R_s']:.2f} ({d['latest_window_end']})"

        people = render_table(
            f"Decision-makers ({len(self.decision_makers)})",
            ["decision-maker", "team", "decisions", "first day", "last day",
             "latest R_s (window end)", "open alerts"],
            [[d["decision_maker"], d["team"] or "-", f"{d['n_decisions']:,}", d["first_day"],
              d["last_day"], rs(d), str(d["open_alerts"])] for d in self.decision_makers],
            width=width,
        )  # fmt: skip
        text = people
        if self.teams:
            text += render_table(
                f"Teams ({len(self.teams)})",
                ["team", "members", "decisions", "first day", "last day",
                 "latest R_s (window end)", "open alerts (team / members)"],
                [[t["team"], str(t["members"]), f"{t['n_decisions']:,}", t["first_day"],
                  t["last_day"], rs(t), f"{t['open_alerts']} / {t['members_open_alerts']}"]
                 for t in self.teams],
                width=width,
            )  # fmt: skip
        note = (
            "Open alerts count open and acknowledged ones; 'cuewatch alerts --person ID' lists "
            "them. R_s is the latest stored window's consistency ('-' before the first fit)."
        )
        return text + paragraphs([note], width)


def roster(config: Config) -> Roster:
    """Every decision-maker and team with stored decisions."""
    store = Store(config)
    with store.reader() as con:
        store.ensure_ready(con)
        people, teams, latest, alerts = (
            con.execute(sql).df() for sql in (_PEOPLE_SQL, _TEAMS_SQL, _LATEST_SQL, _ALERTS_SQL)
        )
    fit = {(r.scope, r.decision_maker): r for r in latest.itertuples(index=False)}
    open_by = alerts.groupby(["scope", "decision_maker"])["open_alerts"].sum().to_dict()
    members_open = (
        alerts[alerts["scope"] == "decision_maker"].groupby("team")["open_alerts"].sum().to_dict()
    )

    def latest_of(scope: str, key: str) -> dict:
        r = fit.get((scope, key))
        if r is None:
            return {"latest_window_end": None, "latest_R_s": None}
        return {"latest_window_end": _day(r.window_end), "latest_R_s": _float(r.R_s)}

    out_people = [
        {
            "decision_maker": str(r.decision_maker),
            "team": None if pd.isna(r.team) else str(r.team),
            "n_decisions": int(r.n_decisions),
            "first_day": _day(r.first_day),
            "last_day": _day(r.last_day),
            **latest_of("decision_maker", r.decision_maker),
            "open_alerts": int(open_by.get(("decision_maker", r.decision_maker), 0)),
        }
        for r in people.itertuples(index=False)
    ]
    out_teams = [
        {
            "team": str(r.team),
            "members": int(r.members),
            "n_decisions": int(r.n_decisions),
            "first_day": _day(r.first_day),
            "last_day": _day(r.last_day),
            **latest_of("team", r.team),
            "open_alerts": int(open_by.get(("team", r.team), 0)),
            "members_open_alerts": int(members_open.get(r.team, 0)),
        }
        for r in teams.itertuples(index=False)
    ]
    return Roster(out_people, out_teams)


def known_names(config: Config) -> tuple[set[str], set[str]]:
    """(decision-makers, teams) found in the decisions or the fits."""
    store = Store(config)
    with store.reader() as con:
        store.ensure_ready(con)
        people = con.execute(
            "SELECT DISTINCT decision_maker FROM decisions UNION "
            "SELECT DISTINCT decision_maker FROM fits WHERE scope = 'decision_maker'"
        ).fetchall()
        teams = con.execute(
            "SELECT DISTINCT team FROM decisions WHERE team IS NOT NULL UNION "
            "SELECT DISTINCT decision_maker FROM fits WHERE scope = 'team'"
        ).fetchall()
    return {str(r[0]) for r in people}, {str(r[0]) for r in teams}


def check_name(config: Config, name: str, *, teams_too: bool = True, all_too: bool = True) -> str:
    """``name`` if the store knows it as a decision-maker (or a team, or 'all'), else
    ``UnknownName``: one sentence, naming the stored name that differs only in case, or
    else the closest one, when there is one."""
    people, teams = known_names(config)
    names = people | (teams if teams_too else set()) | ({"all"} if all_too else set())
    if name in names:
        return name
    what = "decision-maker or team" if teams_too else "decision-maker"
    same = sorted(n for n in names if n.casefold() == name.casefold())
    if same:
        raise UnknownName(
            f"there is no {what} '{name}' in the store (names are case-sensitive): "
            f"did you mean '{same[0]}'?"
        )
    close = difflib.get_close_matches(name, sorted(names), n=1, cutoff=0.6)
    hint = f"did you mean '{close[0]}'?" if close else "'cuewatch people' lists them."
    raise UnknownName(f"there is no {what} '{name}' in the store; {hint}")


def _day(v) -> str | None:
    if v is None or v is pd.NaT or (isinstance(v, float) and v != v):
        return None
    if isinstance(v, pd.Timestamp):
        return v.date().isoformat()
    if isinstance(v, date):
        return v.isoformat()
    return str(v)[:10]


def _float(v) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if f == f and abs(f) != float("inf") else None
