"""Hostile input: names from the configuration and file names that try to reach the SQL,
files whose quoting or bytes are broken, and file names that look like patterns.

Every configurable name (column names, categorical levels, value-map keys, landing
folders) is set to text that breaks naive SQL building - quotes, double quotes, comment
and statement markers, backslashes, non-ASCII, Python format placeholders - and the whole
pipeline (init, ingest of CSV / JSON Lines / Parquet, refit, assess, export) must either
keep the data exactly as written or refuse the configuration with one sentence (exit 2).
The expected values are the rows this test writes, never the code's own output.
"""

from __future__ import annotations

import csv
import json
import math
import random
from pathlib import Path

import pytest
from click.testing import CliRunner
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import DECISION_COLUMNS, make_config
from helpers.files import decision_row, write_csv, write_jsonl, write_parquet
from helpers.store_rows import query

from monitor.cli import main

# Each string attacks one way SQL (or a format string) can be built by pasting text.
HOSTILE = [
    "it's",  # a single quote ends a SQL string literal
    'say "hi"',  # a double quote ends a quoted identifier
    "a -- comment",  # the rest of a line becomes a comment
    "x; DROP TABLE decisions; --",  # a second statement
    "back\\slash\\",  # an escape character in some dialects and in JSON paths
    "ünïcødé ✓ 日本",  # non-ASCII text
    "{0} {name} %s %(x)s",  # Python format placeholders
    "k' || 'INJECTED-0",  # the reported case: a message became 'kINJECTED-0 is empty'
    '"; SELECT 42; --',  # closes an identifier, then a statement
    "*?[glob]",  # file-pattern characters
]


def _invoke(cfg: Path, *args: str):
    """Run the command line in this process (much faster than a subprocess per step)."""
    return CliRunner().invoke(main, ["--config", str(cfg), *args], catch_exceptions=False)


def _toml_str(s: str) -> str:
    return json.dumps(s)  # a JSON string is a valid TOML basic string


def _toml(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return _toml_str(value)
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{_toml_str(k)} = {_toml(v)}" for k, v in value.items()) + " }"
    raise TypeError(value)


def write_toml(path: Path, doc: dict) -> Path:
    """TOML with every table name and key quoted (so hostile cue names stay one key)."""
    lines = []
    for section, body in doc.items():
        if section == "cues":
            for name, cue in body.items():
                lines.append(f"[cues.{_toml_str(name)}]")
                lines += [f"{k} = {_toml(v)}" for k, v in cue.items()]
        else:
            lines.append(f"[{section}]")
            lines += [f"{_toml_str(k)} = {_toml(v)}" for k, v in body.items()]
        lines.append("")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


