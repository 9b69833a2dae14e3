"""Failures inside the full refit's bucket sums and in its background bucket write
(``refit.windows._in_background`` writes the buckets while the windows are summed):
the error reaches the caller, no helper thread is left behind, and the store is as it
was before the refit (invented demo data)."""

from __future__ import annotations

import threading

import duckdb
import pytest

from monitor.config import Config, load_config
from monitor.refit import full, kernel
from monitor.refit import windows as refit_windows


@pytest.fixture()
def demo(tmp_path) -> Config:
    from helpers.demo_store import build_demo_store

    config = load_config(build_demo_store(tmp_path, days=60))
    refit_windows.refit(config, full=True)
    return config


def _snapshot(config: Config) -> tuple:
    """Every row of the refit's tables, as text (NaN compares equal to NaN there)."""
    con = duckdb.connect(str(config.store.path), read_only=True)
    try:
        return tuple(
            repr(con.execute(f"SELECT * FROM {table} ORDER BY ALL").fetchall())
            for table in ("fits", "cue_weights", "bucket_stats", "bucket_shifts", "store_facts")
        )
    finally:
        con.close()


def _helper_threads() -> set[str]:
    return {t.name for t in threading.enumerate()} & {"bucket-writer"}


def test_a_failure_while_summing_a_batch_leaves_the_store_as_before(demo, monkeypatch):
    before = _snapshot(demo)
    monkeypatch.setattr(full, "BATCH_ROWS", 500)  # several batches, read ahead
    seen = []
    add = kernel.BucketAccumulator.add

    def failing_add(self, *args):
        seen.append(1)
        if len(seen) == 3:
            raise RuntimeError("injected failure in the third batch")
        add(self, *args)

    monkeypatch.setattr(kernel.BucketAccumulator, "add", failing_add)
    with pytest.raises(RuntimeError, match="third batch"):
        refit_windows.refit(demo, full=True)
    assert not _helper_threads()
    assert _snapshot(demo) == before


def test_a_failure_of_the_bucket_write_leaves_the_store_as_before(demo, monkeypatch):
    before = _snapshot(demo)
    real = full.write_buckets

    def failing_write(con, layout, buckets):
        real(con, layout, buckets)  # the rows are in, uncommitted
        raise RuntimeError("injected failure after writing the buckets")

    monkeypatch.setattr(full, "write_buckets", failing_write)
    with pytest.raises(RuntimeError, match="after writing"):
        refit_windows.refit(demo, full=True)
    assert not _helper_threads()
    assert _snapshot(demo) == before
    # and the next refit goes through, to the same numbers
    monkeypatch.setattr(full, "write_buckets", real)
    refit_windows.refit(demo, full=True)
    after = _snapshot(demo)
    assert after[1:4] == before[1:4]  # weights and buckets (fits carry the time they were made)
