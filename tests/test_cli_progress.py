"""Long work is not silent on a terminal, and machine output stays lean.

`ingest`, `refit`, `export` and `nightly` show progress on stderr when it is a terminal
(a pseudo-terminal here, as an operator's shell gives) and nothing when it is a pipe or
with --json; `nightly --json` counts the files skipped as already ingested instead of
listing each one, unless asked with --list-skipped.
"""

from __future__ import annotations

import json
import os
import pty
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from helpers.cli import run_cli, text
from helpers.configs import REPO
from helpers.scenario import scenario_config

SAMPLE = REPO / "synthetic_logs" / "sample"


@pytest.fixture(scope="module")
def landed(tmp_path_factory) -> Path:
    """The committed sample in the landing folders of a fresh store (already ingested
    once, so a second nightly run skips every file)."""
    root = tmp_path_factory.mktemp("progress")
    cfg = scenario_config(root)
    for kind in ("decisions", "outcomes"):
        target = root / "landing" / kind
        target.mkdir(parents=True, exist_ok=True)
        for f in sorted((SAMPLE / kind).glob("*.csv")):
            shutil.copy(f, target / f.name)
    assert run_cli(cfg, "init").returncode == 0
    return cfg


def _on_a_terminal(cfg: Path, *args: str) -> tuple[int, str, str]:
    """Run the command with stderr on a pseudo-terminal; (exit code, stdout, terminal)."""
    master, slave = pty.openpty()
    env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    env |= {"PYTHONPATH": str(REPO), "TERM": "xterm", "COLUMNS": "120"}
    proc = subprocess.Popen(
        [sys.executable, "-m", "monitor", "--config", str(cfg), *args],
        stdout=subprocess.PIPE, stderr=slave, env=env, cwd=REPO,
    )  # fmt: skip
    os.close(slave)
    seen = bytearray()
    while True:
        try:
            chunk = os.read(master, 65536)
        except OSError:  # the slave side closed: the process has exited
            break
        if not chunk:
            break
        seen += chunk
    out = proc.stdout.read().decode()
    code = proc.wait(timeout=300)
    os.close(master)
    return code, out, seen.decode("utf-8", "replace")


def test_long_commands_show_progress_on_a_terminal_only(landed, tmp_path):
    code, _, term = _on_a_terminal(landed, "ingest")
    assert code == 0 and "ingest" in term
    code, _, term = _on_a_terminal(landed, "refit", "--full")
    assert code == 0 and "Refitting the rolling windows" in term
    code, _, term = _on_a_terminal(
        landed, "export", "--quarter", "2024Q4", "--out", str(tmp_path / "pack"), "--format", "csv"
    )  # fmt: skip
    assert code == 0 and "Writing the audit pack" in term
    # A pipe (cron, a script) gets no progress; --json on a terminal gets none either.
    _, err = text(run_cli(landed, "refit", "--full"))
    assert "Refitting" not in err
    code, out, term = _on_a_terminal(landed, "refit", "--full", "--json")
    assert code == 0 and "Refitting" not in term and json.loads(out)


def test_nightly_json_counts_skipped_files_unless_asked(landed):
    proc = run_cli(landed, "nightly", "--json")
    doc = json.loads(text(proc)[0])
    files = doc["ingest"]["files"]
    skipped = doc["ingest"]["skipped_files"]
    n_files = len(list((SAMPLE / "decisions").glob("*.csv"))) + len(
        list((SAMPLE / "outcomes").glob("*.csv"))
    )
    assert skipped == n_files  # the landing folders were ingested by the first test
    assert not any(f["status"] == "skipped" for f in files)
    listed = json.loads(text(run_cli(landed, "nightly", "--json", "--list-skipped"))[0])
    assert sum(f["status"] == "skipped" for f in listed["ingest"]["files"]) == n_files
