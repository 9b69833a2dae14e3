"""One decision-maker: cue weights window by window next to the team, lens figures."""

from __future__ import annotations

import streamlit as st

from dashboards import charts, ui
from monitor.dashboard import data as dd
from monitor.refit.fits_read import CUE_FIELDS

st.title("One decision-maker")
people = ui.load(dd.decision_makers)
if people.empty:
    st.info("No window fits yet: run `cuewatch refit` (or the nightly job).")
    st.stop()
names = people["decision_maker"].tolist()
wanted = st.query_params.get("who")
who = st.selectbox(
    "Decision-maker", names, index=names.index(wanted) if wanted in names else 0, key="who"
)
hist = ui.load(dd.person_history, who)
latest = hist.lens[hist.lens["window_end"] == hist.lens["window_end"].max()]
figures = dict(zip(latest["figure"], latest["value"], strict=True))
n_row = latest.iloc[0] if len(latest) else None

cols = st.columns(5)
cols[0].metric("Team", ui.md(hist.team or None))
cols[1].metric("Decisions (latest window)", "–" if n_row is None else int(n_row["n_decisions"]))
cols[2].metric("Linked outcomes", "–" if n_row is None else int(n_row["n_linked"]))
cols[3].metric("Consistency R_s", ui.number(figures.get("R_s")))
cols[4].metric("Achievement r_a", ui.number(figures.get("r_a")))

st.subheader("Cue weights window by window")
st.caption(
    "Standardised weights with their 95% interval band; dashed grey: the median of the "
    "team's decision-makers; orange: a cue the policy forbids; amber shading: periods "
    "with an alert on that cue."
)
if hist.weights.empty:
    st.info("No weights stored for this decision-maker.")
else:
    st.altair_chart(charts.weight_panels(hist.weights, hist.alert_spans))
if hist.weights["forbidden"].any():
    ui.caution()

st.subheader("Consistency and accuracy as outcomes came in")
st.altair_chart(charts.lens_chart(hist.lens), width="stretch")
st.caption(
    "r_a = G·R_e·R_s + C·√(1−R_e²)·√(1−R_s²). The model of the judge (G·R_e) is what a "
    "perfectly consistent version of this person would reach."
)

with st.expander("Latest window: weights table", expanded=True):
    # The columns of `fits --json` (one owner: monitor.refit.fits_read.CUE_FIELDS), with
    # whether the cue is forbidden and the window's size.
    table = hist.latest[["cue", "forbidden", *CUE_FIELDS[1:], "n_decisions"]]
    numbers = [c for c in CUE_FIELDS if c not in ("cue", "p_value", "estimable", "reason")]
    st.dataframe(
        table,
        hide_index=True,
        width="stretch",
        column_config={c: st.column_config.NumberColumn(c, format="%.3f") for c in numbers}
        | {"n_decisions": st.column_config.NumberColumn("n")},
    )
with st.expander("Alerts for this decision-maker"):
    st.dataframe(hist.alert_spans, hide_index=True, width="stretch")
