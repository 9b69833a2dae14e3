"""The files of an ingest run: which files a command names (paths, folders or the
configured landing folders), which kind and format each holds, its content fingerprint
and the columns it offers.  Nothing here writes to the store."""

from __future__ import annotations

import codecs
import csv
import hashlib
import io
import shutil
import time
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import duckdb

from monitor.config import Config
from monitor.errors import UserError
from monitor.ingest.checks import KINDS, FileRejected, literal_path
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


@dataclass(frozen=True)
class PlannedFile:
    """One file of an ingest run.  ``wait`` says why a landing file is not read yet
    (it changed too recently); empty when the file is to be read now."""

    path: Path
    kind: str
    wait: str = ""


def plan_files(
    config: Config,
    paths: Iterable[str],
    kind: str | None,
    *,
    clock: float | None = None,
    pulls: bool = False,
) -> list[PlannedFile]:
    """Resolve the command's paths to files and kinds in a stable order.

    No paths: the configured landing folders, where a file is read only when complete
    (``settled``; the others come back with ``wait`` set).  A folder: its data files,
    sorted by name, temporary names left out.  A file named on the command line is
    read as it is.  The kind comes from ``kind`` or, failing that, from which landing
    folder the file lies under.  ``clock`` (seconds since the epoch) defaults to now.
    ``pulls``: the run also pulls from PostgreSQL, so having no landing folder is fine.
    """
    if kind is not None and kind not in KINDS:
        raise IngestUsageError(f"--kind must be one of {', '.join(KINDS)}, not '{kind}'.")
    landings = _landings(config)
    paths = list(paths)
    if not paths:
        if not landings:
            if pulls:
                return []
            raise IngestUsageError("no paths given and no landing folders configured.")
        now = time.time() if clock is None else clock
        settle = config.ingest.settle_seconds
        return [
            PlannedFile(f, k, settled(f, settle, now))
            for k, folder in landings.items()
            if kind is None or kind == k
            for f in _data_files(folder)
        ]
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
            out.append(PlannedFile(f, k))
    return out


# --- when a landing file is complete ---------------------------------------------------
#
# A producer writing into a landing folder is never asked to cooperate beyond one of two
# habits: write under a temporary name and rename when done (never read: ``is_temporary``),
# or write in place without pausing longer than ``[ingest] settle_seconds`` (read only
# once the file has not changed for that long: ``settled``).  One look at the file's
# times decides, so a run never waits.

TEMPORARY_PREFIXES = (".", "~")
TEMPORARY_SUFFIXES = (".tmp", ".part", ".partial")  # also '.filepart', '.csv.part', ...


def is_temporary(name: str) -> bool:
    """True for a file or folder name that marks work in progress (hidden, editor or
    office lock files, download and copy-tool partials)."""
    return name.startswith(TEMPORARY_PREFIXES) or name.lower().endswith(TEMPORARY_SUFFIXES)


def settled(path: Path, settle_seconds: float, now: float) -> str:
    """Empty when ``path`` last changed at least ``settle_seconds`` before ``now``
    (seconds since the epoch); otherwise why it waits.  The last change is the later of
    the modification time and the inode change time, so a copier that restores an old
    modification time (``cp -p``, ``rsync -t``) still waits after it finished."""
    if settle_seconds <= 0:
        return ""
    try:
        st = path.stat()
    except FileNotFoundError:  # renamed or removed since the folder was listed
        return "gone before it could be read; the next run looks again"
    age = now - max(st.st_mtime, st.st_ctime)
    if age >= settle_seconds:
        return ""
    when = (
        f"changed {age:.1f} s ago"
        if age >= 0
        else f"changed {-age:.1f} s in the future (do the clocks disagree?)"
    )
    return (
        f"{when}: read once unchanged for {settle_seconds:g} s "
        "([ingest] settle_seconds); the next run takes it"
    )


def _landings(config: Config) -> dict[str, Path]:
    out = {}
    if config.decisions.landing:
        out["decisions"] = Path(config.decisions.landing)
    if config.outcomes is not None and config.outcomes.landing:
        out["outcomes"] = Path(config.outcomes.landing)
    return out


