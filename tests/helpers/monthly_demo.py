"""A store built by the real command line from the demo scenario, landed month by month
with the last month held back (for tests of later nightly runs); shared by the
dashboard tests.

`build_demo(root)` builds once per folder; `copy_store` makes an independent copy for
tests that write.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from datetime import date
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
APP = REPO / "dashboards" / "app.py"
DEMO_CONFIG = REPO / "config" / "ostwyn.toml"
HELD_BACK_FROM = "2025-10"  # the last month stays out of the first build (for nightly tests)
# Quarantine reasons the ingest stage gives each planted bad-row kind (monitor/ingest_checks.py).
REASON_OF_KIND = {
    "priority_not_numeric": "judgment_not_numeric",
    "missing_handler_id": "missing_field",
    "priority_out_of_range": "judgment_out_of_range",
    "unknown_gender_code": "undeclared_level",
    "negative_claim_amount": "cue_out_of_range",
    "bad_binary_code": "binary_not_in_map",
    "unparseable_timestamp": "unparseable_timestamp",
    "duplicate_claim_id": "conflicting_duplicate",
}


def _monthly(src: Path, dest: Path, prefix: str, held: Path) -> None:
    """Concatenate the generator's daily files into one file per month (ingest cost is
    per file); months from HELD_BACK_FROM on go to ``held`` instead."""
    by_month: dict[str, list[Path]] = {}
    for p in sorted(src.glob(f"{prefix}_*.csv")):
        by_month.setdefault(p.stem.split("_")[1][:7], []).append(p)
    for month, files in by_month.items():
        folder = held if month >= HELD_BACK_FROM else dest
        folder.mkdir(parents=True, exist_ok=True)
        lines = files[0].read_text().splitlines(keepends=True)[:1]
        for f in files:
            lines += f.read_text().splitlines(keepends=True)[1:]
        (folder / f"{prefix}_{month}.csv").write_text("".join(lines))


def write_demo_config(root: Path) -> Path:
    text = DEMO_CONFIG.read_text().replace("../demo_run", str(root / "run"))
    cfg = root / "cuewatch.toml"
    cfg.write_text(text)
    return cfg


def build_demo(root: Path) -> Path:
    """Generate the scenario (seed 7, 365 days, 12 handlers), land all but the last
    month, run `init` and the real nightly job (ingest + refit + assess); reuse the
    build when ``root`` already holds one.  Returns the config path."""
    cfg = root / "cuewatch.toml"
    if (root / "built").exists():
        return cfg
    from synthetic_logs.ostwyn import generate

    generate(root / "gen", seed=7, days=365, n_handlers=12, outcome_horizon=date(2026, 1, 31))
    write_demo_config(root)
    for kind in ("decisions", "outcomes"):
        _monthly(root / "gen" / kind, root / "run/landing" / kind, kind, root / "later" / kind)
    for args in (["init"], ["nightly"]):
        proc = subprocess.run(
            [sys.executable, "-m", "monitor", "--config", str(cfg), *args],
            capture_output=True, cwd=REPO, timeout=600,
        )  # fmt: skip
        assert proc.returncode == 0, proc.stderr.decode()
    (root / "built").touch()
    return cfg


def copy_store(cfg: Path, dest: Path) -> Path:
    """An independent copy of a built store (for tests that write)."""
    src = cfg.parent
    shutil.copytree(src / "run", dest / "run")
    shutil.copytree(src / "later", dest / "later")
    shutil.copy(src / "gen" / "truth.json", dest / "truth.json")
    return write_demo_config(dest)


def run_page(cfg: Path, monkeypatch, page: str | None = None):
    """Run the dashboard app with Streamlit's AppTest on ``cfg`` (and switch to ``page``);
    fails on any exception the page raised."""
    from streamlit.testing.v1 import AppTest

    monkeypatch.setenv("CUEWATCH_CONFIG", str(cfg))
    at = AppTest.from_file(str(APP), default_timeout=60)
    at.run()
    if page:
        at.switch_page(page)
        at.run()
    assert not at.exception, [e.value for e in at.exception]
    return at
