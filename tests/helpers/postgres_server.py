"""A throwaway PostgreSQL server for the tests: ``initdb`` in a temporary folder, started
with ``pg_ctl`` on a loopback port, stopped and removed at the end.

The binaries are Debian's (``/usr/lib/postgresql/<version>/bin``, installed by `make
test` as root) or whatever ``initdb`` is on the PATH.  PostgreSQL refuses to run as root,
so as root the server runs as the account ``nobody`` (``runuser``), in a folder that
account owns.
"""

from __future__ import annotations

import glob
import os
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pytest

from helpers.local_servers import free_port


def postgres_bin() -> Path | None:
    """The folder holding initdb, pg_ctl and postgres (the newest Debian version first)."""
    found = sorted(
        glob.glob("/usr/lib/postgresql/*/bin/initdb"),
        key=lambda p: int(Path(p).parts[-3]) if Path(p).parts[-3].isdigit() else 0,
    )
    if found:
        return Path(found[-1]).parent
    initdb = shutil.which("initdb")
    return Path(initdb).resolve().parent if initdb else None


@dataclass
class PostgresServer:
    folder: Path
    port: int
    bin: Path
    user: str = "cuewatch_test"

    def url(self, dbname: str = "postgres") -> str:
        return f"postgresql://{self.user}@127.0.0.1:{self.port}/{dbname}"

    def create_database(self, name: str) -> str:
        """A fresh database; returns its connection string."""
        import psycopg

        with psycopg.connect(self.url(), autocommit=True) as con:
            con.execute(f'DROP DATABASE IF EXISTS "{name}"')
            con.execute(f'CREATE DATABASE "{name}"')
        return self.url(name)


def _as_server_user(args: list[str]) -> list[str]:
    return ["runuser", "-u", "nobody", "--", *args] if os.geteuid() == 0 else args


def start_postgres() -> PostgresServer:
    """Start a server (trust authentication, loopback only, no fsync: a test server)."""
    bindir = postgres_bin()
    if bindir is None:
        raise FileNotFoundError("PostgreSQL's initdb was not found (Debian package postgresql)")
    folder = Path(tempfile.mkdtemp(prefix="cuewatch-pg-"))
    if os.geteuid() == 0:
        shutil.chown(folder, "nobody")
    server = PostgresServer(folder, free_port(), bindir)
    subprocess.run(
        _as_server_user(
            [str(bindir / "initdb"), "-D", str(folder / "data"), "-A", "trust", "-U", server.user]
            + ["-E", "UTF8", "--locale=C.UTF-8", "--no-sync"]
        ),
        check=True,
        capture_output=True,
    )
    options = (
        f"-p {server.port} -k {folder} -c listen_addresses=127.0.0.1 -c fsync=off "
        "-c synchronous_commit=off -c full_page_writes=off"
    )
    subprocess.run(
        _as_server_user(
            [str(bindir / "pg_ctl"), "-D", str(folder / "data"), "-o", options]
            + ["-l", str(folder / "server.log"), "-w", "-t", "60", "start"]
        ),
        check=True,
        capture_output=True,
    )
    return server


def stop_postgres(server: PostgresServer) -> None:
    subprocess.run(
        _as_server_user(
            [str(server.bin / "pg_ctl"), "-D", str(server.folder / "data"), "-m", "fast", "stop"]
        ),
        capture_output=True,
    )
    shutil.rmtree(server.folder, ignore_errors=True)


@pytest.fixture(scope="session")
def postgres_server():
    """One PostgreSQL server for the whole test session (skipped where PostgreSQL or
    psycopg is missing, which fails the run under CI=true: tests/conftest.py)."""
    pytest.importorskip("psycopg", reason="psycopg is not installed (pip extra 'postgres')")
    if postgres_bin() is None:
        pytest.skip("PostgreSQL is not installed (Debian package postgresql; `make test`)")
    server = start_postgres()
    try:
        yield server
    finally:
        stop_postgres(server)
