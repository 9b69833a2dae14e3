"""Altair charts for the dashboard pages: frames from monitor.dashboard.data in, charts out.

No Streamlit and no store access here, so each chart can be built in a test.
"""

from __future__ import annotations

import altair as alt
import pandas as pd

from monitor.palette import ACHIEVEMENT, COLOURS, CONSISTENCY, LENS_RANGE
from monitor.stats.design import cue_of

STATUS_DOMAIN = ["permitted cue", "forbidden by policy", "team median"]
STATUS_RANGE = [COLOURS["permitted"], COLOURS["forbidden"], COLOURS["team"]]
LENS_ORDER = [
    "achievement r_a",
    "consistency R_s",
    "environment predictability R_e",
    "matching G",
    "unmodelled agreement C",
    "model of the judge G·R_e",
]


def _status_scale() -> alt.Scale:
    return alt.Scale(domain=STATUS_DOMAIN, range=STATUS_RANGE)


def overview_chart(rows: pd.DataFrame) -> alt.Chart:
    """Dots for consistency R_s and achievement r_a per decision-maker in the latest
    window; the names of decision-makers with open alerts are drawn bold in the flag
    colour."""
    people = rows[rows["scope"] == "decision_maker"].copy()
    long = people.melt(
        id_vars=["decision_maker", "n_decisions", "n_linked", "why"],
        value_vars=["R_s", "r_a"],
        var_name="figure",
        value_name="value",
    )
    long["figure"] = long["figure"].map({"R_s": "consistency R_s", "r_a": "achievement r_a"})
    flagged = people.loc[people["open_alerts"] > 0, "decision_maker"].astype(str).tolist()
    is_flagged = f"indexof({flagged!r}, datum.value) >= 0"
    axis = alt.Axis(
        labelColor=alt.ExprRef(f"{is_flagged} ? '{COLOURS['flag']}' : '{COLOURS['ink']}'"),
        labelFontWeight=alt.ExprRef(f"{is_flagged} ? 'bold' : 'normal'"),
        labelOverlap=False,
    )
    return (
        alt.Chart(long)
        .mark_circle(size=90, opacity=0.9)
        .encode(
            y=alt.Y("decision_maker:N", title=None, sort=None, axis=axis),
            x=alt.X("value:Q", title="latest window", scale=alt.Scale(domain=[-0.2, 1])),
            color=alt.Color(
                "figure:N",
                scale=alt.Scale(
                    domain=["consistency R_s", "achievement r_a"],
                    range=[CONSISTENCY, ACHIEVEMENT],
                ),  # fmt: skip
                legend=alt.Legend(title=None, orient="top"),
            ),
            tooltip=[
                "decision_maker",
                "figure",
                alt.Tooltip("value:Q", format=".2f"),
                "n_decisions",
                "n_linked",
                "why",
            ],  # fmt: skip
        )
        .properties(height=max(160, 26 * len(people)))
    )


def weight_panels(weights: pd.DataFrame, spans: pd.DataFrame, columns: int = 3) -> alt.ConcatChart:
    """One small panel per design column: the standardised weight over window ends with
    its interval band, the team median dashed, alert periods for that cue shaded."""
    panels = []
    for cue, df in weights.groupby("cue", sort=False):
        df = df.copy()
        forbidden = bool(df["forbidden"].iloc[0])
        df["status"] = "forbidden by policy" if forbidden else "permitted cue"
        base = alt.Chart(df).encode(x=alt.X("window_end:T", title=None))
        band = base.mark_area(opacity=0.22).encode(
            y=alt.Y("std_ci_low:Q", title="std. weight"),
            y2="std_ci_high:Q",
            color=alt.Color("status:N", scale=_status_scale(), legend=alt.Legend(title="Line")),
        )
        line = base.mark_line(strokeWidth=2.2 if forbidden else 1.6).encode(
            y="std_weight:Q",
            color=alt.Color("status:N", scale=_status_scale()),
            tooltip=[
                alt.Tooltip("window_end:T", title="window end"),
                alt.Tooltip("std_weight:Q", format=".3f"),
                alt.Tooltip("std_ci_low:Q", format=".3f"),
                alt.Tooltip("std_ci_high:Q", format=".3f"),
                "n_decisions",
                alt.Tooltip("team_median:Q", format=".3f"),
            ],  # fmt: skip
        )
        median = (
            base.transform_calculate(status="'team median'")
            .mark_line(strokeDash=[5, 3])
            .encode(y="team_median:Q", color=alt.Color("status:N", scale=_status_scale()))
        )
        zero = (
            alt.Chart(pd.DataFrame({"y": [0.0]}))
            .mark_rule(color=COLOURS["zero_line"])
            .encode(y="y:Q")
        )
        layers = [zero, band, median, line]
        base_name = cue_of(cue)
        cue_spans = spans[spans["cue"].isin([cue, base_name])] if len(spans) else spans
        if len(cue_spans):
            shade = (
                alt.Chart(cue_spans)
                .mark_rect(opacity=0.28, color=COLOURS["alert"])
                .encode(x="start:T", x2="end:T", tooltip=["alert_id", "kind", "state"])
            )
            layers.insert(0, shade)
        title = f"{cue} (forbidden)" if forbidden else str(cue)
        panels.append(
            alt.layer(*layers).properties(
                title=alt.TitleParams(title, color=COLOURS["forbidden"] if forbidden else None),
                width=230,
                height=130,
            )
        )
    return (
        alt.concat(*panels, columns=columns)
        .resolve_scale(y="independent")
        .configure_legend(orient="bottom", title=None, labelFontSize=12)
    )


