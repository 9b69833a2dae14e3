"""cuewatch's colours: one palette for the dashboard's charts and theme and the audit
report's charts, so a figure looks the same on screen and in the pack.

Plain hex strings, no plotting library: the audit pack reads this without importing
the dashboard's Altair or Streamlit.
"""

from __future__ import annotations

# Teal for the person (and permitted cues), warm grey for the team, burnt orange for
# forbidden cues, plum for the second figure beside the person's (achievement, the part
# carried by proxies), pale amber for alert periods, brick red for a flag.
COLOURS = {
    "person": "#1f6f78",
    "team": "#8a817c",
    "forbidden": "#c2410c",
    "permitted": "#1f6f78",
    "second": "#6a4c93",
    "alert": "#f2c14e",
    "flag": "#b42318",
    "zero_line": "#c9c9c9",
    "ink": "#1d2b2f",
}

# The lens figures' lines, in the order of the dashboard's legend.
LENS_RANGE = ["#1f6f78", "#6a4c93", "#8a817c", "#2a9d8f", "#bc8a5f", "#c2410c"]

# The consistency / achievement pair, as the dashboard's overview and the report draw it.
CONSISTENCY = COLOURS["person"]
ACHIEVEMENT = COLOURS["second"]
