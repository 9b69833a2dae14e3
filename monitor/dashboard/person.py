"""Reads for the person page's comparison and weight-history download.

The comparison is ``refit.compare`` (the same figures as `cuewatch compare`), shaped as
tables; the download is ``refit.weight_history``'s CSV or XLSX file as bytes.
"""

from __future__ import annotations

import pandas as pd

from monitor.config import Config
from monitor.refit.compare import Comparison, compare
from monitor.refit.weight_history import weight_history_bytes

TEAM_CHOICE = "the rest of the team"


def comparison(config: Config, who: str, other: str | None) -> Comparison:
    """``who`` against ``other`` (a decision-maker), or the rest of their team (None)."""
    return compare(config, who, other)


def comparison_tables(
    c: Comparison, window_end: str | None = None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(weights of one window side by side with the test of their difference, the
    lens figures of every common window side by side)."""
    w = c.window(window_end)
    a, b = c.first, c.second_label
    weights = pd.DataFrame(
        [
            {
                "cue": x["cue"],
                "forbidden": x["forbidden"],
                f"{a}: weight": x["weight_first"],
                f"{a}: s.e.": x["std_error_first"],
                f"{b}: weight": x["weight_second"],
                f"{b}: s.e.": x["std_error_second"],
                "difference": x["difference"],
                "s.e. of difference": x["std_error"],
                "z": x["z"],
                "p": x["p_value"],
                f"{a}: std weight": x["std_weight_first"],
                f"{b}: std weight": x["std_weight_second"],
            }
            for x in w["cues"]
        ]
    )
    lens = pd.DataFrame(
        [
            {
                "window_start": x["window_start"],
                "window_end": x["window_end"],
                f"n {a}": x["n_first"],
                f"n {b}": x["n_second"],
                f"R_s {a}": x["R_s_first"],
                f"R_s {b}": x["R_s_second"],
                f"r_a {a}": x["r_a_first"],
                f"r_a {b}": x["r_a_second"],
                f"G {a}": x["G_first"],
                f"G {b}": x["G_second"],
                "joint p (all weights)": x["joint_p"],
            }
            for x in c.windows
        ]
    )
    return weights, lens


def weights_file(config: Config, who: str, fmt: str) -> bytes:
    """``who``'s cue weights window by window as a CSV or XLSX file."""
    return weight_history_bytes(config, who, fmt)