def lens_chart(lens: pd.DataFrame) -> alt.Chart:
    """The lens figures over window ends, one line each; tooltips carry sample sizes."""
    from monitor.dashboard.data import LENS_FIGURES

    df = lens.copy()
    df["figure"] = df["figure"].map(LENS_FIGURES)
    return (
        alt.Chart(df)
        .mark_line(point=alt.OverlayMarkDef(size=18))
        .encode(
            x=alt.X("window_end:T", title="window end"),
            y=alt.Y("value:Q", title=None, scale=alt.Scale(domain=[-0.3, 1])),
            color=alt.Color(
                "figure:N",
                scale=alt.Scale(domain=LENS_ORDER, range=LENS_RANGE),
                legend=alt.Legend(title=None, orient="bottom", columns=3),
            ),  # fmt: skip
            tooltip=[
                alt.Tooltip("window_end:T", title="window end"),
                "figure",
                alt.Tooltip("value:Q", format=".3f"),
                "n_decisions",
                "n_linked",
            ],  # fmt: skip
        )
        .properties(height=260)
    )


def forbidden_chart(rows: pd.DataFrame) -> alt.Chart:
    """Per decision-maker and cue level: disparity, direct and via-proxy parts in
    standardised units, the last two with their intervals."""
    parts = []
    for label, value, lo, hi in (
        ("disparity", "std_disparity", None, None),
        ("direct", "std_weight", "ci_low", "ci_high"),
        ("via proxies", "std_indirect", "indirect_ci_low", "indirect_ci_high"),
    ):
        part = rows[["decision_maker", "cue", "level", "n"]].copy()
        part["part"], part["value"] = label, rows[value]
        part["low"] = rows[lo] if lo else None
        part["high"] = rows[hi] if hi else None
        parts.append(part)
    df = pd.concat(parts, ignore_index=True)
    df["cue level"] = [
        c if lv is None or lv != lv else f"{c}={lv}"
        for c, lv in zip(df["cue"], df["level"], strict=True)
    ]
    colour = alt.Color(
        "part:N",
        scale=alt.Scale(
            domain=["disparity", "direct", "via proxies"],
            range=[COLOURS["team"], COLOURS["forbidden"], COLOURS["second"]],
        ),  # fmt: skip
        legend=alt.Legend(title=None, orient="top"),
    )
    y = alt.Y("part:N", title=None, axis=None)
    base = alt.Chart(df).encode(y=y, color=colour)
    rules = base.mark_rule(strokeWidth=2).encode(x="low:Q", x2="high:Q")
    dots = base.mark_point(filled=True, size=60).encode(
        x=alt.X("value:Q", title="standardised size"),
        tooltip=[
            "decision_maker",
            "cue level",
            "part",
            alt.Tooltip("value:Q", format=".3f"),
            alt.Tooltip("low:Q", format=".3f"),
            alt.Tooltip("high:Q", format=".3f"),
            "n",
        ],  # fmt: skip
    )
    zero = alt.Chart().mark_rule(color=COLOURS["zero_line"]).encode(x=alt.datum(0))
    return (
        alt.layer(zero, rules, dots, data=df)
        .properties(width=170, height=60)
        .facet(row=alt.Row("decision_maker:N", title=None), column=alt.Column("cue level:N"))
    )
