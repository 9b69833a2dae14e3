"""Forbidden-cue evidence: disparity split into direct use and use through proxies."""

from __future__ import annotations

import streamlit as st

from dashboards import charts, ui
from monitor.dashboard import data as dd


def _label(cue, level) -> str:
    return str(cue) if level is None or level != level else f"{cue}={level}"


st.title("Forbidden-cue evidence")
ui.caution()
team_names = ui.load(dd.teams)
team = st.selectbox("Team", ["All teams", *team_names], key="fteam")
ev = ui.load(dd.forbidden_evidence, team=None if team == "All teams" else team)
rows = ev.rows
if rows.empty:
    st.info("No forbidden-cue findings yet: run `cuewatch assess` (or the nightly job).")
    st.stop()

verdicts = rows[~rows["level_detail"].astype(bool)]
flagged = verdicts[
    verdicts["flagged_direct"].astype(bool) | verdicts["flagged_indirect"].astype(bool)
]
st.subheader("Flagged in the latest window")
if flagged.empty:
    st.success("No decision-maker's latest window is flagged for a forbidden cue.")
else:
    st.markdown(
        "\n".join(
            f"- **{ui.md(r.decision_maker)}**: {ui.md(_label(r.cue, r.level))} "
            + ("direct" if r.flagged_direct else "")
            + (" and " if r.flagged_direct and r.flagged_indirect else "")
            + ("through proxies" if r.flagged_indirect else "")
            + f" (n = {int(r.n)})"
            for r in flagged.itertuples()
        )
    )

only_flagged = st.toggle("Only decision-makers with a flagged finding", value=False)
shown = rows[rows["decision_maker"].isin(flagged["decision_maker"])] if only_flagged else rows
st.caption(
    "Disparity: the difference in mean judgment between the level and the reference level. "
    "Direct: the level's own weight with everything else held fixed. Via proxies: the "
    "rest, carried by permitted cues that differ between the groups. Standardised units, "
    "95% intervals; n is the number of decisions in the window. A categorical cue has one "
    "verdict (its first row: the size of its levels together and their joint test); the "
    "rows of its levels beneath show their own figures and carry no verdict of their own."
)
per_column = shown[shown["level_detail"].astype(bool) | shown["disparity"].notna()]
if not per_column.empty:
    st.altair_chart(charts.forbidden_chart(per_column))

with st.expander("Table", expanded=True):
    st.dataframe(
        shown.drop(columns=["window_start"]),
        hide_index=True,
        width="stretch",
        column_config={
            c: st.column_config.NumberColumn(c, format="%.3f")
            for c in (
                "disparity",
                "direct",
                "indirect",
                "std_disparity",
                "std_weight",
                "ci_low",
                "ci_high",
                "std_indirect",
                "indirect_ci_low",
                "indirect_ci_high",
                "p_direct",
                "q_direct",
                "p_indirect",
                "q_indirect",
            )  # fmt: skip
        }
        | {"n": st.column_config.NumberColumn("n (decisions)")},
    )
with st.expander("Proxy cues carrying the indirect part"):
    st.dataframe(ev.proxies, hide_index=True, width="stretch")
