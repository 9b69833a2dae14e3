"""Configuration loading as the user meets it: through the command line.

Every user error must be one sentence that names the offending key and the file, with
exit code 2 and no traceback (DESIGN.md, Contracts); relative paths are resolved
against the configuration file; CUEWATCH_CONFIG stands in for --config.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from helpers.cli import run_cli, text
from helpers.configs import base_config, make_config, write_config

from monitor.config import ConfigError, load_config


def _assert_one_sentence_error(proc, *must_contain: str) -> str:
    out, err = text(proc)
    assert proc.returncode == 2, (proc.returncode, out, err)
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    for part in must_contain:
        assert part in lines[0], (part, lines[0])
    return lines[0]


def _broken(tmp_path: Path, mutate) -> Path:
    doc = base_config()
    mutate(doc)
    return write_config(tmp_path / "broken.toml", doc)


@pytest.mark.parametrize(
    ("mutate", "key"),
    [
        # a key the schema does not know (a typo of lock_timeout_s)
        (lambda d: d["store"].update(lock_timout_s=3), "store.lock_timout_s"),
        # wrong type: a number where text is expected
        (lambda d: d["decisions"].update(judgment=5), "decisions.judgment"),
        # wrong type: text where a number is expected
        (lambda d: d.update(windows={"length_days": "ninety"}), "windows.length_days"),
        # a cue type that does not exist
        (lambda d: d["cues"]["amount"].update(type="ordinal"), "cues.amount.type"),
        # a reference level that is not among the levels
        (lambda d: d["cues"]["region"].update(reference="east"), "cues.region"),
        # a forbidden cue that is not a declared cue
        (lambda d: d["policy"].update(forbidden=["religion"]), "policy.forbidden"),
        # a required key left out
        (lambda d: d["decisions"].pop("decided_at"), "decisions.decided_at"),
    ],
    ids=[
        "unknown-key",
        "wrong-type-str",
        "wrong-type-int",
        "unknown-cue-type",
        "reference-not-in-levels",
        "forbidden-undeclared",
        "missing-key",
    ],
)
def test_config_error_names_key_and_file_exit_2(tmp_path, mutate, key):
    cfg = _broken(tmp_path, mutate)
    line = _assert_one_sentence_error(run_cli(cfg, "init"), key, str(cfg.resolve()))
    assert line.rstrip().endswith(".")


def test_unknown_cue_type_lists_the_allowed_types(tmp_path):
    cfg = _broken(tmp_path, lambda d: d["cues"]["amount"].update(type="ordinal"))
    line = _assert_one_sentence_error(run_cli(cfg, "init"), "cues.amount.type")
    for allowed in ("numeric", "binary", "categorical"):
        assert allowed in line


def test_reference_error_names_the_bad_level(tmp_path):
    cfg = _broken(tmp_path, lambda d: d["cues"]["region"].update(reference="east"))
    _assert_one_sentence_error(run_cli(cfg, "init"), "cues.region", "'east'")


def test_forbidden_error_names_the_cue(tmp_path):
    cfg = _broken(tmp_path, lambda d: d["policy"].update(forbidden=["religion"]))
    _assert_one_sentence_error(run_cli(cfg, "init"), "policy.forbidden", "'religion'")


def test_missing_config_file(tmp_path):
    missing = tmp_path / "nowhere.toml"
    _assert_one_sentence_error(run_cli(missing, "init"), str(missing), "not found")


def test_bad_toml(tmp_path):
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[store]\npath = 'x.duckdb\n", encoding="utf-8")  # unterminated string
    _assert_one_sentence_error(run_cli(cfg, "init"), str(cfg), "TOML")


def test_no_config_at_all_names_the_variable():
    _assert_one_sentence_error(run_cli(None, "init"), "CUEWATCH_CONFIG")


def test_relative_paths_resolve_against_the_config_file(tmp_path):
    cfg = make_config(tmp_path / "etc", alerts={"file": "../log/alerts.jsonl"})
    loaded = load_config(cfg)
    etc = (tmp_path / "etc").resolve()
    assert loaded.store.path == etc / "store" / "cuewatch.duckdb"
    assert loaded.decisions.landing == etc / "landing" / "decisions"
    assert loaded.outcomes.landing == etc / "landing" / "outcomes"
    assert loaded.alerts.file == (tmp_path / "log" / "alerts.jsonl").resolve()
    # And through the command line, run from another working directory (the repo):
    proc = run_cli(cfg, "init", "--json")
    assert proc.returncode == 0, text(proc)
    assert json.loads(proc.stdout)["path"] == str(etc / "store" / "cuewatch.duckdb")
    assert (etc / "store" / "cuewatch.duckdb").exists()


def test_absolute_paths_are_kept(tmp_path):
    target = tmp_path / "elsewhere" / "s.duckdb"
    cfg = make_config(tmp_path / "etc", store__path=str(target))
    assert load_config(cfg).store.path == target


def test_environment_variable_supplies_the_config(tmp_path):
    cfg = make_config(tmp_path)
    proc = run_cli(None, "init", "--json", env={"CUEWATCH_CONFIG": str(cfg)})
    assert proc.returncode == 0, text(proc)
    assert json.loads(proc.stdout)["created"] is True
    assert (tmp_path / "store" / "cuewatch.duckdb").exists()


def test_environment_variable_with_a_broken_config_is_a_user_error(tmp_path):
    cfg = _broken(tmp_path, lambda d: d["policy"].update(forbidden=["religion"]))
    proc = run_cli(None, "init", env={"CUEWATCH_CONFIG": str(cfg)})
    _assert_one_sentence_error(proc, "policy.forbidden", str(cfg.resolve()))


def test_load_config_raises_config_error_in_process(tmp_path):
    cfg = _broken(tmp_path, lambda d: d["cues"]["amount"].update(range=[10, 1]))
    with pytest.raises(ConfigError, match=r"cues\.amount"):
        load_config(cfg)


def test_design_columns_code_categorical_cues_against_the_reference(tmp_path):
    # Dummy coding against a declared reference: k-1 columns per categorical cue
    # (common practice in regression with categorical predictors).
    loaded = load_config(make_config(tmp_path))
    assert loaded.design_columns() == [
        "amount",
        "age_days",
        "report",
        "witness",
        "region=south",
        "band=b",
        "band=c",
    ]


def test_config_digest_changes_with_content(tmp_path):
    a = load_config(make_config(tmp_path, name="a.toml"))
    b = load_config(make_config(tmp_path, name="b.toml", policy__tolerance=0.2))
    assert a.digest != b.digest and len(a.digest) == 64
