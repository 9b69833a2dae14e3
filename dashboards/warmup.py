"""What the first page view would otherwise pay once per server process, done ahead.

A fresh Streamlit server imports nothing of the app until the first browser connects;
that first script run then imports pandas, DuckDB, Altair and the project's modules,
opens the store for the first time, compiles Altair's schema validator and lets
Streamlit walk every loaded module once (its one-time "is this a REPL" check).  Measured
on the 5M-decision benchmark store this was ~1.5 s of the first visit and nothing of the
later ones.  ``warm`` does the same work in the server process once it is up
(``monitor.dashboard.serve`` calls it from a background thread), so the first visitor
finds it done, and leaves the overview's first read in the pages' own cache
(``ui.prefetch``: the same key and time to live as any page read).  It changes nothing
a page shows: the store is only read, and every failure is swallowed (the page then
pays the cost as before).
"""

from __future__ import annotations

import inspect
import logging
import time

log = logging.getLogger("cuewatch.dashboard")
RUNTIME_WAIT_S = 5.0


def warm(config_path: str | None) -> float:
    """Import the overview page's modules, read its data once and build its chart once.

    Returns the seconds it took (for the server log).  Never raises.
    """
    t0 = time.perf_counter()
    try:
        _warm(config_path)
    except Exception as exc:  # noqa: BLE001 - warming is an optimisation only
        log.info("dashboard warm-up skipped: %s", exc)
    finally:
        # After all imports: Streamlit's first element calls inspect.stack(), whose
        # module lookup scans (and then caches) every entry of sys.modules.
        inspect.stack()
    return time.perf_counter() - t0


def _warm(config_path: str | None) -> None:
    # The same import order as app.py and the overview page: a visit that starts while
    # this thread is still importing then waits on the same module locks in the same
    # order (never in opposite orders, which Python reports as an import deadlock).
    from dashboards import ui

    # isort: split
    from dashboards import charts
    from monitor.config import load_config
    from monitor.dashboard import data as dd
    from monitor.dashboard.runtime import server_started

    config = load_config(config_path)
    # The overview's own read: first open of the store file (DuckDB catalog, OS cache).
    view = dd.overview(config)
    rows = view.rows
    if (rows["scope"] == "decision_maker").any():
        # Altair validates the spec against the Vega-Lite JSON schema; the first
        # validation builds the validator.
        charts.overview_chart(rows).to_dict()
    # The first pandas -> Arrow conversion (how Streamlit ships frames) loads its
    # type mappings.
    import pyarrow as pa

    pa.Table.from_pandas(rows.drop(columns=["R_s_trend"]), preserve_index=False)
    # ui's st.cache_data functions belong to the runtime that exists when ui is first
    # imported; the server's warm-up starts once the server is up (dashboard_serve).
    if server_started(RUNTIME_WAIT_S):
        # The overview page's first read, as a new session makes it (no period chosen,
        # all teams): a visit within ui.CACHE_TTL_S of the start finds it cached.
        ui.prefetch(dd.overview, None, team=None)
