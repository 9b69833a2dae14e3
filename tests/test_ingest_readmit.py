"""`cuewatch quarantine`: listing quarantined records and re-admitting them, exactly
once and with provenance, after the configuration changed.

The expected counts and values come from the crafted rows of the raw file (the outside
reference here): which rows carry the undeclared level, which fail for another reason.
"""

from __future__ import annotations

import json

import pytest
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import make_config
from helpers.files import decision_row, outcome_row, write_csv
from helpers.store_rows import read_store

from monitor.config import load_config
from monitor.ingest import readmit as readmit_module
from monitor.ingest.readmit import READMIT_PREFIX, Selection, list_quarantine, readmit

# Lines (CSV line = index + 2, after the header) of the crafted file below.
WEST = {3: 2, 5: 4, 7: 6}  # line -> decision number: region 'west', not declared yet
OUT_OF_RANGE = {8: 7}  # judgment 150 with judgment_range [0, 100]: fails either way
WEST_AND_OUT_OF_RANGE = {9: 8}  # first reported as the judgment, then still failing


def _rows():
    rows = []
    for i in range(1, 9):
        if i in WEST.values():
            rows.append(decision_row(i, region="west"))
        elif i in OUT_OF_RANGE.values():
            rows.append(decision_row(i, score="150"))
        elif i in WEST_AND_OUT_OF_RANGE.values():
            rows.append(decision_row(i, region="west", score="150"))
        else:
            rows.append(decision_row(i))
    return rows


def _with_west(tmp_path):
    """The same configuration with 'west' declared (the configuration fix)."""
    return make_config(
        tmp_path,
        **{
            "cues.region": {
                "type": "categorical",
                "levels": ["north", "south", "west"],
                "reference": "north",
            }
        },
    )


def _cli_json(cfg, *args):
    proc = run_cli(cfg, "quarantine", "--json", *args)
    out, err = text(proc)
    assert proc.returncode == 0, err
    return json.loads(out)


def test_readmit_after_adding_the_level_through_the_cli(config_path, tmp_path):
    rows = _rows()
    data = write_csv(tmp_path / "d.csv", rows)
    first = ingest_json(config_path, "--kind", "decisions", str(data))
    assert first["quarantined"] == 5, first

    listing = _cli_json(config_path)
    assert listing["by_reason"] == {"undeclared_level": 3, "judgment_out_of_range": 2}
    assert listing["total"] == 5 and listing["records"] is None
    assert listing["by_file"] == {str(data.resolve()): 5}
    assert [b["count"] for b in listing["by_batch"]] == [5]

    # Re-ingesting the file after the fix is skipped as already ingested (issue 13.5).
    cfg = _with_west(tmp_path)
    again = ingest_json(cfg, "--kind", "decisions", str(data))
    assert again["skipped_files"] == 1

    doc = _cli_json(cfg, "--readmit")
    assert set(doc) >= {"kinds", "readmitted", "still_quarantined", "unreadable"}
    assert doc["readmitted"] == len(WEST) and doc["still_quarantined"] == 2
    (k,) = doc["kinds"]
    assert k["kind"] == "decisions" and k["selected"] == 5 and k["readmitted"] == 3
    assert k["still_reasons"] == {"judgment_out_of_range": 2}
    assert k["path"] == f"{READMIT_PREFIX}{first['files'][0]['batch_id']}"

    # The stored values are the raw file's.
    stored = read_store(
        cfg,
        "SELECT decision_id, decision_maker, team, judgment, amount, age_days, report, "
        "witness, region, band, decided_at FROM decisions WHERE batch_id = ? "
        "ORDER BY decision_id",
        [k["batch_id"]],
    )
    want = [rows[n - 1] for n in sorted(WEST.values())]
    assert list(stored["decision_id"]) == [r["case_id"] for r in want]
    for (_, got), raw in zip(stored.iterrows(), want, strict=True):
        assert got["decision_maker"] == raw["handler"] and got["team"] == raw["team"]
        assert got["judgment"] == float(raw["score"]) and got["amount"] == float(raw["amount"])
        assert got["age_days"] == float(raw["age_days"]) and got["region"] == "west"
        assert got["band"] == raw["band"]
        assert got["report"] == (1.0 if raw["report"] == "Y" else 0.0)  # values map Y/N
        assert got["decided_at"].strftime("%Y-%m-%d %H:%M:%S") == raw["decided"]

    # A second re-admission brings nothing, and nothing is stored twice.
    second = _cli_json(cfg, "--readmit")
    assert second["readmitted"] == 0 and second["still_quarantined"] == 2
    n = read_store(cfg, "SELECT count(*) AS n, count(DISTINCT decision_id) AS d FROM decisions")
    assert int(n["n"][0]) == int(n["d"][0]) == 8 - 2

    # The list hides the re-admitted records unless --all.
    assert _cli_json(cfg)["by_reason"] == {"judgment_out_of_range": 2}
    shown = _cli_json(cfg, "--all", "--reason", "undeclared_level")
    lines = {r["line"]: r for r in shown["records"]}
    assert set(lines) == set(WEST)
    assert all(r["readmitted_batch"] == k["batch_id"] for r in lines.values())

    # Provenance: from a stored decision back to its quarantine row and the file line.
    back = read_store(
        cfg,
        "SELECT d.decision_id, q.record_id, q.source_line, b.path FROM decisions d "
        "JOIN readmissions r ON r.readmitted_batch = d.batch_id "
        "AND r.readmitted_line = d.source_line "
        "JOIN quarantine q ON q.batch_id = r.quarantine_batch "
        "AND q.source_line = r.quarantine_line JOIN batches b ON b.batch_id = q.batch_id",
    )
    assert sorted(zip(back["decision_id"], back["source_line"], strict=True)) == sorted(
        (rows[n - 1]["case_id"], line) for line, n in WEST.items()
    )
    assert (back["decision_id"] == back["record_id"]).all()
    assert set(back["path"]) == {str(data.resolve())}


