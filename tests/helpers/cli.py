"""The real command line in a subprocess, and its output as text."""

from __future__ import annotations

import json
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
