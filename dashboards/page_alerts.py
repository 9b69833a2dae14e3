"""Alerts: open, acknowledged and resolved, their evidence, acknowledging with a note."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from dashboards import ui
from monitor.dashboard import data as dd

st.title("Alerts")
alerts = ui.load(dd.alerts_table)
if alerts.empty:
    st.info("No alerts have been raised. The nightly job (or `cuewatch assess`) raises them.")
    st.stop()

counts = alerts["state"].value_counts()
cols = st.columns(3)
for col, state in zip(cols, ("open", "acknowledged", "resolved"), strict=True):
    col.metric(state.capitalize(), int(counts.get(state, 0)))
if alerts["kind"].isin(["forbidden_cue", "proxy_use"]).any():
    ui.caution()

for msg in st.session_state.pop("ack_messages", []):
    (st.success if msg[0] else st.error)(ui.md(msg[1]))
gate = dd.ack_gate(ui.config())


def evidence_line(a: pd.Series) -> str:
    n = "–" if pd.isna(a["n"]) else int(a["n"])
    interval = f"[{ui.number(a['ci_low'], 3)}, {ui.number(a['ci_high'], 3)}]"
    # Numbers are formatted here; the window's ends come from the stored evidence.
    return (
        f"window {ui.md(str(a['window_start'])[:10])} – {ui.md(str(a['window_end'])[:10])}, "
        f"size {ui.number(a['std_weight'], 3)} {interval}, q {ui.number(a['q_value'], 4)}, "
        f"n = {n}"
    )


def show(alert: pd.Series, can_ack: bool) -> None:
    parts = (alert["kind"], alert["decision_maker"], alert["cue"] if ui.given(alert["cue"]) else "")
    title = f"\\#{alert['id']} " + " · ".join(ui.md(p) for p in parts)
    with st.expander(title, expanded=can_ack):
        st.markdown(f"**Evidence:** {evidence_line(alert)}")
        st.json(alert["evidence"], expanded=False)
        if ui.given(alert["acknowledged_by"]):
            note = f": {ui.md(alert['note'])}" if ui.given(alert["note"]) else " (no note)"
            st.markdown(f"Acknowledged by **{ui.md(alert['acknowledged_by'])}**{note}")
        elif alert["state"] == "open":
            st.caption("Not acknowledged.")
        hist = pd.DataFrame(alert["history"] or [])
        if not hist.empty:
            st.dataframe(hist, hide_index=True, width="stretch")
        if can_ack:
            with st.form(f"ack-{alert['id']}", clear_on_submit=True):
                st.caption(ui.md(gate.notice))
                by = st.text_input("Your name", key=f"by-{alert['id']}")
                note = st.text_area("Note", key=f"note-{alert['id']}")
                secret = None
                if gate.secret_env:
                    secret = st.text_input(
                        "Shared secret", type="password", key=f"secret-{alert['id']}"
                    )
                if st.form_submit_button("Acknowledge", key=f"ack-btn-{alert['id']}"):
                    if not by.strip():
                        st.error("Say who is acknowledging the alert.")
                    else:
                        result = dd.acknowledge_alert(
                            ui.config(), int(alert["id"]), by, note, secret=secret
                        )
                        st.session_state["ack_messages"] = [(result.ok, result.message)]
                        st.rerun()


tabs = st.tabs(["Open", "Acknowledged", "Resolved"])
for tab, state in zip(tabs, ("open", "acknowledged", "resolved"), strict=True):
    with tab:
        subset = alerts[alerts["state"] == state]
        if subset.empty:
            st.caption(f"No {state} alerts.")
        for _, alert in subset.sort_values("id", ascending=False).iterrows():
            show(alert, can_ack=state == "open")
