"""The demo configuration pointed at a test folder, and files joined in arrival order."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

REPO = Path(__file__).resolve().parents[2]


def scenario_config(folder: Path, name: str = "cw.toml") -> Path:
    """The demo configuration (config/ostwyn.toml) with its store under ``folder``."""
    src = (REPO / "config" / "ostwyn.toml").read_text(encoding="utf-8")
    src = src.replace("../demo_run/cuewatch.duckdb", "store/cw.duckdb")
    src = src.replace("../demo_run/landing/", "landing/").replace("../demo_run/", "")
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(src, encoding="utf-8")
    return path


def concat_csv(paths: list[Path], out: Path) -> Path:
    """One file holding the rows of ``paths`` in order (arrival order is kept)."""
    frames = [pd.read_csv(p, dtype=str, keep_default_na=False) for p in paths]
    out.parent.mkdir(parents=True, exist_ok=True)
    pd.concat(frames, ignore_index=True).to_csv(out, index=False)
    return out