def _data_files(folder: Path) -> list[Path]:
    """The data files under ``folder`` (any depth), sorted, without temporary names
    (the file's own or a folder's between ``folder`` and the file)."""
    if not folder.exists():
        return []
    return sorted(
        p
        for p in folder.rglob("*")
        if p.is_file()
        and p.suffix.lower() in FORMATS
        and not any(is_temporary(part) for part in p.relative_to(folder).parts)
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
        rows = con.execute(
            f"DESCRIBE SELECT * FROM read_parquet({sql_literal(literal_path(path))})"
        )
        return [r[0] for r in rows.fetchall()]
    # The header is read here rather than by DuckDB's sniffer, which can give up on a
    # file whose first rows are malformed; DuckDB then reads with fixed settings.
    header = _header_row(path, config.ingest.encoding, config.ingest.delimiter)
    if not header:
        raise FileRejected(f"{path} is empty or has no header row")
    header[0] = header[0].lstrip("\ufeff")
    names = [h.strip() for h in header]
    if len(set(names)) != len(names):
        raise FileRejected(f"{path} repeats a column name in its header")
    return names


# A header longer than this is not a header (DuckDB's own line limit is 2 MB).
HEADER_LIMIT_BYTES = 1 << 20


def _header_row(path: Path, encoding: str, delimiter: str) -> list[str] | None:
    """The first CSV record of ``path``, decoded with ``encoding``.  Only the header's
    own bytes are decoded, so a bad byte further down costs its line (the reader
    quarantines it), not the file; a header that does not decode or has no end within
    ``HEADER_LIMIT_BYTES`` fails the file with one sentence."""
    # 'surrogateescape' keeps undecodable bytes visible (as lone surrogates) instead of
    # failing on a bad byte that lies past the header but inside the bytes read.
    decoder = codecs.getincrementaldecoder(_python_encoding(encoding))("surrogateescape")
    text, size = "", 0
    with open(path, "rb") as fh:
        while size <= HEADER_LIMIT_BYTES and "\n" not in text and "\r" not in text:
            chunk = fh.read(1 << 16)
            size += len(chunk)
            text += decoder.decode(chunk, final=not chunk)
            if not chunk:
                break
    if size > HEADER_LIMIT_BYTES and "\n" not in text and "\r" not in text:
        raise FileRejected(f"the header (line 1) is longer than {HEADER_LIMIT_BYTES >> 20} MiB")
    try:
        header = next(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter), None)
    except csv.Error as exc:
        raise FileRejected(f"the header (line 1) cannot be read: {exc}") from None
    if header is None:
        return None
    if any("\udc80" <= ch <= "\udcff" for h in header for ch in h):
        raise FileRejected(f"the header (line 1) is not valid {encoding} text")
    return header


def _python_encoding(name: str) -> str:
    return {"utf-8": "utf-8-sig", "utf8": "utf-8-sig"}.get(name.lower(), name)


# --- lines whose quote is never closed ---------------------------------------------------
#
# A quote that is not closed where its line ends makes the CSV reader take the lines
# after it, up to the next quote or the end of the file, as one broken record.  Ingest
# then reads a copy of the file in which that one line is replaced by a line the reader
# rejects on its own (``mask_lines``), so every later line is read as the record it is
# and the broken line alone is quarantined.  Only a file that has such a line pays.


def _line_end(path: Path) -> bytes:
    """b'\\n' (also for CRLF files), or b'\\r' for a file whose lines end in CR alone."""
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    return b"\r" if b"\n" not in head and b"\r" in head else b"\n"


def _physical_lines(path: Path, end: bytes) -> Iterator[tuple[int, int, bytes]]:
    """(1-based line number, byte offset, bytes without the line end) of every line."""
    number, offset, rest = 0, 0, b""
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            rest += chunk
            parts = rest.split(end)
            rest = parts.pop()
            for part in parts:
                number += 1
                yield number, offset, part
                offset += len(part) + len(end)
    if rest:
        yield number + 1, offset, rest


def find_line(
    path: Path, encoding: str, record_text: str, first_line: int, taken: set[int]
) -> tuple[int, int, int] | None:
    """Where the record the CSV reader rejected as ``record_text`` starts: (line number,
    byte offset, byte length without the line end) of the first physical line at or after
    ``first_line`` (the reader's count, which leaves out line ends inside quotes, so the
    physical line is never earlier) that is not in ``taken`` and reads as the record's
    first line.  None when no line matches or the encoding is not ASCII-compatible."""
    if codecs.lookup(encoding).name.startswith("utf-16"):
        return None
    end = _line_end(path)
    body = record_text.lstrip("\r\n")
    want = body.split(end.decode())[0].removesuffix("\r")
    for number, offset, raw in _physical_lines(path, end):
        if number < first_line or number in taken:
            continue
        line = raw.removesuffix(b"\r") if end == b"\n" else raw
        if line.decode(encoding, "replace") == want:
            return number, offset, len(line)
    return None


def mask_lines(
    path: Path, spans: Iterable[tuple[int, int]], placeholder: bytes, target: Path
) -> Path:
    """Copy ``path`` to ``target`` with each (byte offset, length) span replaced by
    ``placeholder``; line ends and every other byte stay as they are."""
    with open(path, "rb") as src, open(target, "wb") as out:
        pos = 0
        for start, length in sorted(spans):
            _copy_bytes(src, out, start - pos)
            out.write(placeholder)
            src.seek(start + length)
            pos = start + length
        shutil.copyfileobj(src, out, 1 << 20)
    return target


def _copy_bytes(src, out, count: int) -> None:
    while count > 0:
        chunk = src.read(min(count, 1 << 20))
        if not chunk:
            return
        out.write(chunk)
        count -= len(chunk)
