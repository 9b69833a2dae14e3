"""One decision-maker: cue weights window by window next to the team, lens figures."""

from __future__ import annotations

import streamlit as st

from dashboards import charts, ui
from monitor.dashboard import data as dd
from monitor.dashboard import person as dp
from monitor.errors import UserError
from monitor.refit.compare import TEST_NAME as compare_test
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
st.subheader("Compared with the team or a colleague")
others = [n for n in names if n != who]
choice = st.selectbox("Compare with", [dp.TEAM_CHOICE, *others], key="compare_with")
other = None if choice == dp.TEAM_CHOICE else choice
try:
    cmp = ui.load(dp.comparison, who, other)
except UserError as exc:  # no team, no common window
    st.info(ui.md(exc))
    cmp = None
if cmp is not None:
    ends = [w["window_end"] for w in cmp.windows]
    end = st.selectbox("Window ending", ends[::-1], key="compare_window")
    picked = cmp.window(end)
    weights_cmp, lens_cmp = dp.comparison_tables(cmp, end)
    st.markdown(
        f"**{ui.md(who)}** against **{ui.md(cmp.second_label)}**, window "
        f"{ui.md(picked['window_start'])} to {ui.md(picked['window_end'])} "
        f"(n = {picked['n_first']} and {picked['n_second']} decisions)"
    )
    st.dataframe(
        weights_cmp,
        hide_index=True,
        width="stretch",
        column_config={
            c: st.column_config.NumberColumn(c, format="%.4g")
            for c in weights_cmp.columns
            if c not in ("cue", "forbidden")
        },
    )
    st.caption(ui.md(f"Test of each difference: {compare_test}."))
    for note in cmp.notes:
        st.caption(ui.md(note))
    with st.expander("R_s, r_a and G side by side, every common window"):
        st.dataframe(lens_cmp, hide_index=True, width="stretch")

st.subheader("Weights over time, for a report")
st.caption(
    "One row per window and cue: weight, standard error, 95% interval, standardised "
    "weight, p-value, and the days each window holds data (partial windows marked)."
)
left, right = st.columns(2)
for col, fmt, mime in (
    (left, "csv", "text/csv"),
    (right, "xlsx", "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet"),
):
    try:
        payload = ui.load(dp.weights_file, who, fmt)
    except UserError as exc:
        col.info(ui.md(exc))
        continue
    col.download_button(
        f"Download the weight history ({fmt.upper()})",
        payload,
        file_name=f"weights-{who}.{fmt}",
        mime=mime,
        key=f"weights_{fmt}",
    )

with st.expander("Alerts for this decision-maker"):
    st.dataframe(hist.alert_spans, hide_index=True, width="stretch")
