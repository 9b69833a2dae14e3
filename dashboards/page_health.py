"""Data health: what was ingested, what was quarantined and why, outcome coverage."""

from __future__ import annotations

import altair as alt
import streamlit as st

from dashboards import ui
from monitor.dashboard.health import data_health
from monitor.palette import COLOURS

st.title("Data health")
health = ui.load(data_health)

cols = st.columns(3)
if health.last_nightly:
    cols[0].metric("Last successful nightly run", str(health.last_nightly["finished_at"])[:16])
else:
    cols[0].metric("Last successful nightly run", "none recorded")
accepted = health.batches["accepted"].sum() if len(health.batches) else 0
cols[1].metric("Rows accepted", f"{int(accepted):,}")
cols[2].metric("Rows quarantined", f"{int(health.quarantine['rows'].sum()):,}")
if health.last_run and health.last_run.get("status") != "ok":
    st.warning(
        f"Last run: {ui.md(health.last_run['command'])} {ui.md(health.last_run['status'])} "
        f"at {ui.md(str(health.last_run['finished_at'])[:16])}: "
        f"{ui.md(health.last_run['message'] or '')}"
    )

st.subheader("Outcome coverage and lag by decision month")
cov = health.coverage
if len(cov):
    base = alt.Chart(cov).encode(x=alt.X("yearmonth(month):O", title=None))
    share = base.mark_bar(color=COLOURS["person"], opacity=0.85).encode(
        y=alt.Y("share_linked:Q", title="share with an outcome", axis=alt.Axis(format="%")),
        tooltip=["month:T", "decisions", "linked", alt.Tooltip("share_linked:Q", format=".1%")],
    )
    lag = base.mark_line(color=COLOURS["forbidden"], point=True).encode(
        y=alt.Y("median_lag_days:Q", title="median lag (days)"),
        tooltip=[
            "month:T",
            alt.Tooltip("median_lag_days:Q", format=".0f"),
            alt.Tooltip("p90_lag_days:Q", format=".0f"),
        ],  # fmt: skip
    )
    st.altair_chart(
        alt.layer(share, lag).resolve_scale(y="independent").properties(height=220),
        width="stretch",
    )
    st.caption("Bars: share of decisions with a linked outcome. Line: median days to outcome.")

st.subheader("Quarantine by reason")
if health.quarantine.empty:
    st.success("No rows quarantined.")
else:
    st.altair_chart(
        alt.Chart(health.quarantine)
        .mark_bar(color=COLOURS["team"])
        .encode(
            y=alt.Y("reason:N", sort="-x", title=None, axis=alt.Axis(labelLimit=260)),
            x=alt.X("rows:Q", axis=alt.Axis(format="d", tickMinStep=1)),
            tooltip=["kind", "reason", "rows"],
        )  # fmt: skip
        .properties(height=max(120, 30 * len(health.quarantine))),
        width="stretch",
    )
    with st.expander("A sample of rejected rows"):
        st.dataframe(health.quarantine_sample, hide_index=True, width="stretch")

st.subheader("Still quarantined: list and re-admit")
waiting = int(health.waiting_by_reason["rows"].sum()) if len(health.waiting_by_reason) else 0
ever = int(health.quarantine["rows"].sum()) if len(health.quarantine) else 0
st.markdown(
    f"**{waiting:,}** of the {ever:,} quarantined records are still out of the store "
    f"({ever - waiting:,} re-admitted). `cuewatch quarantine` lists them and, once the "
    "configuration is fixed, re-admits them through the same checks as ingest."
)
if waiting:
    left, right = st.columns([1, 2])
    left.caption("By reason")
    left.dataframe(health.waiting_by_reason, hide_index=True, width="stretch")
    right.caption("By batch and file")
    right.dataframe(health.waiting_by_batch, hide_index=True, width="stretch")
st.code("\n".join(f"# {what}\n{cmd}" for cmd, what in health.commands), language="text")

with st.expander("Batches", expanded=False):
    st.dataframe(health.batches, hide_index=True, width="stretch")
with st.expander("Coverage table"):
    st.dataframe(health.coverage, hide_index=True, width="stretch")
