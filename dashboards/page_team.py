"""Team at a glance: every decision-maker's latest window, who is flagged and why."""

from __future__ import annotations

import streamlit as st

from dashboards import charts, ui
from monitor.dashboard import data as dd

st.title("Team at a glance")
# One read gives the period's figures, the stored span and the team list; the widgets'
# values from the previous run (session state) choose what it reads.
team = st.session_state.get("team", "All teams")
chosen_team = None if team == "All teams" else team
view = ui.load(dd.overview, st.session_state.get("period"), team=chosen_team)
if view.span is None:
    st.info("No window fits yet: run `cuewatch refit` (or the nightly job).")
    st.stop()

left, right = st.columns([1, 2])
left.selectbox("Team", ["All teams", *view.teams], key="team")
right.slider(
    "Period (window ends)",
    min_value=view.span[0],
    max_value=view.span[1],
    value=view.period,
    key="period",
)
rows = view.rows

st.subheader("Flagged now")
if view.flagged.empty:
    st.success("No decision-maker has an open or acknowledged alert in this view.")
else:
    st.markdown(
        "\n".join(
            f"- **{ui.md(r.decision_maker)}** ({ui.md(r.team)}): {ui.md(r.why)}"
            for r in view.flagged.itertuples()
        )
    )

people = rows[rows["scope"] == "decision_maker"]
if not people.empty:
    st.altair_chart(charts.overview_chart(rows), width="stretch")

st.subheader("Latest window per decision-maker, team and overall")
table = rows.assign(
    who=rows["decision_maker"],
    level=rows["scope"].map({"decision_maker": "person", "team": "team", "all": "overall"}),
)[["level", "who", "team", "window_end", "n_decisions", "R_s", "r_a", "n_linked",
   "open_alerts", "why", "R_s_trend"]]  # fmt: skip
st.dataframe(
    table,
    hide_index=True,
    width="stretch",
    column_config={
        "window_end": st.column_config.DateColumn("window end"),
        "n_decisions": st.column_config.NumberColumn("n", help="decisions in the window"),
        "R_s": st.column_config.NumberColumn("R_s", format="%.2f", help="consistency"),
        "r_a": st.column_config.NumberColumn("r_a", format="%.2f", help="achievement"),
        "n_linked": st.column_config.NumberColumn("linked", help="decisions with an outcome"),
        "open_alerts": st.column_config.NumberColumn("open alerts"),
        "why": st.column_config.TextColumn("why"),
        "R_s_trend": st.column_config.LineChartColumn("R_s over the period", y_min=0, y_max=1),
    },
)
st.caption(
    "R_s: how well a linear model of the person's own cue use reproduces their judgments. "
    "r_a: correlation of judgments with the outcomes that have come in (linked rows only)."
)
