"""Connection rules for the DuckDB store.

DuckDB cannot mix a read-write process with read-only ones on one file, so:

* one writer at a time, serialised by an advisory lock file beside the store
  (``<store>.lock``); a second writer waits up to ``store.lock_timeout_s`` and then
  fails with ``StoreBusy`` (a user-facing error, exit code 2);
* readers open short-lived read-only connections and retry briefly while a writer
  holds the file, so a dashboard never blocks the nightly job for long.

Every other module asks this one for connections.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import time
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import duckdb

from monitor.config import Config
from monitor.errors import UserError
from monitor.store.permissions import apply_mode, owner_only
from monitor.store.rules import sql_literal, utc_now
from monitor.store.schema import (
    StoreMismatch,
    apply_migrations,
    check_ready,
    current_version,
    sync_cue_columns,
)

THREADS_ENV = "CUEWATCH_DUCKDB_THREADS"


class StoreBusy(UserError):
    """The store is held by another process for longer than we are willing to wait."""


class StoreUnusable(UserError):
    """``store.path`` cannot hold or open a store (a folder, under a file, not writable,
    damaged or not a DuckDB file)."""


def _unusable(path: Path | str, reason: str) -> StoreUnusable:
    return StoreUnusable(f"the store {path} (store.path) {reason}.")


class Store:
    """Access to one DuckDB store file under the connection rules above."""

    def __init__(self, config: Config):
        self.config = config
        self.path = Path(config.store.path)
        self.lock_path = self.path.with_name(self.path.name + ".lock")

    # --- connections ------------------------------------------------------------------

    def _configure(self, con: duckdb.DuckDBPyConnection) -> None:
        # Timestamps without an offset in the input are read in the decisions' zone;
        # the bucket day of a decision is its calendar day there.
        con.execute(f"SET TimeZone = {sql_literal(self.config.decisions.timezone)}")
        con.execute("SET enable_progress_bar = false")
        # Operators (and the thread-independence tests) may pin DuckDB's worker count;
        # the statistics must not depend on it beyond rounding.
        threads = os.environ.get(THREADS_ENV, "").strip()
        if threads:
            if not threads.isdigit() or int(threads) < 1:
                raise StoreMismatch(f"{THREADS_ENV} must be a positive integer, not {threads!r}.")
            con.execute(f"SET threads = {int(threads)}")

    @contextlib.contextmanager
    def writer(self, timeout_s: float | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
        """The single read-write connection, under the store's lock file."""
        timeout = self.config.store.lock_timeout_s if timeout_s is None else timeout_s
        # DuckDB creates the store, its WAL and spill files itself: the umask gives them
        # (and the lock and the store's folder) the configured mode.
        with owner_only(self.config):
            self._check_path()
            try:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise _unusable(self.path, f"cannot be created: {exc.strerror}") from None
            with _file_lock(self.lock_path, timeout):
                con = _connect_with_retry(
                    str(self.path), read_only=False, timeout_s=max(timeout, 5)
                )
                try:
                    self._configure(con)
                    yield con
                finally:
                    con.close()

    @contextlib.contextmanager
    def reader(self, retry_s: float | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
        """A short-lived read-only connection; retries while a writer holds the file."""
        self._check_path()
        if not self.path.exists():
            raise StoreMismatch(
                f"the store {self.path} does not exist yet: run 'cuewatch init' first."
            )
        wait = self.config.store.read_retry_s if retry_s is None else retry_s
        con = _connect_with_retry(str(self.path), read_only=True, timeout_s=wait)
        try:
            self._configure(con)
            yield con
        finally:
            con.close()

    def query_df(self, sql: str, params: list | None = None):
        """Run one read-only query and return a pandas DataFrame."""
        with self.reader() as con:
            return con.execute(sql, params or []).df()

    def _check_path(self) -> None:
        """Raise StoreUnusable when ``store.path`` is a folder or lies under a file."""
        if self.path.is_dir():
            raise _unusable(self.path, "is a folder, not a file")
        for folder in self.path.parents:
            if folder.exists():
                if not folder.is_dir():
                    raise _unusable(self.path, f"lies under {folder}, which is a file")
                break

    # --- schema -----------------------------------------------------------------------

    def init(self) -> dict:
        """Create or migrate the store; a no-op when it is up to date.  The store's files
        (store, WAL, lock) get ``store.file_mode``, also when they existed before.

        Returns {"created": bool, "applied": [versions], "cue_columns_added": [...],
        "schema_version": int}.
        """
        created = not self.path.exists()
        self._check_path()
        apply_mode(self.config, *self.own_files())
        with self.writer() as con:
            con.execute("BEGIN")
            try:
                applied = apply_migrations(con)
                added = sync_cue_columns(con, self.config)
                con.execute("COMMIT")
            except BaseException:
                con.execute("ROLLBACK")
                raise
            version = current_version(con)
        return {
            "created": created,
            "applied": applied,
            "cue_columns_added": added,
            "schema_version": version,
            "path": str(self.path),
        }

    def own_files(self) -> list[Path]:
        """The files the store keeps beside its data: the store itself, DuckDB's WAL and
        the writers' lock file (some exist only at times)."""
        return [self.path, self.path.with_name(self.path.name + ".wal"), self.lock_path]

    def ensure_ready(self, con: duckdb.DuckDBPyConnection) -> None:
        """Raise StoreMismatch unless the store is initialised and has every cue column."""
        problem = check_ready(con, self.config)
        if problem:
            raise StoreMismatch(f"the store {self.path} {problem}")

    # --- run log ----------------------------------------------------------------------

    def record_run(
        self,
        con: duckdb.DuckDBPyConnection,
        run_id: str,
        command: str,
        started_at: datetime,
        status: str,
        message: str = "",
    ) -> None:
        con.execute(
            "INSERT INTO runs VALUES (?, ?, ?, ?, ?, ?)",
            [run_id, command, started_at, utc_now(), status, message],
        )


def get_fact(con: duckdb.DuckDBPyConnection, key: str) -> str | None:
    """A value from ``store_facts`` (None when unset)."""
    rows = con.execute("SELECT value FROM store_facts WHERE key = ?", [key]).fetchall()
    return rows[0][0] if rows else None


def set_fact(con: duckdb.DuckDBPyConnection, key: str, value: str) -> None:
    con.execute("INSERT OR REPLACE INTO store_facts VALUES (?, ?, ?)", [key, value, utc_now()])


# --- locking and retries ------------------------------------------------------------------


@contextlib.contextmanager
def _file_lock(path: Path, timeout_s: float) -> Iterator[None]:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)  # the umask decides
    except OSError as exc:
        raise _unusable(path, f"cannot have its lock file: {exc.strerror}") from None
    try:
        deadline = time.monotonic() + timeout_s
        delay = 0.05
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    holder = _read_holder(fd)
                    raise StoreBusy(
                        f"another cuewatch writer{holder} holds the store lock {path}; "
                        f"gave up after {timeout_s:g} s."
                    ) from None
                time.sleep(delay)
                delay = min(delay * 2, 1.0)
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        try:
            yield
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