class Names:
    """Every configurable name of one round, all built from one hostile string."""

    def __init__(self, h: str):
        self.h = h
        self.id, self.when, self.who, self.team = f"{h} id", f"{h} when", f"{h} who", f"{h} team"
        self.score, self.amount, self.report = f"{h} score", f"{h} amount", f"{h} report"
        self.witness, self.region = f"{h} witness", f"{h} region"
        self.seen, self.result = f"{h} seen", f"{h} result"
        self.north, self.south = f"{h} north", f"{h} south"
        self.low, self.high = f"{h} low", f"{h} high"
        self.yes, self.no = f"{h} Y", f"{h} N"
        self.good, self.bad = f"{h} good", f"{h} bad"
        self.landing = f"landing {h}"

    @property
    def decision_columns(self) -> list[str]:
        return [
            self.id,
            self.when,
            self.who,
            self.team,
            self.score,
            self.amount,
            self.report,
            self.witness,
            self.region,
        ]

    def config(self, tmp: Path) -> Path:
        doc = {
            "store": {"path": "store/cw.duckdb", "lock_timeout_s": 5.0},
            "ingest": {"settle_seconds": 0},  # files are written, then ingested at once
            "decisions": {
                "landing": f"{self.landing}/decisions",
                "id": self.id,
                "decided_at": self.when,
                "decision_maker": self.who,
                "team": self.team,
                "judgment": self.score,
                "judgment_values": {self.low: 10, self.high: 90},
            },
            "outcomes": {
                "landing": f"{self.landing}/outcomes",
                "id": self.id,
                "observed_at": self.seen,
                "criterion": self.result,
                "criterion_values": {self.good: 1, self.bad: 0},
            },
            "cues": {
                "amount": {"column": self.amount, "type": "numeric", "range": [0, 1000]},
                "report": {
                    "column": self.report,
                    "type": "binary",
                    "values": {self.yes: 1, self.no: 0},
                },
                "witness": {"column": self.witness, "type": "binary"},
                "region": {
                    "column": self.region,
                    "type": "categorical",
                    "levels": [self.north, self.south],
                    "reference": self.north,
                },
            },
            "policy": {"forbidden": ["region"], "min_rows": 60},
            "windows": {"length_days": 28, "step_days": 7, "min_rows": 30},
        }
        return write_toml(tmp / "cw.toml", doc)

    def decision(self, i: int, rng: random.Random) -> dict[str, str]:
        south = rng.random() < 0.4
        amount = round(rng.uniform(0, 1000), 2)
        report = rng.random() < 0.5
        witness = int(rng.random() < 0.3)
        pull = 0.002 * amount + 0.8 * report - 0.5 * witness + (0.6 if south else 0.0)
        high = pull + rng.gauss(0, 0.7) > 1.4
        return {
            self.id: f"{self.h} case {i}",
            self.when: f"2024-01-{1 + i % 28:02d} {8 + i % 10:02d}:{i % 60:02d}:00",
            self.who: f"{self.h} handler {i % 3}",
            self.team: f"{self.h} team {i % 2}",
            self.score: self.high if high else self.low,
            self.amount: repr(amount),
            self.report: self.yes if report else self.no,
            self.witness: str(witness),
            self.region: self.south if south else self.north,
        }


def _stored(names: Names, row: dict[str, str]) -> tuple:
    """What the store must hold for a decision row: worked out from the row as written."""
    return (
        row[names.id],
        row[names.who],
        row[names.team],
        10.0 if row[names.score] == names.low else 90.0,
        float(row[names.amount]),
        1.0 if row[names.report] == names.yes else 0.0,
        float(row[names.witness]),
        row[names.region],
    )


