"""A store built from the demo scenario, shared by tests that need realistic fits.

`build_demo_store(folder, ...)` generates the Ostwyn Mutual scenario, ingests every
file, refits and assesses (one nightly run over the landing folders), and returns
the configuration path.  It builds once per folder: a marker file records the
arguments, so a session-scoped fixture can call it freely.
"""

from __future__ import annotations

import json
from pathlib import Path

from monitor.demo import prepare
from monitor.nightly import run_nightly
from synthetic_logs.ostwyn import day_files


def build_demo_store(folder: Path, *, seed: int = 7, days: int = 365, n_handlers: int = 12) -> Path:
    folder = Path(folder)
    marker = folder / "built.json"
    args = {"seed": seed, "days": days, "n_handlers": n_handlers}
    if marker.exists() and json.loads(marker.read_text()) == args:
        return folder / "ostwyn.toml"
    config = prepare(folder, seed=seed, days=days, n_handlers=n_handlers)
    from monitor.store.connection import Store

    Store(config).init()
    # One file per kind, days in arrival order (a per-day file costs a transaction each;
    # the order inside a file keeps "the latest correction wins" the same).
    targets = {
        "decisions": Path(config.decisions.landing) / "decisions_all.csv",
        "outcomes": Path(config.outcomes.landing) / "outcomes_all.csv",
    }
    handles = {k: open(t, "w", encoding="utf-8", newline="") for k, t in targets.items()}
    try:
        for _, files in day_files(folder / "scenario"):
            for f in files:
                lines = f.read_text(encoding="utf-8").splitlines(keepends=True)
                out = handles[f.parent.name]
                out.writelines(lines if out.tell() == 0 else lines[1:])
    finally:
        for h in handles.values():
            h.close()
    run_nightly(config)
    marker.write_text(json.dumps(args))
    return Path(config.source)
