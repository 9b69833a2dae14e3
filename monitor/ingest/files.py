"""The files of an ingest run: which files a command names (paths, folders or the
configured landing folders), which kind and format each holds, its content fingerprint
and the columns it offers.  Nothing here writes to the store."""

from __future__ import annotations

import csv
import hashlib
from collections.abc import Iterable
from pathlib import Path

import duckdb

from monitor.config import Config
from monitor.errors import UserError
from monitor.ingest.checks import KINDS, FileRejected
from monitor.store.rules import sql_literal

FORMATS = {
    ".csv": "csv",
    ".tsv": "csv",
    ".txt": "csv",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".json": "jsonl",
    ".parquet": "parquet",
    ".pq": "parquet",
}


class IngestUsageError(UserError):
    """A user error in the ingest command itself (bad path, unknown kind, ...)."""


def detect_format(path: Path) -> str:
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise FileRejected(
            f"unknown file type '{path.suffix}' (expected .csv, .tsv, .jsonl or .parquet)"
        )
    return fmt


def plan_files(config: Config, paths: Iterable[str], kind: str | None) -> list[tuple[Path, str]]:
    """Resolve the command's paths to (file, kind) pairs in a stable order.

    No paths: the configured landing folders.  A folder: its data files, sorted by
    name.  The kind comes from ``kind`` or, failing that, from which landing folder
    the file lies under.
    """
    if kind is not None and kind not in KINDS:
        raise IngestUsageError(f"--kind must be one of {', '.join(KINDS)}, not '{kind}'.")
    landings = _landings(config)
    paths = list(paths)
    if not paths:
        if not landings:
            raise IngestUsageError("no paths given and no landing folders configured.")
        out: list[tuple[Path, str]] = []
        for k, folder in landings.items():
            if kind is None or kind == k:
                out.extend((f, k) for f in _data_files(folder) if folder.exists())
        return out
    out = []
    for raw in paths:
        p = Path(raw).expanduser().resolve()
        if not p.exists():
            raise IngestUsageError(f"no such file or folder: {raw}.")
        files = _data_files(p) if p.is_dir() else [p]
        for f in files:
            k = kind or _kind_from_landing(f, landings)
            if k is None:
                raise IngestUsageError(
                    f"cannot tell whether {f} holds decisions or outcomes: "
                    "put it in a landing folder or pass --kind."
                )
            out.append((f, k))
    return out


def _landings(config: Config) -> dict[str, Path]:
    out = {}
    if config.decisions.landing:
        out["decisions"] = Path(config.decisions.landing)
    if config.outcomes is not None and config.outcomes.landing:
        out["outcomes"] = Path(config.outcomes.landing)
    return out


def _data_files(folder: Path) -> list[Path]:
    if not folder.exists():
        return []
    return sorted(
        p
        for p in folder.rglob("*")
        if p.is_file() and p.suffix.lower() in FORMATS and not p.name.startswith(".")
    )


def _kind_from_landing(path: Path, landings: dict[str, Path]) -> str | None:
    for k, folder in landings.items():
        try:
            path.relative_to(folder.resolve())
            return k
        except ValueError:
            continue
    return None


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def present_columns(
    con: duckdb.DuckDBPyConnection, config: Config, path: Path, fmt: str
) -> list[str]:
    """The columns the file offers (CSV header / Parquet schema); JSON Lines is open (empty)."""
    if fmt == "jsonl":
        return []  # keys are looked up per record; a missing key is a missing field
    if fmt == "parquet":
        rows = con.execute(f"DESCRIBE SELECT * FROM read_parquet({sql_literal(str(path))})")
        return [r[0] for r in rows.fetchall()]
    # The header is read here rather than by DuckDB's sniffer, which can give up on a
    # file whose first rows are malformed; DuckDB then reads with fixed settings.
    with open(path, encoding=_python_encoding(config.ingest.encoding), newline="") as fh:
        header = next(csv.reader(fh, delimiter=config.ingest.delimiter), None)
    if not header:
        raise FileRejected(f"{path} is empty or has no header row")
    header[0] = header[0].lstrip("\ufeff")
    names = [h.strip() for h in header]
    if len(set(names)) != len(names):
        raise FileRejected(f"{path} repeats a column name in its header")
    return names


def _python_encoding(name: str) -> str:
    return {"utf-8": "utf-8-sig", "utf8": "utf-8-sig"}.get(name.lower(), name)
