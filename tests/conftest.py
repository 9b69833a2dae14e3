"""Fixtures shared by the tests, and the rule that a skip fails the run under CI.

The helpers themselves live in ``tests/helpers/`` (configurations, files, the command
line, reading the store); a test states the rows it feeds in and the result it expects.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from helpers.cli import run_cli, text
from helpers.configs import make_config

# The session's PostgreSQL server fixture (`postgres_server`), started once when a test asks.
pytest_plugins = ["helpers.postgres_server", "helpers.lake"]


@pytest.fixture
def config_path(tmp_path: Path) -> Path:
    """The small configuration, with an initialised store."""
    cfg = make_config(tmp_path)
    proc = run_cli(cfg, "init")
    assert proc.returncode == 0, text(proc)
    return cfg


# --- no silent skips under CI ----------------------------------------------------------


def ci_forbids_skips() -> bool:
    """CI sets CI=true: there a skipped test means a prerequisite is missing, which must
    fail the run instead of passing it quietly."""
    return os.environ.get("CI", "").strip().lower() in {"true", "1"}


def _skip_reason(report: pytest.TestReport | pytest.CollectReport) -> str:
    longrepr = report.longrepr
    if isinstance(longrepr, tuple) and len(longrepr) == 3:  # (path, line, "Skipped: why")
        return str(longrepr[2])
    return str(longrepr)


def _fail_instead_of_skip(report: pytest.TestReport | pytest.CollectReport) -> None:
    report.outcome = "failed"
    report.longrepr = f"skipped under CI=true, which allows no skips: {_skip_reason(report)}"


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo):
    """Under CI a skip (skip, skipif, importorskip, in a test or a fixture) is a failure;
    an expected failure (xfail, which pytest also reports as skipped) stays one."""
    report = yield
    if report.skipped and not hasattr(report, "wasxfail") and ci_forbids_skips():
        _fail_instead_of_skip(report)
    return report


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_make_collect_report(collector: pytest.Collector):
    """A whole module skipped at import (a module-level importorskip) fails under CI too."""
    report = yield
    if report.skipped and ci_forbids_skips():
        _fail_instead_of_skip(report)
    return report
