"""Stored window fits read back as `fits --json` objects (DESIGN.md, Contracts)."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import date
from typing import TYPE_CHECKING

import numpy as np

from monitor.cautions import CAUTION, LINEAR_PROBABILITY_NOTE, LINKED_OUTCOMES_NOTE
from monitor.config import Config
from monitor.refit.stretches import STRETCHES_FACT, Stretches, day_number, from_day_number
from monitor.stats.lens import LENS_FIGURES
from monitor.store.connection import Store, get_fact
from monitor.store.rules import quote_ident

if TYPE_CHECKING:
    import pandas as pd

# pandas is imported where it is used: `cuewatch refit` imports this package but never
# reads fits, and pandas costs it ~0.2 s of start-up.

FIT_FIELDS = [
    "scope",
    "decision_maker",
    "team",
    "window_start",
    "window_end",
    "n_decisions",
    "n_linked",
    *LENS_FIGURES,
    # The judge model refitted on the linked rows: the R_s of the lens model equation,
    # so a reader can check r_a = G R_e R_s_linked + C sqrt(1 - R_e^2) sqrt(1 - R_s_linked^2).
    "R_s_linked",
]
CUE_FIELDS = [
    "cue",
    "weight",
    "std_error",
    "ci_low",
    "ci_high",
    "std_weight",
    "utilization_r",
    "validity_r",
    "p_value",
    "estimable",
    "reason",
]


def read_fits(
    config: Config,
    *,
    decision_maker: str | None = None,
    latest: bool = False,
    scope: str | None = None,
) -> list[dict]:
    """Stored window fits as `fits --json` objects (DESIGN.md, Contracts)."""
    store = Store(config)
    where, params = ["TRUE"], []
    if decision_maker is not None:
        where.append("f.decision_maker = ?")
        params.append(decision_maker)
    if scope is not None:
        where.append("f.scope = ?")
        params.append(scope)
    if latest:
        where.append(
            "f.window_end = (SELECT max(window_end) FROM fits g WHERE g.scope = f.scope "
            "AND g.decision_maker = f.decision_maker)"
        )
    order = "CASE f.scope WHEN 'decision_maker' THEN 0 WHEN 'team' THEN 1 ELSE 2 END, f.decision_maker, f.window_end"
    with store.reader() as con:
        store.ensure_ready(con)  # an old or uninitialised store: one sentence, exit 2
        fits = con.execute(
            f"SELECT {', '.join('f.' + quote_ident(c) for c in FIT_FIELDS)}, f.reason, "
            "f.df_resid FROM fits f "
            f"WHERE {' AND '.join(where)} ORDER BY {order}",
            params,
        ).df()
        cues = con.execute(
            f"SELECT c.scope, c.decision_maker, c.window_end, {', '.join('c.' + quote_ident(x) for x in CUE_FIELDS)} "
            f"FROM cue_weights c JOIN fits f USING (scope, decision_maker, window_end) "
            f"WHERE {' AND '.join(where)} ORDER BY c.scope, c.decision_maker, c.window_end, c.cue_index",
            params,
        ).df()
        spans = data_spans(con) if len(fits) else {}
    fits = _with_extras(fits, spans)
    grouped = {k: g for k, g in cues.groupby(["scope", "decision_maker", "window_end"], sort=False)}
    out = []
    for row in fits.itertuples(index=False):
        d = dict(zip([*FIT_FIELDS, "reason", *EXTRA_FIELDS], row, strict=True))
        g = grouped.get((d["scope"], d["decision_maker"], d["window_end"]))
        d["cues"] = (
            []
            if g is None
            else [
                _clean(dict(zip(CUE_FIELDS, r, strict=True)))
                for r in g[CUE_FIELDS].itertuples(index=False)
            ]
        )
        out.append(_clean(d))
    return out


# Added to each `fits --json` object beside the contract's fields:
# - data_from / data_to: the first and last day the window holds decisions of its series
#   (a window starting before the series' first decision, or ending after its latest,
#   holds fewer days than its length: ``partial`` is then true);
# - R_s_adjusted with R_s_ci_low / R_s_ci_high: consistency corrected for the number of
#   cues (Wherry) with its 95 % interval, and r_a_ci_low / r_a_ci_high: achievement's
#   95 % Fisher interval - the figures and intervals the floors judge
#   (``stats.trends.consistency_floor`` / ``achievement_floor``).
EXTRA_FIELDS = [
    "data_from",
    "data_to",
    "partial",
    "R_s_adjusted",
    "R_s_ci_low",
    "R_s_ci_high",
    "r_a_ci_low",
    "r_a_ci_high",
]
# Two-sided 95 %: the normal quantile 0.975.
Z95 = 1.959963984540054
_DATA_SPAN_SQL = """
    SELECT 'decision_maker' AS scope, decision_maker AS key, min(decided_day) AS first_day,
           max(decided_day) AS last_day FROM decisions GROUP BY decision_maker
    UNION ALL
    SELECT 'team', team, min(decided_day), max(decided_day) FROM decisions
    WHERE team IS NOT NULL GROUP BY team
    UNION ALL
    SELECT 'all', 'all', min(decided_day), max(decided_day) FROM decisions"""


def data_spans(con) -> dict[tuple[str, str], tuple[date, date]]:
    """(scope, key) -> the first and last day with decisions of every stored series."""
    import pandas as pd

    sql = _DATA_SPAN_SQL
    stretch_end = None
    if (
        not con.execute("SELECT count(*) FROM (SELECT 1 FROM decisions LIMIT 1)").fetchone()[0]
        and con.execute(
            "SELECT count(*) FROM duckdb_tables() WHERE table_name = 'bucket_stats'"
        ).fetchone()[0]
    ):
        # A store fed from a data lake ([lake]) holds buckets, not decisions: a bucket is
        # a (decision-maker, stretch of days) with decisions, its team the largest of its
        # rows'.  The span is then known to the stretch: from the first bucket's first
        # day to the last bucket's last day.
        sql = sql.replace("decided_day", "day").replace(
            "FROM decisions", "FROM (SELECT * FROM bucket_stats WHERE NOT linked_only)"
        )
        known = get_fact(con, STRETCHES_FACT)
        stretch_end = None if known is None else Stretches.from_json(known).last
    spans = {}
    for r in con.execute(sql).df().itertuples(index=False):
        if pd.isna(r.first_day):
            continue
        last = pd.Timestamp(r.last_day).date()
        if stretch_end is not None:
            last = from_day_number(int(stretch_end([day_number(last)])[0]))
        spans[(r.scope, r.key)] = (pd.Timestamp(r.first_day).date(), last)
    return spans


def held_days(start: date, end: date, span: tuple[date, date] | None) -> tuple[date, date, bool]:
    """(data_from, data_to, partial) of the window start..end of a series whose decisions
    run over ``span``: the window cut to the days with data, partial when that cut
    shortens it."""
    if span is None:
        return start, end, False
    lo, hi = max(start, span[0]), min(end, span[1])
    return lo, hi, (lo, hi) != (start, end)


def _with_extras(fits: pd.DataFrame, spans: dict) -> pd.DataFrame:
    """``fits`` (FIT_FIELDS, reason, df_resid) with EXTRA_FIELDS in place of df_resid."""
    from types import SimpleNamespace

    import pandas as pd

    from monitor.stats.trends import achievement_floor, consistency_floor

    out = fits.drop(columns=["df_resid"])
    if not len(fits):
        return out.assign(**{c: [] for c in EXTRA_FIELDS})
    start = pd.to_datetime(fits["window_start"]).dt.date
    end = pd.to_datetime(fits["window_end"]).dt.date
    keys = zip(fits["scope"], fits["decision_maker"], strict=True)
    held = [held_days(s, e, spans.get(k)) for s, e, k in zip(start, end, keys, strict=True)]
    out["data_from"] = [h[0] for h in held]
    out["data_to"] = [h[1] for h in held]
    out["partial"] = [h[2] for h in held]
    n = fits["n_decisions"].to_numpy(dtype=float)
    rs = consistency_floor(
        SimpleNamespace(n=n, df_resid=fits["df_resid"].to_numpy(dtype=float),
                        R_s=fits["R_s"].to_numpy(dtype=float)),
        floor=0.0, min_rows=0, z=Z95,
    )  # fmt: skip
    ra = achievement_floor(
        SimpleNamespace(r_a=fits["r_a"].to_numpy(dtype=float),
                        n_linked=fits["n_linked"].to_numpy(dtype=float)),
        floor=0.0, min_linked=4, z=Z95,
    )  # fmt: skip
    out["R_s_adjusted"], out["R_s_ci_low"], out["R_s_ci_high"] = rs.estimate, rs.ci_low, rs.ci_high
    out["r_a_ci_low"], out["r_a_ci_high"] = ra.ci_low, ra.ci_high
    return out


def window_label(fit: dict) -> str:
    """A window named by the days it holds: ``data_from..data_to``, marked partial when
    that is shorter than the window (the first windows of a series, the newest one)."""
    label = f"{fit['data_from']}..{fit['data_to']}"
    return label + " (partial)" if fit.get("partial") else label


def _clean(d: dict) -> dict:
    import pandas as pd

    out = {}
    for k, v in d.items():
        if isinstance(v, float) and not np.isfinite(v):
            v = None
        elif isinstance(v, np.floating):
            v = None if not np.isfinite(v) else float(v)
        elif isinstance(v, np.integer):
            v = int(v)
        elif isinstance(v, np.bool_):
            v = bool(v)
        elif isinstance(v, pd.Timestamp):
            v = v.date().isoformat()
        elif isinstance(v, date):
            v = v.isoformat()
        elif v is pd.NA or v is pd.NaT:
            v = None
        if k == "reason" and not v:
            v = None
        out[k] = v
    return out


def describe_fits(
    rows: list[dict],
    *,
    binary_judgment: bool = False,
    forbidden: Sequence[str] = (),
    width: int | None = None,
) -> str:
    """The stored fits (``read_fits`` objects) as a text table at most ``width`` wide
    (default: the terminal's), with the notes on outcome coverage (and, for a 0/1
    judgment, the linear probability model).  Every forbidden cue's standardised weight
    is shown (``forbidden``: the configuration's forbidden cue names), then the
    strongest other cues; R_s and r_a carry their 95 % intervals."""
    if not rows:
        return "No fits stored yet: run 'cuewatch refit'."
    from monitor.stats.design import cue_of
    from monitor.textual import paragraphs, render_table

    def num(v, fmt="{:.2f}"):
        return "-" if v is None else fmt.format(v)

    def interval(v, lo, hi):
        return num(v) + ("" if lo is None or hi is None else f" [{lo:.2f}, {hi:.2f}]")

    def cues(r: dict) -> str:
        barred = [c for c in r["cues"] if cue_of(c["cue"]) in forbidden]
        others = sorted(
            (c for c in r["cues"] if c["std_weight"] is not None and c not in barred),
            key=lambda c: -abs(c["std_weight"]),
        )
        shown = [f"!{c['cue']} {num(c['std_weight'], '{:+.2f}')}" for c in barred]
        return ", ".join(shown + [f"{c['cue']} {c['std_weight']:+.2f}" for c in others[:3]])

    notes_col = any(r.get("reason") for r in rows)
    table = render_table(
        "Window fits: R_s consistency (bias-adjusted) and r_a achievement with 95% intervals, "
        "G matching",
        ["who", "window (days with data)", "n / linked", "R_s adj. [95%]", "r_a [95%]", "G",
         "std weights: forbidden (!) and strongest cues", *(["note"] if notes_col else [])],
        [[f"{r['decision_maker']}" + ("" if r["scope"] == "decision_maker" else f" ({r['scope']})"),
          window_label(r), f"{r['n_decisions']} / {r['n_linked']}",
          interval(r["R_s_adjusted"], r["R_s_ci_low"], r["R_s_ci_high"]),
          interval(r["r_a"], r["r_a_ci_low"], r["r_a_ci_high"]), num(r["G"]), cues(r),
          *([r.get("reason") or ""] if notes_col else [])] for r in rows],
        width=width,
    )  # fmt: skip
    notes = [
        "A window marked (partial) holds fewer days than its length: it starts before the "
        "series' first decision or ends after its latest. R_s adj. is R_s corrected for the "
        "number of cues (raw R_s in --json). ! marks a cue the policy forbids.",
        LINKED_OUTCOMES_NOTE,
        *([LINEAR_PROBABILITY_NOTE] if binary_judgment else []),
    ]
    if forbidden:
        notes.append(CAUTION)
    return table + paragraphs(notes, width)
