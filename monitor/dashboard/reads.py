"""The dashboard's one way to read the store: a batch of queries on one short connection.

A connection is opened read-only (``Store.reader``) for each batch and closed at once,
so the nightly writer is never kept waiting for long.  A busy store raises
``monitor.store.connection.StoreBusy``; a missing store raises ``StoreMismatch``.
"""

from __future__ import annotations

import pandas as pd

from monitor.config import Config
from monitor.store.connection import Store

# Read retries are kept short: the page tells the reviewer and retries itself rather
# than sitting inside one connect call for the store's full read_retry_s.
READ_RETRY_S = 2.0


def read_frames(config: Config, *queries: tuple[str, list]) -> list[pd.DataFrame]:
    """Run the queries on one read-only connection, then close it."""
    store = Store(config)
    with store.reader(retry_s=min(READ_RETRY_S, config.store.read_retry_s)) as con:
        return [con.execute(sql, params).df() for sql, params in queries]
