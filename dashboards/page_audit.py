"""Audit pack: build the quarterly audit tables into a temporary folder, download a zip."""

from __future__ import annotations

import streamlit as st

from dashboards import ui
from monitor.dashboard import data as dd
from monitor.dashboard import download

st.title("Audit pack")
if not download.audit_available():
    st.info(
        "The audit export is not installed in this version of cuewatch, so no pack can be "
        "built here yet. The other pages work as usual."
    )
    st.stop()

span = ui.load(dd.window_range)
if span is None:
    st.info("No window fits yet: run `cuewatch refit` (or the nightly job).")
    st.stop()
ui.caution()
with st.form("audit"):
    quarter = st.selectbox("Quarter", download.quarters(span))
    as_of = st.text_input("As of (ISO 8601; empty = everything ingested so far)", "")
    formats = st.multiselect("Formats", ["csv", "parquet", "xlsx", "html"], ["csv", "html"])
    build = st.form_submit_button("Build the pack")
if build:
    with st.spinner("Building…"):
        try:
            data, result = download.build_audit_pack(ui.config(), quarter, as_of or None, formats)
        except Exception as exc:  # the export's own user errors: show them, do not crash
            first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            st.error(f"The pack could not be built: {ui.md(first)}")
            st.stop()
    st.session_state["audit_pack"] = (quarter, data, result.get("summary", ""))
if "audit_pack" in st.session_state:
    q, data, summary = st.session_state["audit_pack"]
    st.success(f"Audit pack for {q} is ready ({len(data) / 1024:.0f} KiB). {ui.md(summary)}")
    st.download_button(
        "Download the audit pack (zip)", data, file_name=f"cuewatch-audit-{q}.zip",
        mime="application/zip",
    )  # fmt: skip
