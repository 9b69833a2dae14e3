"""The real command line in a subprocess, and its output as text."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from helpers.configs import REPO


def run_cli(
    config: Path | None,
    *args: str,
    env: Mapping[str, str] | None = None,
    stdin: bytes | None = None,
    timeout: float = 120,
) -> subprocess.CompletedProcess:
    """Run ``python -m monitor [--config FILE] ARGS`` and capture its output as text."""
    cmd = [sys.executable, "-m", "monitor"]
    if config is not None:
        cmd += ["--config", str(config)]
    full_env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    full_env["PYTHONPATH"] = str(REPO)
    full_env.update(env or {})
    return subprocess.run(
        [*cmd, *args],
        input=stdin,
        capture_output=True,
        env=full_env,
        timeout=timeout,
        cwd=REPO,
    )


def text(proc: subprocess.CompletedProcess) -> tuple[str, str]:
    return proc.stdout.decode("utf-8", "replace"), proc.stderr.decode("utf-8", "replace")


def ingest_json(config: Path, *args: str, **kw: Any) -> dict:
    """Run ``ingest --json ARGS``; assert it printed one JSON document and return it."""
    proc = run_cli(config, "ingest", "--json", *args, **kw)
    out, err = text(proc)
    assert out.strip(), f"no JSON printed (exit {proc.returncode}): {err}"
    return json.loads(out)


def command_json(config: Path, *args: str) -> Any:
    """Run ``ARGS --json``; assert it succeeded and return the JSON it printed."""
    proc = run_cli(config, *args, "--json")
    assert proc.returncode == 0, text(proc)
    return json.loads(text(proc)[0])


# Fields that hold the time a row was written, not a figure of the data.
CLOCK_FIELDS = {"opened_at", "resolved_at", "acknowledged_at", "computed_at", "fitted_at"}


def json_differences(a: Any, b: Any, path: str = "") -> list[str]:
    """Where two JSON documents differ: floats beyond 1e-9 relative (1e-12 absolute near
    zero), anything else unequal; the clock fields are left out."""
    if isinstance(a, dict) and isinstance(b, dict):
        if set(a) != set(b):
            return [f"{path}: keys {sorted(set(a) ^ set(b))}"]
        return [
            d
            for k in a
            if k not in CLOCK_FIELDS
            for d in json_differences(a[k], b[k], f"{path}.{k}")
        ]
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{path}: {len(a)} items against {len(b)}"]
        return [
            d
            for i, (x, y) in enumerate(zip(a, b, strict=True))
            for d in json_differences(x, y, f"{path}[{i}]")
        ]
    if isinstance(a, float) and isinstance(b, float | int):
        ok = math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12) or (math.isnan(a) and math.isnan(b))
        return [] if ok else [f"{path}: {a!r} against {b!r}"]
    return [] if a == b else [f"{path}: {a!r} against {b!r}"]
