"""cuewatch oversight dashboard: `streamlit run dashboards/app.py -- --config FILE`.

Started by `cuewatch dashboard` (monitor.dashboard.start.launch).  It reads the store;
acknowledging an alert is its one write, through the store's single writer.  Every page
has an address of its own (/team, /person, ...); the root opens /team.
"""

from __future__ import annotations

import sys
from pathlib import Path

# `streamlit run` puts only this folder on sys.path; the pages import the
# `dashboards` package by name, so the project folder has to be there too.
_ROOT = str(Path(__file__).resolve().parent.parent)
if _ROOT not in sys.path:
    sys.path.insert(0, _ROOT)

import streamlit as st  # noqa: E402

from dashboards import ui  # noqa: E402

HERE = Path(__file__).resolve().parent

TEAM = st.Page(str(HERE / "page_team.py"), title="Team at a glance", icon=":material/groups:",
               url_path="team")  # fmt: skip


def _root() -> None:
    """The app's root address opens the team page under its own address, /team (the
    page Streamlit serves at the root has no other address)."""
    st.switch_page(TEAM)


PAGES = [
    st.Page(_root, title="cuewatch", url_path="start", default=True, visibility="hidden"),
    TEAM,
    st.Page(str(HERE / "page_person.py"), title="One decision-maker", icon=":material/person:",
            url_path="person"),
    st.Page(str(HERE / "page_forbidden.py"), title="Forbidden-cue evidence",
            icon=":material/block:", url_path="forbidden"),
    st.Page(str(HERE / "page_alerts.py"), title="Alerts", icon=":material/notifications:",
            url_path="alerts"),
    st.Page(str(HERE / "page_health.py"), title="Data health", icon=":material/monitor_heart:",
            url_path="health"),
    st.Page(str(HERE / "page_audit.py"), title="Audit pack", icon=":material/inventory_2:",
            url_path="audit"),
]  # fmt: skip

st.set_page_config(
    page_title="cuewatch oversight", page_icon=":material/visibility:", layout="wide"
)
cfg = ui.config()
st.sidebar.markdown("**cuewatch oversight**")
st.sidebar.caption(
    f"Store: {ui.md(Path(cfg.store.path).name)} · reads the store; acknowledging an alert "
    "is the one write"
)
st.navigation(PAGES).run()
