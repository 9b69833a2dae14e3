"""Two decision-makers, or one and the rest of their team, compared window by window
(`cuewatch compare`): judge weights side by side with a test of their difference, and
R_s, r_a and G side by side.

The test.  In one window the two judge models are separate regressions on disjoint rows,
so their weights are independent estimates and the difference of one cue's weight has
variance se1^2 + se2^2: z = (b1 - b2) / sqrt(se1^2 + se2^2) against the normal
distribution (Clogg, Petkova & Haritou 1995, American Journal of Sociology 100;
Paternoster, Brame, Mazerolle & Piquero 1998, Criminology 36 - from memory).  Each
model keeps its own residual variance, so this is the Welch-type comparison; with the
window minimum of rows the t reference would change p by little, and the normal one is
what the drift test of the same weights uses (``stats.trends.weight_drift``, whose
Wald tests - per cue and joint over the cues - this reuses).  The same estimate and
standard error come out of one regression on the pooled rows with a group dummy, its
interaction with every cue and each group's own residual variance
(tests/test_refit_compare.py checks this with statsmodels).

A decision-maker against their team: the team's stored window pools its members' rows,
the person's included, so the person is compared with the rest of the team (the team's
moments less the person's, ``stats.moments.remove``); the rows are then disjoint and the
test above holds.  r_a and G need the outcome-linked moments, which are stored for
neither; for the team side they are the whole team's figures, the person included (the
notes say so).

Windows overlap (each shares most rows with the next), so a run of small p-values over
consecutive windows is one finding seen several times, not several findings; no
correction for the number of cues or windows is made: these are descriptions for a
reviewer, not alerts.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from monitor.cautions import CAUTION, LINKED_OUTCOMES_NOTE
from monitor.config import Config
from monitor.errors import UserError
from monitor.refit.fits_read import data_spans, held_days
from monitor.stats.design import cue_of
from monitor.stats.lens import fit_lens
from monitor.stats.moments import Moments, remove
from monitor.stats.trends import weight_drift
from monitor.store.connection import Store

TEST_NAME = (
    "z = (b1 - b2) / sqrt(se1^2 + se2^2), two-sided normal p; each model keeps its own "
    "residual variance (independent regressions on disjoint rows)"
)
# How many windows the text summary shows unless asked for all.
SHOWN_WINDOWS = 12


class CompareError(UserError):
    """A comparison that cannot be made (no common windows, no team)."""


@dataclass(frozen=True)
class Comparison:
    """``windows``: one dict per window end both series have, oldest first, with
    window_start, window_end, data_from, data_to, partial (the days with decisions of
    ``first``, which label the window), n_first, n_second, R_s_first, R_s_second, r_a_first,
    r_a_second, G_first, G_second, joint_stat, joint_df, joint_p (the Wald test of the
    whole weight vector), reason, and ``cues``: cue, forbidden, weight_first,
    std_error_first, weight_second, std_error_second, std_weight_first,
    std_weight_second, difference, std_error, z, p_value."""

    first: str
    second: str
    against: str  # "decision_maker" or "rest_of_team"
    team: str | None
    windows: list[dict]
    notes: list[str] = field(default_factory=list)

    @property
    def second_label(self) -> str:
        if self.against == "rest_of_team":
            return f"team {self.team} without {self.first}"
        return self.second

    def to_json(self) -> dict:
        return {
            "first": self.first,
            "second": self.second,
            "second_label": self.second_label,
            "against": self.against,
            "team": self.team,
            "test": TEST_NAME,
            "windows": self.windows,
            "notes": self.notes,
        }

    def describe(
        self, width: int | None = None, window_end: str | None = None, shown: int = SHOWN_WINDOWS
    ) -> str:
        from monitor.textual import paragraphs, render_table

        a, b = self.first, self.second_label
        rows = self.windows if shown <= 0 else self.windows[-shown:]
        head = f"{a} compared with {b}: {len(self.windows)} common window(s)"
        if len(rows) < len(self.windows):
            head += f", the latest {len(rows)} shown (--windows 0 or --json for all)"
        summary = render_table(
            head,
            ["window", "n", "R_s", "r_a", "G", "joint test", "cues that differ (p < 0.05)"],
            [
                [
                    _label(w),
                    f"{w['n_first']} / {w['n_second']}",
                    f"{_n(w['R_s_first'])} / {_n(w['R_s_second'])}",
                    f"{_n(w['r_a_first'])} / {_n(w['r_a_second'])}",
                    f"{_n(w['G_first'])} / {_n(w['G_second'])}",
                    w["reason"] or f"p {_p(w['joint_p'])}",
                    ", ".join(
                        c["cue"]
                        for c in w["cues"]
                        if c["p_value"] is not None and c["p_value"] < 0.05
                    ) or "none",
                ]
                for w in rows
            ],
            width=width,
            no_wrap=("window",),
        )  # fmt: skip
        pick = self.window(window_end)
        detail = render_table(
            f"Weights in the window {_label(pick)} ({a} / {b}; standard errors in brackets)",
            ["cue", a, b, "difference", "z", "p", "std weights"],
            [
                [
                    c["cue"] + (" (forbidden)" if c["forbidden"] else ""),
                    _with_se(c["weight_first"], c["std_error_first"]),
                    _with_se(c["weight_second"], c["std_error_second"]),
                    _with_se(c["difference"], c["std_error"]),
                    _n(c["z"]),
                    _p(c["p_value"]),
                    f"{_n(c['std_weight_first'])} / {_n(c['std_weight_second'])}",
                ]
                for c in pick["cues"]
            ],
            width=width,
        )
        notes = [
            f"Test: {TEST_NAME}; the joint test is the Wald chi-square of all weights at once.",
            *self.notes,
        ]
        return summary + detail + paragraphs(notes, width, bullet="- ")

    def window(self, window_end: str | None = None) -> dict:
        """The common window ending on ``window_end`` (default: the latest)."""
        if window_end is None:
            return self.windows[-1]
        for w in self.windows:
            if w["window_end"] == window_end:
                return w
        raise CompareError(
            f"no common window ends on {window_end}; the common window ends run from "
            f"{self.windows[0]['window_end']} to {self.windows[-1]['window_end']}."
        )


_SERIES_SQL = """
    SELECT team, window_start, window_end, n_decisions, n_linked, R_s, r_a, G, cue_mean, comoment
    FROM fits WHERE scope = ? AND decision_maker = ? ORDER BY window_end"""


def compare(config: Config, first: str, second: str | None = None) -> Comparison:
    """``first`` against ``second`` (another decision-maker), or, when ``second`` is None,
    against the rest of ``first``'s team, window by window."""
    from monitor.people import check_name

    check_name(config, first, teams_too=False, all_too=False)
    if second is not None:
        check_name(config, second, teams_too=False, all_too=False)
        if second == first:
            raise CompareError("compare needs two different decision-makers.")
    store = Store(config)
    with store.reader() as con:
        store.ensure_ready(con)
        a = con.execute(_SERIES_SQL, ["decision_maker", first]).df()
        if a.empty:
            raise CompareError(f"no window fits are stored for {first} yet: run 'cuewatch refit'.")
        team = None if pd.isna(a["team"].iloc[-1]) else str(a["team"].iloc[-1])
        if second is None:
            if team is None:
                raise CompareError(f"{first} has no team to compare with.")
            b = con.execute(_SERIES_SQL, ["team", team]).df()
        else:
            b = con.execute(_SERIES_SQL, ["decision_maker", second]).df()
        span = data_spans(con).get(("decision_maker", first))
    notes: list[str] = []
    if second is None:
        # The team series pools its members by their team in each window.
        same = a["team"] == team
        if not same.all():
            notes.append(
                f"{int((~same).sum())} window(s) where {first} was in another team are left out."
            )
        a = a[same]
    ends = sorted(set(a["window_end"]) & set(b["window_end"]))
    if not ends:
        raise CompareError(f"{first} and {second or 'their team'} have no window in common.")
    a = a.set_index("window_end").loc[ends].reset_index()
    b = b.set_index("window_end").loc[ends].reset_index()
    names = config.design_columns()
    mom_a, mom_b = _moments(a, len(names) + 1), _moments(b, len(names) + 1)
    if second is None:
        mom_b = remove(mom_b, mom_a)
        notes.append(
            f"The team side is team {team} without {first} (the team's rows less theirs), so the "
            "rows are disjoint; its r_a and G are the whole team's, "
            f"{first} included (outcome-linked figures are not stored per remainder)."
        )
    fits_a = fit_lens(mom_a, None, names, min_rows=config.windows.min_rows)
    fits_b = fit_lens(mom_b, None, names, min_rows=config.windows.min_rows)
    test = weight_drift(fits_a, fits_b)
    forbidden = [cue_of(n) in config.policy.forbidden for n in names]
    starts = [pd.Timestamp(v).date() for v in a["window_start"]]
    held = [held_days(s, pd.Timestamp(e).date(), span) for s, e in zip(starts, ends, strict=True)]
    windows = []
    for i, end in enumerate(ends):
        cues = [
            {
                "cue": name,
                "forbidden": forbidden[j],
                "weight_first": _f(fits_a.weights[i, j]),
                "std_error_first": _f(fits_a.std_errors[i, j]),
                "weight_second": _f(fits_b.weights[i, j]),
                "std_error_second": _f(fits_b.std_errors[i, j]),
                "std_weight_first": _f(fits_a.std_weights[i, j]),
                "std_weight_second": _f(fits_b.std_weights[i, j]),
                "difference": _f(test.change[i, j]),
                "std_error": _f(test.std_error[i, j]),
                "z": _f(test.z[i, j]),
                "p_value": _f(test.p_value[i, j]),
            }
            for j, name in enumerate(names)
        ]
        windows.append(
            {
                "window_start": _day(a["window_start"].iloc[i]),
                "window_end": _day(end),
                # The days the window holds decisions of ``first`` (partial: fewer than
                # its length), which label it.
                "data_from": held[i][0].isoformat(),
                "data_to": held[i][1].isoformat(),
                "partial": held[i][2],
                "n_first": int(fits_a.n[i]),
                "n_second": int(fits_b.n[i]),
                "R_s_first": _f(fits_a.R_s[i]),
                "R_s_second": _f(fits_b.R_s[i]),
                "r_a_first": _f(a["r_a"].iloc[i]),
                "r_a_second": _f(b["r_a"].iloc[i]),
                "G_first": _f(a["G"].iloc[i]),
                "G_second": _f(b["G"].iloc[i]),
                "joint_stat": _f(test.joint_stat[i]),
                "joint_df": int(test.joint_df[i]),
                "joint_p": _f(test.joint_p[i]),
                "reason": test.reason[i] or None,
                "cues": cues,
            }
        )
    notes.append(
        "Windows overlap, so neighbouring windows share most of their rows: a difference seen "
        "in a run of windows is one difference; no correction for the number of cues or "
        "windows is made."
    )
    notes.append(LINKED_OUTCOMES_NOTE)
    if any(forbidden):
        notes.append(CAUTION)
    return Comparison(first, second or (team or ""), "decision_maker" if second else "rest_of_team",
                      team, windows, notes)  # fmt: skip


def _moments(df: pd.DataFrame, p: int) -> Moments:
    m = len(df)
    mean = np.array(df["cue_mean"].tolist(), dtype=float).reshape(m, p)
    co = np.array(df["comoment"].tolist(), dtype=float).reshape(m, p, p)
    return Moments(df["n_decisions"].to_numpy(dtype=float), mean, co)


def _f(v) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if np.isfinite(f) else None


def _day(v) -> str:
    return pd.Timestamp(v).date().isoformat()


def _label(w: dict) -> str:
    label = f"{w['data_from']}..{w['data_to']}"
    return label + " (partial)" if w["partial"] else label


def _n(v, digits: int = 2) -> str:
    return "-" if v is None else f"{v:.{digits}f}"


def _p(v) -> str:
    if v is None:
        return "-"
    return f"{v:.3f}" if v >= 0.001 else f"{v:.1e}"


def _with_se(v, se) -> str:
    if v is None:
        return "-"
    return f"{v:+.3g}" + ("" if se is None else f" ({se:.2g})")
