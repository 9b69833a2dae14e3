"""The small test configuration and writing any configuration as TOML."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[2]

# The decision file columns of the small test configuration, in header order.
DECISION_COLUMNS = [
    "case_id",
    "decided",
    "handler",
    "team",
    "score",
    "amount",
    "age_days",
    "report",
    "witness",
    "region",
    "band",
]

OUTCOME_COLUMNS = ["case_id", "seen", "result"]


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a valid TOML basic string
    if isinstance(value, Sequence):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return (
            "{ " + ", ".join(f"{json.dumps(k)} = {_toml_value(v)}" for k, v in value.items()) + " }"
        )
    raise TypeError(f"cannot write {value!r} as TOML")


def base_config() -> dict[str, Any]:
    """A small configuration with two cues of each type (numeric, binary, categorical)."""
    return {
        "store": {"path": "store/cuewatch.duckdb", "lock_timeout_s": 5.0, "read_retry_s": 5.0},
        "decisions": {
            "landing": "landing/decisions",
            "id": "case_id",
            "decided_at": "decided",
            "decision_maker": "handler",
            "team": "team",
            "judgment": "score",
            "judgment_range": [0, 100],
            "timezone": "UTC",
        },
        "outcomes": {
            "landing": "landing/outcomes",
            "id": "case_id",
            "observed_at": "seen",
            "criterion": "result",
            "criterion_values": {"Yes": 1, "No": 0},
        },
        "cues": {
            "amount": {"type": "numeric", "range": [0, 1000]},
            "age_days": {"type": "numeric"},
            "report": {"type": "binary", "values": {"Y": 1, "N": 0}},
            "witness": {"type": "binary"},
            "region": {"type": "categorical", "levels": ["north", "south"], "reference": "north"},
            "band": {"type": "categorical", "levels": ["a", "b", "c"], "reference": "a"},
        },
        "policy": {"forbidden": ["region"]},
        # Tests write a file and ingest it at once (tests/test_ingest_landing.py tests the
        # settle time itself).
        "ingest": {"settle_seconds": 0},
    }


def _merge(base: dict, overrides: Mapping[str, Any]) -> dict:
    """Overrides use dotted keys ("store.lock_timeout_s") or section dicts; None deletes."""
    out = json.loads(json.dumps(base))
    for key, value in overrides.items():
        parts = key.split(".")
        node = out
        for p in parts[:-1]:
            node = node.setdefault(p, {})
        if value is None:
            node.pop(parts[-1], None)
        else:
            node[parts[-1]] = value
    return out


def write_config(path: Path, doc: Mapping[str, Any]) -> Path:
    """Write ``doc`` as TOML (sections, cue tables, inline maps) and return the path."""
    lines: list[str] = []
    for section, body in doc.items():
        if section == "cues":
            for name, cue in body.items():
                lines.append(f"[cues.{name}]")
                lines.extend(f"{k} = {_toml_value(v)}" for k, v in cue.items())
        else:
            lines.append(f"[{section}]")
            lines.extend(f"{k} = {_toml_value(v)}" for k, v in body.items())
        lines.append("")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def make_config(tmp_path: Path, name: str = "cuewatch.toml", **overrides: Any) -> Path:
    """Write the small test configuration under ``tmp_path`` and return its path.

    Keyword overrides use '__' for the dot (``store__lock_timeout_s=1``) and replace a
    whole section when given a dict for a section name (``ingest={"delimiter": ";"}``);
    a value of None deletes the key.
    """
    dotted = {k.replace("__", "."): v for k, v in overrides.items()}
    return write_config(tmp_path / name, _merge(base_config(), dotted))