@pytest.mark.parametrize("h", HOSTILE, ids=range(len(HOSTILE)))
def test_hostile_names_reach_the_store_intact_through_the_whole_pipeline(tmp_path, h):
    names = Names(h)
    cfg = names.config(tmp_path)
    result = _invoke(cfg, "init")
    assert result.exit_code == 0, result.output

    rng = random.Random(7)
    rows = [names.decision(i, rng) for i in range(300)]
    landing = tmp_path / names.landing / "decisions"
    write_csv(landing / "a.csv", rows[:200], names.decision_columns)
    write_jsonl(landing / "b.jsonl", rows[200:250])
    write_parquet(landing / "c.parquet", rows[250:], names.decision_columns)
    bad = [
        {**names.decision(900, rng), names.who: ""},
        {**names.decision(901, rng), names.score: "nonsense"},
        {**names.decision(902, rng), names.region: "west"},
        {**names.decision(903, rng), names.amount: "5000"},
        {**names.decision(904, rng), names.when: "yesterday"},
        {**names.decision(905, rng), names.report: "maybe"},
    ]
    write_csv(landing / "d.csv", bad, names.decision_columns)
    outcomes = [
        {names.id: r[names.id], names.seen: "2024-03-15 09:00:00", names.result: names.good}
        if i % 2
        else {names.id: r[names.id], names.seen: "2024-03-15 09:00:00", names.result: names.bad}
        for i, r in enumerate(rows)
    ]
    write_csv(
        tmp_path / names.landing / "outcomes" / "o.csv",
        outcomes,
        [names.id, names.seen, names.result],
    )

    result = _invoke(cfg, "ingest", "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.output)
    assert [f["status"] for f in doc["files"]] == ["ingested"] * 5, doc
    assert (doc["accepted"], doc["quarantined"]) == (len(rows) + len(outcomes), len(bad)), doc

    # The data as written, value for value.
    got = query(
        cfg,
        "SELECT decision_id, decision_maker, team, judgment, amount, report, witness, region "
        "FROM decisions ORDER BY source_line, batch_id",
    )
    assert sorted(got) == sorted(_stored(names, r) for r in rows)
    assert query(
        cfg, "SELECT count(*) FROM decisions_with_outcome WHERE criterion IS NOT NULL"
    ) == [(len(rows),)]
    # The quarantine messages name the columns and values verbatim (nothing was evaluated).
    messages = dict(query(cfg, "SELECT reason, message FROM quarantine"))
    assert messages == {
        "missing_field": f"{names.who} is empty",
        "judgment_not_in_map": f"{names.score}='nonsense' is not one of {names.low}, {names.high}",
        "undeclared_level": f"{names.region}='west' is not a declared level "
        f"({names.north}, {names.south})",
        "cue_out_of_range": f"{names.amount}='5000' is outside [0, 1000]",
        "unparseable_timestamp": f"{names.when}='yesterday' is not a timestamp",
        "binary_not_in_map": f"{names.report}='maybe' is not one of {names.yes}, {names.no}",
    }

    result = _invoke(cfg, "refit", "--json")
    assert result.exit_code == 0, result.output
    fits = json.loads(_invoke(cfg, "fits", "--json", "--scope", "decision_maker").output)
    makers = {f["decision_maker"] for f in fits}
    assert makers == {f"{h} handler {k}" for k in range(3)}
    assert all(math.isfinite(f["R_s"]) for f in fits if f["n_decisions"] >= 30)
    level = f"region={names.south}"
    assert level in {c["cue"] for c in fits[-1]["cues"]}

    result = _invoke(cfg, "assess", "--json")
    assert result.exit_code == 0, result.output

    out = tmp_path / "export"
    result = _invoke(cfg, "export", "--quarter", "2024Q1", "--out", str(out), "--format", "csv")
    assert result.exit_code == 0, result.output
    with open(out / "decision_makers.csv", encoding="utf-8", newline="") as fh:
        exported = {r["decision_maker"] for r in csv.DictReader(fh)}
    assert {f"{h} handler {k}" for k in range(3)} <= exported
    # Nothing was dropped or created behind the pipeline's back.
    assert query(cfg, "SELECT count(*) FROM decisions") == [(len(rows),)]


def _refused_in_one_sentence(cfg: Path) -> None:
    proc = run_cli(cfg, "init")
    out, err = text(proc)
    assert proc.returncode == 2, (out, err)
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    assert str(cfg) in lines[0], lines


@pytest.mark.parametrize("h", HOSTILE, ids=range(len(HOSTILE)))
def test_a_hostile_cue_name_is_refused_in_one_sentence(tmp_path, h):
    cfg = Names("x").config(tmp_path)
    with open(cfg, "a", encoding="utf-8") as fh:
        fh.write(f'\n[cues.{_toml_str(h)}]\ntype = "numeric"\n')
    _refused_in_one_sentence(cfg)


@pytest.mark.parametrize("h", HOSTILE, ids=range(len(HOSTILE)))
@pytest.mark.parametrize("key", ["decisions__timezone", "outcomes__timezone", "schedule__timezone"])
def test_a_hostile_timezone_is_refused_in_one_sentence(tmp_path, h, key):
    _refused_in_one_sentence(make_config(tmp_path, **{key: h}))


# --- file names are literal ----------------------------------------------------------------


@pytest.mark.parametrize("folder", ["drop", "drop[1]", "drop*"])
@pytest.mark.parametrize("name", ["a*.csv", "a?.csv", "a[bc].csv", "[a].csv", "a**.csv"])
def test_a_file_name_with_pattern_characters_reads_that_file_only(
    config_path, tmp_path, name, folder
):
    folder = tmp_path / folder
    others = ["ab.csv", "ac.csv", "a.csv", "b.csv", "a1.csv"]
    for i, other in enumerate(others):
        write_csv(folder / other, [decision_row(100 + i)])
    target = write_csv(folder / name, [decision_row(1), decision_row(2)])
    doc = ingest_json(config_path, "--kind", "decisions", str(target))
    assert doc["files"][0]["rows_read"] == 2 and doc["accepted"] == 2, doc
    assert query(config_path, "SELECT decision_id FROM decisions ORDER BY 1") == [
        ("c000001",),
        ("c000002",),
    ]


def test_pattern_characters_in_jsonl_and_parquet_names_read_that_file_only(config_path, tmp_path):
    folder = tmp_path / "in"
    write_jsonl(folder / "ab.jsonl", [decision_row(50)])
    write_parquet(folder / "ab.parquet", [decision_row(60)], DECISION_COLUMNS)
    j = write_jsonl(folder / "a*.jsonl", [decision_row(1)])
    p = write_parquet(folder / "a?.parquet", [decision_row(2)], DECISION_COLUMNS)
    doc = ingest_json(config_path, "--kind", "decisions", str(j), str(p))
    assert doc["accepted"] == 2, doc
    assert query(config_path, "SELECT decision_id FROM decisions ORDER BY 1") == [
        ("c000001",),
        ("c000002",),
    ]


# --- every physical line is accounted for --------------------------------------------------


def _csv_lines(rows: list[dict], columns=DECISION_COLUMNS) -> list[str]:
    """The lines csv would write for ``rows`` (header first), without line ends."""
    return [",".join(columns)] + [",".join(r[c] for c in columns) for r in rows]


def _write_lines(path: Path, lines: list[str], end: str = "\n", encoding="utf-8") -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes((end.join(lines) + end).encode(encoding, "surrogateescape"))
    return path


def _accounted(config: Path) -> tuple[list[int], list[tuple[int, str]]]:
    stored = [r[0] for r in query(config, "SELECT source_line FROM decisions ORDER BY 1")]
    held = query(config, "SELECT source_line, reason FROM quarantine ORDER BY 1")
    return stored, held


@pytest.mark.parametrize("end", ["\n", "\r\n", "\r"])
def test_an_unterminated_quote_loses_only_its_own_line(config_path, tmp_path, end):
    lines = _csv_lines([decision_row(i) for i in range(1, 5)])
    lines[2] = lines[2].replace(",h2,", ',"h2,')  # line 3 opens a quote it never closes
    assert '"' in lines[2]
    data = _write_lines(tmp_path / "d.csv", lines, end)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    f = doc["files"][0]
    assert (f["rows_read"], f["accepted"], f["quarantined"]) == (4, 3, 1), f
    stored, held = _accounted(config_path)
    assert stored == [2, 4, 5] and held == [(3, "malformed_record")]
    raw, message = query(config_path, "SELECT raw_row, message FROM quarantine")[0]
    assert json.loads(raw) == lines[2] and "quote" in message


def test_several_unterminated_quotes_each_lose_their_own_line(config_path, tmp_path):
    lines = _csv_lines([decision_row(i) for i in range(1, 9)])
    lines[2] = lines[2].replace(",h2,", ',"h2,')  # line 3
    lines[5] = lines[5].replace(",t1,", ',"t1,')  # line 6 (closed by nothing)
    lines[6] = lines[6].replace(",h0,", ',"h0,')  # line 7, right after another
    assert all('"' in lines[k] for k in (2, 5, 6))
    data = _write_lines(tmp_path / "d.csv", lines)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    f = doc["files"][0]
    assert (f["rows_read"], f["accepted"], f["quarantined"]) == (8, 5, 3), f
    stored, held = _accounted(config_path)
    assert stored == [2, 4, 5, 8, 9]
    assert held == [(3, "malformed_record"), (6, "malformed_record"), (7, "malformed_record")]


def test_lines_that_each_open_a_quote_are_each_quarantined(config_path, tmp_path):
    # Each line opens a quote that the next line's quote closes in the wrong place, so
    # masking uncovers more of them round after round.
    lines = _csv_lines([decision_row(i) for i in range(1, 40)])
    for k in range(2, 40):
        lines[k] = lines[k].replace(",t", ',"t', 1)
    data = _write_lines(tmp_path / "d.csv", lines)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    f = doc["files"][0]
    assert (f["rows_read"], f["accepted"], f["quarantined"]) == (39, 1, 38), f
    stored, held = _accounted(config_path)
    assert stored == [2] and [line for line, _ in held] == list(range(3, 41))


def test_past_the_bound_on_rounds_the_file_fails_naming_the_first_line(
    config_path, tmp_path, monkeypatch
):
    from monitor.config import load_config
    from monitor.ingest import batches, store_batch

    monkeypatch.setattr(store_batch, "MAX_QUOTE_PASSES", 2)
    lines = _csv_lines([decision_row(i) for i in range(1, 40)])
    for k in range(2, 40):
        lines[k] = lines[k].replace(",t", ',"t', 1)
    data = _write_lines(tmp_path / "d.csv", lines)
    summary = batches.ingest(load_config(config_path), [str(data)], kind="decisions")
    (f,) = summary.files
    assert f.status == "failed" and "line 3" in f.message and "never closed" in f.message, f
    assert query(config_path, "SELECT count(*) FROM decisions") == [(0,)]


def test_a_quote_closed_lines_later_in_the_wrong_place_loses_only_its_own_line(
    config_path, tmp_path
):
    lines = _csv_lines([decision_row(i) for i in range(1, 6)])
    lines[2] = lines[2].replace(",h2,", ',"h2,')  # opens on line 3 ...
    lines[4] = lines[4].replace(",h1,", ',h1"x,')  # ... a stray quote on line 5 closes it
    assert '"' in lines[2] and '"' in lines[4]
    data = _write_lines(tmp_path / "d.csv", lines)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    f = doc["files"][0]
    assert f["rows_read"] == 5 and f["accepted"] + f["quarantined"] == 5, f
    stored, held = _accounted(config_path)
    assert 3 in [line for line, _ in held] and {2, 4, 6} <= set(stored)
    assert sorted(stored + [line for line, _ in held]) == [2, 3, 4, 5, 6]


def test_a_quoted_value_over_two_lines_is_still_one_record(config_path, tmp_path):
    rows = [decision_row(1), decision_row(2, team="t\nsecond line"), decision_row(3)]
    data = write_csv(tmp_path / "d.csv", rows)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    assert (doc["accepted"], doc["quarantined"]) == (3, 0), doc
    assert query(config_path, "SELECT team FROM decisions WHERE decision_id = 'c000002'") == [
        ("t\nsecond line",)
    ]


# --- bytes that do not decode --------------------------------------------------------------


@pytest.mark.parametrize("line", [3, 400])  # inside and far beyond the first 8 KB
def test_a_latin1_byte_in_a_utf8_csv_costs_its_line_wherever_it_is(config_path, tmp_path, line):
    rows = [decision_row(i) for i in range(1, 500)]
    lines = _csv_lines(rows)
    lines[line - 1] = lines[line - 1].replace(",h", ",Zo\udceb h", 1)  # the byte 0xEB
    data = _write_lines(tmp_path / "d.csv", lines)
    assert b"Zo\xeb h" in data.read_bytes()
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    f = doc["files"][0]
    assert (f["status"], f["accepted"], f["quarantined"]) == ("ingested", 498, 1), f
    stored, held = _accounted(config_path)
    assert held == [(line, "malformed_record")]
    assert stored == [n for n in range(2, 501) if n != line]
    assert "utf-8" in query(config_path, "SELECT message FROM quarantine")[0][0].lower()


def test_a_bad_byte_in_json_lines_costs_its_line_and_names_it(config_path, tmp_path):
    lines = [json.dumps(decision_row(i)) for i in range(1, 5)]
    lines[1] = lines[1].replace('"h2"', '"Zo\udceb"')
    data = _write_lines(tmp_path / "d.jsonl", lines)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    f = doc["files"][0]
    assert (f["status"], f["accepted"], f["quarantined"]) == ("ingested", 3, 1), f
    stored, held = _accounted(config_path)
    assert stored == [1, 3, 4] and held == [(2, "malformed_record")]


def test_a_bad_byte_in_the_header_fails_the_file_naming_the_header(config_path, tmp_path):
    lines = _csv_lines([decision_row(1)])
    lines[0] = lines[0].replace("team", "t\udceam")
    data = _write_lines(tmp_path / "d.csv", lines)
    proc = run_cli(config_path, "ingest", "--kind", "decisions", str(data))
    out, err = text(proc)
    assert proc.returncode == 2 and "Traceback" not in err, err
    reason = err.split(str(data), 1)[1]  # what follows the file's name
    assert "header" in reason and "utf-8" in reason.lower(), err
