"""`cuewatch alerts` listings (header, filters, history) and `alerts show ID` (why an
alert was raised), through the real command line on the demo store."""

from __future__ import annotations

import json

import pytest
from helpers.cli import run_cli, text
from helpers.demo_store import build_demo_store
from helpers.store_rows import read_store

from monitor.cautions import CAUTION


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    # Same folder as the assess tests: build_demo_store's marker makes the build shared.
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def _json(demo, *args):
    proc = run_cli(demo, *args, "--json")
    out, err = text(proc)
    assert proc.returncode == 0, err
    return json.loads(out)


def _flat(out: str) -> str:
    return " ".join(out.split())


def test_listing_has_a_header_an_opened_date_and_a_named_figure(demo):
    docs = _json(demo, "alerts")
    out, err = text(run_cli(demo, "alerts", env={"COLUMNS": "160"}))
    assert not err
    for header in ("id", "state", "kind", "who", "cue", "opened", "window", "figure", "q", "n"):
        assert f" {header} " in out.splitlines()[1] + out.splitlines()[2] + out.splitlines()[3]
    for d in docs:
        assert d["opened_at"][:10] in out
    kinds = {d["kind"] for d in docs}
    assert {"consistency", "forbidden_cue"} <= kinds
    consistency = next(d for d in docs if d["kind"] == "consistency")
    assert f"R_s adj. {consistency['evidence']['std_weight']:.2f}" in out
    forbidden = next(d for d in docs if d["kind"] == "forbidden_cue")
    assert f"std weight {forbidden['evidence']['std_weight']:+.2f}" in out
    assert "┃ size" not in out and "│ size" not in out
    assert _flat(CAUTION) in _flat(out)


def test_filters_by_person_team_kind_and_state(demo):
    every = _json(demo, "alerts")
    who = next(d["decision_maker"] for d in every if d["scope"] == "decision_maker")
    mine = _json(demo, "alerts", "--person", who)
    assert mine and {d["decision_maker"] for d in mine} == {who}
    assert [d["id"] for d in mine] == [
        d["id"] for d in every if d["scope"] == "decision_maker" and d["decision_maker"] == who
    ]
    team = mine[0]["team"]
    ours = _json(demo, "alerts", "--team", team)
    assert {d["id"] for d in ours} == {d["id"] for d in every if d["team"] == team}
    drift = _json(demo, "alerts", "--kind", "drift", "--state", "resolved")
    assert drift and all(d["kind"] == "drift" and d["state"] == "resolved" for d in drift)
    proc = run_cli(demo, "alerts", "--kind", "bias")
    assert proc.returncode == 2 and "--kind must be one of forbidden_cue" in text(proc)[1]
    proc = run_cli(demo, "alerts", "--person", who.lower())
    assert proc.returncode == 2 and f"did you mean '{who}'?" in text(proc)[1]


def test_history_prints_the_state_changes(demo):
    plain = text(run_cli(demo, "alerts", env={"COLUMNS": "160"}))[0]
    out = text(run_cli(demo, "alerts", "--history", env={"COLUMNS": "160"}))[0]
    assert out != plain
    changes = read_store(
        demo, "SELECT alert_id, to_state, changed_by, note, os_user FROM alert_history"
    )
    assert len(changes)
    for r in changes.itertuples(index=False):
        assert f"-> {r.to_state}  by {r.changed_by} (os user {r.os_user}): {r.note}" in out


def test_show_explains_a_forbidden_cue_alert(demo):
    docs = _json(demo, "alerts")
    alert = next(d for d in docs if d["kind"] == "forbidden_cue")
    doc = _json(demo, "alerts", "show", str(alert["id"]))
    assert doc["alert"]["id"] == alert["id"] and doc["finding"].endswith(".")
    assert alert["decision_maker"] in doc["finding"] and alert["cue"] in doc["finding"]
    episode = [w for w in doc["series"] if w["in_episode"]]
    # The episode: from the first of the flagged windows that opened it to the last window
    # (open alert), each with its stored evidence (reference: the findings table).
    stored = read_store(
        demo,
        "SELECT window_end, std_weight, flagged FROM policy_findings WHERE check_kind = "
        "'forbidden_direct' AND decision_maker = ? AND cue = ? ORDER BY window_end",
        [alert["decision_maker"], alert["cue"]],
    )
    ends = [str(d.date()) for d in stored["window_end"]]
    assert episode[-1]["window_end"] == ends[-1]
    assert alert["opened_window_end"] in [w["window_end"] for w in episode]
    assert all(w["flagged"] for w in episode[:2])
    before = [w for w in doc["series"] if w["window_end"] < episode[0]["window_end"]]
    assert before and not before[-1]["flagged"]
    for w in episode:
        i = ends.index(w["window_end"])
        assert w["size"] == pytest.approx(stored["std_weight"].iloc[i])
    assert CAUTION in doc["cautions"]
    out = text(run_cli(demo, "alerts", "show", str(alert["id"]), env={"COLUMNS": "120"}))[0]
    assert "Evidence, window by window, of the episode" in out
    assert "The series around it" in out and "History of state changes:" in out
    assert "(new) -> open  by cuewatch assess" in out
    assert _flat(CAUTION) in _flat(out)


def test_show_lists_the_parts_carried_by_each_proxy(demo):
    docs = _json(demo, "alerts")
    alert = next(d for d in docs if d["kind"] == "proxy_use")
    doc = _json(demo, "alerts", "show", str(alert["id"]))
    end = alert["evidence"]["window"]["end"]
    stored = read_store(
        demo,
        "SELECT proxy_cue, part FROM policy_proxy_parts WHERE decision_maker = ? AND cue = ? "
        "AND window_end = ?",
        [alert["decision_maker"], alert["cue"], end],
    )
    assert len(doc["proxies"]) == len(stored) > 0
    parts = sorted(abs(p["part"]) for p in doc["proxies"])
    assert parts == pytest.approx(sorted(stored["part"].abs()))
    out = text(run_cli(demo, "alerts", "show", str(alert["id"]), env={"COLUMNS": "120"}))[0]
    assert "The indirect part carried by each permitted cue" in out


def test_show_of_a_missing_alert_is_a_user_error(demo):
    proc = run_cli(demo, "alerts", "show", "9999")
    assert proc.returncode == 2
    assert text(proc)[1].strip() == (
        "cuewatch: there is no alert with id 9999; 'cuewatch alerts' lists them."
    )
