"""A small store built by the real pipeline from the committed Ostwyn sample (4 weeks of
2024Q4, 6 handlers) with some handler ids and team names replaced by hostile text, and one
planted open alert on a renamed handler; shared by the injection and dashboard-safety
tests.

`build_hostile_store(folder, handlers=..., teams=...)` writes the demo configuration
under ``folder``, runs init, ingest, refit and assess, and returns the config path and
the planted alert's id.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from monitor.assess.alerts import assess
from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.store.connection import Store
from monitor.store.rules import utc_now

REPO = Path(__file__).resolve().parents[2]
SAMPLE = REPO / "synthetic_logs" / "sample"

# Markdown that a browser would act on (an image fetch to a closed local port; bold) and
# spreadsheet formulas (OWASP's CSV-injection examples in spirit: a live link, a sum).
IMAGE_MD = "![x](http://127.0.0.1:9/x.png)"
BOLD_MD = "**bold**"
FORMULA = '=HYPERLINK("http://127.0.0.1:9/x","click")'
AT_FORMULA = "@SUM(1+1)"


def build_hostile_store(
    folder: Path, *, handlers: dict[str, str], teams: dict[str, str] | None = None
) -> tuple[Path, int]:
    """Ingest the sample with ``handlers`` / ``teams`` renamed (old -> new), refit, assess,
    and plant one open forbidden-cue alert on the first renamed handler.

    Returns (config path, planted alert id).
    """
    folder.mkdir(parents=True, exist_ok=True)
    raw = (REPO / "config" / "ostwyn.toml").read_text(encoding="utf-8")
    cfg_path = folder / "ostwyn.toml"
    cfg_path.write_text(raw.replace("../demo_run", str(folder / "run")), encoding="utf-8")
    config = load_config(cfg_path)
    Store(config).init()
    frames = [pd.read_csv(f, dtype=str) for f in sorted((SAMPLE / "decisions").glob("*.csv"))]
    decisions = pd.concat(frames, ignore_index=True)
    decisions["handler_id"] = decisions["handler_id"].replace(handlers)
    decisions["team"] = decisions["team"].replace(teams or {})
    outcomes = pd.concat(
        [pd.read_csv(f, dtype=str) for f in sorted((SAMPLE / "outcomes").glob("*.csv"))],
        ignore_index=True,
    )
    inbox = folder / "in"
    inbox.mkdir(exist_ok=True)
    decisions.to_csv(inbox / "decisions.csv", index=False)
    outcomes.to_csv(inbox / "outcomes.csv", index=False)
    ingest(config, [str(inbox / "decisions.csv")], kind="decisions")
    ingest(config, [str(inbox / "outcomes.csv")], kind="outcomes")
    refit(config)
    assess(config)
    who = next(iter(handlers.values()))
    team = decisions.loc[decisions["handler_id"] == who, "team"].iloc[0]
    return cfg_path, plant_alert(config, who, team)


def plant_alert(config, who: str, team: str) -> int:
    """An open forbidden-cue alert on ``who`` as `assess` records one (alerts row and its
    history row).  Planted: four weeks of the sample do not open one by themselves."""
    now = utc_now()
    evidence = {
        "window": {"start": "2024-08-27", "end": "2024-11-24"},
        "std_weight": 0.3,
        "interval": [0.2, 0.4],
        "q_value": 0.001,
        "n": 120,
    }
    with Store(config).writer() as con:
        alert_id = int(con.execute("SELECT nextval('alert_ids')").fetchone()[0])
        con.execute(
            "INSERT INTO alerts (alert_id, kind, scope, decision_maker, team, cue, state, "
            "opened_at, opened_window_end, evidence, updated_at) VALUES (?, 'forbidden_cue', "
            "'decision_maker', ?, ?, 'claimant_gender', 'open', ?, DATE '2024-11-24', ?, ?)",
            [alert_id, who, team, now, json.dumps(evidence), now],
        )
        con.execute(
            "INSERT INTO alert_history (alert_id, changed_at, from_state, to_state, changed_by, "
            "note, evidence) VALUES (?, ?, NULL, 'open', 'cuewatch assess', 'planted', ?)",
            [alert_id, now, json.dumps(evidence)],
        )
    return alert_id