def test_filters_and_dirty_buckets(config_path, tmp_path):
    rows = _rows()
    data = write_csv(tmp_path / "d.csv", rows)
    ingest_json(config_path, "--kind", "decisions", str(data))
    cfg = load_config(_with_west(tmp_path))
    con_rows = read_store(_with_west(tmp_path), "SELECT count(*) AS n FROM dirty_buckets")
    before = int(con_rows["n"][0])

    # Only one reason is selected: the out-of-range rows are not even re-checked.
    summary = readmit(cfg, Selection(reason="undeclared_level"))
    (k,) = summary.kinds
    assert (k.selected, k.readmitted, k.still_quarantined) == (3, 3, 0)
    buckets = read_store(_with_west(tmp_path), "SELECT decision_maker, day FROM dirty_buckets")
    want = {(rows[n - 1]["handler"], rows[n - 1]["decided"][:10]) for n in WEST.values()}
    got = {(m, str(d)[:10]) for m, d in zip(buckets["decision_maker"], buckets["day"], strict=True)}
    assert len(buckets) > before and want <= got

    listing = list_quarantine(cfg, Selection(file=str(data)))
    assert listing.by_reason == {"judgment_out_of_range": 2}
    assert sorted(r.line for r in listing.records) == sorted(
        [*OUT_OF_RANGE, *WEST_AND_OUT_OF_RANGE]
    )
    assert "judgment_out_of_range 2" in listing.describe()
    assert list_quarantine(cfg, Selection(batch=10_000)).total == 0


def test_a_crash_mid_way_leaves_the_store_as_before(config_path, tmp_path, monkeypatch):
    data = write_csv(tmp_path / "d.csv", _rows())
    ingest_json(config_path, "--kind", "decisions", str(data))
    cfg_path = _with_west(tmp_path)
    snapshot = (
        "SELECT (SELECT count(*) FROM decisions) AS d, (SELECT count(*) FROM batches) AS b, "
        "(SELECT count(*) FROM quarantine) AS q, (SELECT count(*) FROM readmissions) AS r, "
        "(SELECT count(*) FROM dirty_buckets) AS k"
    )
    before = read_store(cfg_path, snapshot).iloc[0].tolist()

    def boom(*args, **kwargs):
        raise RuntimeError("killed mid-way")

    monkeypatch.setattr(readmit_module, "_link_and_tidy", boom)
    with pytest.raises(RuntimeError):
        readmit(load_config(cfg_path), Selection())
    assert read_store(cfg_path, snapshot).iloc[0].tolist() == before
    monkeypatch.undo()
    assert readmit(load_config(cfg_path), Selection()).readmitted == len(WEST)


def test_outcomes_come_back_after_their_decision(config_path, tmp_path):
    write_csv(tmp_path / "d.csv", [decision_row(1)])
    ingest_json(config_path, "--kind", "decisions", str(tmp_path / "d.csv"))
    cols = ["case_id", "seen", "result"]
    write_csv(tmp_path / "o.csv", [outcome_row(1, result="Maybe")], cols)
    doc = ingest_json(config_path, "--kind", "outcomes", str(tmp_path / "o.csv"))
    assert doc["quarantine_reasons"] == {"criterion_not_in_map": 1}
    fixed = make_config(tmp_path, outcomes__criterion_values={"Yes": 1, "No": 0, "Maybe": 0.5})
    out = _cli_json(fixed, "--readmit")
    assert out["readmitted"] == 1 and out["kinds"][0]["kind"] == "outcomes"
    got = read_store(fixed, "SELECT decision_id, criterion FROM outcomes")
    assert got.values.tolist() == [["c000001", 0.5]]  # the value the fixed map gives 'Maybe'


def test_user_errors_are_one_sentence_and_exit_2(config_path):
    proc = run_cli(config_path, "quarantine", "--reason", "no_such_reason")
    out, err = text(proc)
    assert proc.returncode == 2 and err.startswith("cuewatch: --reason must be one of")
    proc = run_cli(config_path, "quarantine", "--readmit", "--all")
    assert proc.returncode == 2 and "--all cannot be combined" in text(proc)[1]
