"""Stored window fits read back as `fits --json` objects (DESIGN.md, Contracts)."""

from __future__ import annotations

import io
from datetime import date

import numpy as np
import pandas as pd

from monitor.cautions import LINEAR_PROBABILITY_NOTE, LINKED_OUTCOMES_NOTE
from monitor.config import Config
from monitor.stats.lens import LENS_FIGURES
from monitor.store.connection import Store
from monitor.store.rules import quote_ident

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
            f"SELECT {', '.join('f.' + quote_ident(c) for c in FIT_FIELDS)}, f.reason FROM fits f "
            f"WHERE {' AND '.join(where)} ORDER BY {order}",
            params,
        ).df()
        cues = con.execute(
            f"SELECT c.scope, c.decision_maker, c.window_end, {', '.join('c.' + quote_ident(x) for x in CUE_FIELDS)} "
            f"FROM cue_weights c JOIN fits f USING (scope, decision_maker, window_end) "
            f"WHERE {' AND '.join(where)} ORDER BY c.scope, c.decision_maker, c.window_end, c.cue_index",
            params,
        ).df()
    grouped = {k: g for k, g in cues.groupby(["scope", "decision_maker", "window_end"], sort=False)}
    out = []
    for row in fits.itertuples(index=False):
        d = dict(zip([*FIT_FIELDS, "reason"], row, strict=True))
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


def _clean(d: dict) -> dict:
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


def describe_fits(rows: list[dict], *, binary_judgment: bool = False) -> str:
    """The stored fits (``read_fits`` objects) as a text table for a person, with the
    notes on outcome coverage (and, for a 0/1 judgment, the linear probability model)."""
    if not rows:
        return "No fits stored yet: run 'cuewatch refit'."
    from rich.console import Console
    from rich.table import Table

    def num(v, fmt="{:.2f}"):
        return "-" if v is None else fmt.format(v)

    table = Table(title="Window fits (R_s consistency, r_a achievement, G matching)")
    for col in (
        "scope",
        "who",
        "window",
        "n",
        "linked",
        "R_s",
        "R_e",
        "r_a",
        "G",
        "C",
        "strongest cues (std weight)",
        "note",
    ):
        table.add_column(col)
    for r in rows:
        cues = sorted(
            (c for c in r["cues"] if c["std_weight"] is not None),
            key=lambda c: -abs(c["std_weight"]),
        )[:3]
        table.add_row(
            r["scope"],
            str(r["decision_maker"]),
            f"{r['window_start']}..{r['window_end']}",
            str(r["n_decisions"]),
            str(r["n_linked"]),
            num(r["R_s"]),
            num(r["R_e"]),
            num(r["r_a"]),
            num(r["G"]),
            num(r["C"]),
            ", ".join(f"{c['cue']} {c['std_weight']:+.2f}" for c in cues),
            r.get("reason") or "",
        )
    console = Console(width=200, record=True, file=io.StringIO())
    console.print(table)
    notes = [LINKED_OUTCOMES_NOTE, *([LINEAR_PROBABILITY_NOTE] if binary_judgment else [])]
    return console.export_text() + "\n".join(notes) + "\n"
