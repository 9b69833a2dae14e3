"""Landing files are taken only when complete (README, "Landing files"): a file whose
name marks it as temporary is never read, and a file changed less than
``[ingest] settle_seconds`` ago is reported as waiting and left for the next run.

The main test runs a real slow writer (a separate process that appends a CSV file line
by line, each line in two halves so a read in between sees a cut value such as
``...,12`` for ``12.345``) while ingest runs again and again over the landing folder."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import DECISION_COLUMNS, make_config
from helpers.files import decision_row, write_csv
from helpers.store_rows import query

from monitor.config import ConfigError, load_config
from monitor.ingest.batches import ingest
from monitor.store.connection import Store

SETTLE_S = 1.0
ROWS = 24
PAUSE_S = 0.05  # between the two halves of a line and between lines: ~2.4 s in all

# Appends the bytes of argv[1] to argv[2] one line at a time, each line in two halves
# cut inside its 'amount' value (the byte offset after which to cut is in argv[3..]).
WRITER = """
import sys, time
src, dst, pause = sys.argv[1], sys.argv[2], float(sys.argv[3])
cuts = [int(c) for c in sys.argv[4:]]
lines = open(src, "rb").read().splitlines(keepends=True)
with open(dst, "ab") as out:
    out.write(lines[0])
    out.flush()
    for line, cut in zip(lines[1:], cuts):
        for part in (line[:cut], line[cut:]):
            out.write(part)
            out.flush()
            time.sleep(pause)