def _read_holder(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        pid = os.read(fd, 32).decode().strip()
        return f" (pid {pid})" if pid else ""
    except OSError:
        return ""


def _is_lock_conflict(exc: Exception) -> bool:
    text = str(exc).lower()
    return "lock" in text or "conflicting" in text or "being used" in text


def _connect_with_retry(path: str, read_only: bool, timeout_s: float) -> duckdb.DuckDBPyConnection:
    deadline = time.monotonic() + timeout_s
    delay = 0.02
    while True:
        try:
            return duckdb.connect(path, read_only=read_only)
        except duckdb.IOException as exc:
            if not _is_lock_conflict(exc) or time.monotonic() >= deadline:
                if _is_lock_conflict(exc):
                    who = "the nightly job or another writer" if read_only else "a reader"
                    raise StoreBusy(
                        f"the store {path} is busy ({who} has it open); "
                        f"gave up after {timeout_s:g} s."
                    ) from None
                raise _unusable(path, _cannot_open(exc)) from None
            time.sleep(delay)
            delay = min(delay * 2, 0.5)
        except duckdb.Error as exc:  # damaged, or some other file than a DuckDB store
            raise _unusable(path, _cannot_open(exc)) from None


def _cannot_open(exc: Exception) -> str:
    first = (str(exc).strip().splitlines() or [type(exc).__name__])[0].rstrip(".")
    return f"cannot be opened as a DuckDB store ({first})"


def describe_init(result: dict) -> str:
    """``Store.init``'s account in one line for a person."""
    where, version = result["path"], result["schema_version"]
    if result["created"]:
        return f"Created store {where} (schema version {version})."
    if result["applied"] or result["cue_columns_added"]:
        added = result["cue_columns_added"]
        cues = f"; added cue columns {', '.join(added)}" if added else ""
        return f"Migrated store {where} to schema version {version}{cues}."
    return f"Store {where} is up to date (schema version {version})."