"""


def _setup(tmp_path: Path, settle: float) -> Path:
    """The small configuration with ``settle_seconds = settle`` and an initialised store."""
    cfg = make_config(tmp_path, ingest={"settle_seconds": settle})
    Store(load_config(cfg)).init()
    return cfg


def _rows() -> list[dict[str, str]]:
    # Amounts with three decimals, so a value cut short (12. / 12.3) differs from it.
    return [decision_row(i, amount=f"{10 + i * 7.125 + 0.001 * i:.3f}") for i in range(ROWS)]


def _stored(cfg: Path) -> dict[str, tuple[float, float]]:
    return {
        r[0]: (r[1], r[2])
        for r in query(cfg, "SELECT decision_id, judgment, amount FROM decisions ORDER BY 1")
    }


def _written(rows: list[dict[str, str]]) -> dict[str, tuple[float, float]]:
    # The values as written in the file (the reference the store is compared with).
    return {r["case_id"]: (float(r["score"]), float(r["amount"])) for r in rows}


def test_a_file_being_written_slowly_is_taken_only_when_complete(tmp_path):
    cfg = _setup(tmp_path, SETTLE_S)
    config = load_config(cfg)
    rows = _rows()
    source = write_csv(tmp_path / "outside" / "day.csv", rows)
    lines = source.read_bytes().splitlines(keepends=True)[1:]
    amount_at = DECISION_COLUMNS.index("amount")
    # Cut each line two characters into its amount value (after '12' of '12.345').
    cuts = [len(b",".join(line.split(b",")[:amount_at])) + 3 for line in lines]
    assert all(0 < c < len(line) for c, line in zip(cuts, lines, strict=True))
    target = tmp_path / "landing" / "decisions" / "day.csv"
    target.parent.mkdir(parents=True, exist_ok=True)
    writer = subprocess.Popen(
        [sys.executable, "-c", WRITER, str(source), str(target), str(PAUSE_S)]
        + [str(c) for c in cuts]
    )
    runs_while_writing = 0
    try:
        while writer.poll() is None:
            present = target.exists()
            summary = ingest(config)
            writing = present and writer.poll() is None  # there before, not finished after
            # Never a truncated row, nothing quarantined, at any moment.
            assert _stored(cfg) == {}
            assert query(cfg, "SELECT count(*) FROM quarantine") == [(0,)]
            if writing:
                runs_while_writing += 1
                assert [(f.status, f.path) for f in summary.files] == [("waiting", str(target))]
                assert summary.waiting_files == 1 and summary.accepted == 0
    finally:
        writer.wait(timeout=30)
    assert writer.returncode == 0
    assert runs_while_writing >= 2, "ingest never ran while the file was being written"
    assert target.read_bytes() == source.read_bytes()

    # Just finished: still within the settle time, so still waiting.
    changed = max(target.stat().st_mtime, target.stat().st_ctime)
    if time.time() - changed < SETTLE_S - 0.2:
        assert [f.status for f in ingest(config).files] == ["waiting"]
    time.sleep(max(0.0, changed + SETTLE_S + 0.1 - time.time()))

    done = ingest(config)
    assert [(f.status, f.accepted, f.quarantined) for f in done.files] == [("ingested", ROWS, 0)]
    assert _stored(cfg) == _written(rows)
    again = ingest(config)  # exactly once: the same bytes are not read twice
    assert [f.status for f in again.files] == ["skipped"]
    assert query(cfg, "SELECT count(*) FROM decisions") == [(ROWS,)]
    assert query(cfg, "SELECT count(*) FROM batches WHERE status = 'ingested'") == [(1,)]


def test_without_settling_a_cut_file_is_taken_at_once_and_keeps_the_cut_value(tmp_path):
    """settle_seconds = 0 turns the rule off: the file is read however young, and the
    hazard the rule guards against is real (a cut value goes in as a valid number)."""
    cfg = _setup(tmp_path, 0)
    rows = _rows()[:3]
    amount_last = [c for c in DECISION_COLUMNS if c != "amount"] + ["amount"]
    path = write_csv(tmp_path / "landing" / "decisions" / "day.csv", rows, amount_last)
    data = path.read_bytes()
    path.write_bytes(data[: data.rindex(rows[-1]["amount"].encode()) + 2])  # '...,12'
    summary = ingest(load_config(cfg))
    assert [(f.status, f.accepted) for f in summary.files] == [("ingested", 3)]
    stored = _stored(cfg)
    assert stored[rows[-1]["case_id"]][1] == float(rows[-1]["amount"][:2])
    assert stored[rows[-1]["case_id"]] != _written(rows)[rows[-1]["case_id"]]


def test_a_young_file_is_reported_waiting_and_not_recorded(tmp_path):
    cfg = _setup(tmp_path, 30)
    young = write_csv(tmp_path / "landing" / "decisions" / "new.csv", [decision_row(1)])
    # An old modification time restored by the copier (cp -p, rsync -t) does not count:
    # the inode's change time says the file was just written.
    restored = write_csv(tmp_path / "landing" / "decisions" / "copied.csv", [decision_row(2)])
    os.utime(restored, (time.time() - 3600, time.time() - 3600))
    proc = run_cli(cfg, "ingest", "--json")
    assert proc.returncode == 0, text(proc)
    doc = ingest_json(cfg)
    assert doc["waiting_files"] == 2 and doc["failed_files"] == 0 and doc["accepted"] == 0
    assert {f["path"]: f["status"] for f in doc["files"]} == {
        str(restored): "waiting",
        str(young): "waiting",
    }
    assert all("30 s" in f["message"] for f in doc["files"])
    assert query(cfg, "SELECT count(*) FROM batches") == [(0,)]
    human = run_cli(cfg, "ingest")
    assert human.returncode == 0 and "2 file(s) waiting" in text(human)[0]


def test_a_file_named_on_the_command_line_is_taken_as_it_is(tmp_path):
    cfg = _setup(tmp_path, 30)
    path = write_csv(tmp_path / "landing" / "decisions" / "new.csv", [decision_row(1)])
    summary = ingest(load_config(cfg), [str(path)])
    assert [f.status for f in summary.files] == ["ingested"]


@pytest.mark.parametrize(
    "name",
    [
        ".day.csv",
        "~day.csv",
        "day.csv.tmp",
        "day.csv.part",
        "day.csv.partial",
        "day.csv.filepart",
        "DAY.CSV.TMP",
        ".staging/day.csv",
    ],
)
def test_temporary_names_are_never_read(tmp_path, name):
    cfg = _setup(tmp_path, 0)
    landing = tmp_path / "landing" / "decisions"
    write_csv(landing / name, [decision_row(1)])
    write_csv(landing / "done.csv", [decision_row(2)])
    summary = ingest(load_config(cfg))
    assert [(Path(f.path).name, f.status) for f in summary.files] == [("done.csv", "ingested")]


def test_settle_zero_takes_a_young_file_at_once(tmp_path):
    cfg = _setup(tmp_path, 0)
    write_csv(tmp_path / "landing" / "decisions" / "new.csv", [decision_row(1)])
    summary = ingest(load_config(cfg))
    assert [f.status for f in summary.files] == ["ingested"]
    assert summary.waiting_files == 0


def test_the_default_settle_time_and_its_bounds(tmp_path):
    # A configuration without the key (the [ingest] section replaced by one without it).
    plain = make_config(tmp_path, ingest={"delimiter": ","})
    assert load_config(plain).ingest.settle_seconds == 5.0
    with pytest.raises(ConfigError, match="settle_seconds"):
        load_config(make_config(tmp_path, ingest={"settle_seconds": -1}))
