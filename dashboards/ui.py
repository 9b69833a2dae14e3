"""Shared page plumbing: which configuration, cached reads, a busy store, the caution box.

Reads go through ``load``: one short-lived read-only connection per call (inside
``monitor.dashboard.data``), cached for a short time under a key that includes the
store file's modification time, so a nightly write shows up on the next rerun and no
connection is ever held across reruns.
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import string
import sys
import time
from collections.abc import Callable
from typing import Any

import streamlit as st

from monitor.cautions import CAUTION
from monitor.config import ENV_VAR, Config, ConfigError, load_config
from monitor.dashboard import data as dd
from monitor.store.connection import StoreBusy
from monitor.store.schema import StoreMismatch

CACHE_TTL_S = 30
_MD_PUNCTUATION = re.compile("[" + re.escape(string.punctuation) + "]")
BUSY_RETRIES = 3


def config_path() -> str | None:
    """``--config FILE`` after the ``--`` of ``streamlit run``, else $CUEWATCH_CONFIG."""
    parser = argparse.ArgumentParser(add_help=False)
    parser.add_argument("--config")
    known, _ = parser.parse_known_args(sys.argv[1:])
    return known.config or os.environ.get(ENV_VAR)


@st.cache_resource(show_spinner=False)
def _load_config(path: str | None) -> Config:
    return load_config(path)


def config() -> Config:
    """The dashboard's configuration; stops the page with a one-line reason if bad."""
    try:
        return _load_config(config_path())
    except ConfigError as exc:
        st.error(f"Cannot read the configuration: {md(exc)}")
        st.stop()
        raise  # unreachable: st.stop ends the script run


@st.cache_data(ttl=CACHE_TTL_S, show_spinner=False, max_entries=256)
def _cached(
    fn_module: str, fn_name: str, path: str | None, stamp: tuple, args: tuple, kwargs: tuple
) -> Any:
    # ``stamp`` is only part of the key: a new store mtime means a fresh read.  The
    # function travels by name (cache keys must hash); only the dashboard's own
    # read modules are looked up.
    if not fn_module.startswith("monitor.dashboard."):
        raise ValueError(f"not a dashboard read: {fn_module}.{fn_name}")
    fn = getattr(importlib.import_module(fn_module), fn_name)
    return fn(_load_config(path), *args, **dict(kwargs))


def _read(cfg: Config, fn: Callable[..., Any], args: tuple, kwargs: dict) -> Any:
    key_kwargs = tuple(sorted(kwargs.items()))
    return _cached(fn.__module__, fn.__name__, config_path(), dd.store_stamp(cfg), args, key_kwargs)


def prefetch(fn: Callable[..., Any], *args: Any, **kwargs: Any) -> None:
    """Fill the cache that ``load(fn, *args, **kwargs)`` reads, outside any page run
    (the server's warm-up thread): no widgets, and a busy store raises ``StoreBusy``.
    Call it once Streamlit's runtime exists, so the cache is the one pages use."""
    _read(_load_config(config_path()), fn, args, kwargs)


def load(fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
    """Call ``fn(config, *args, **kwargs)`` (a read of ``monitor.dashboard``) through the cache.

    While the nightly job holds the store the page says so and retries a few times;
    if it is still busy the page shows a retry button and stops (never an exception).
    """
    cfg = config()
    notice = st.empty()
    for attempt in range(BUSY_RETRIES):
        try:
            value = _read(cfg, fn, args, kwargs)
            notice.empty()
            return value
        except StoreBusy:
            notice.info(
                "The store is busy (the nightly job is writing). "
                f"Retrying ({attempt + 1}/{BUSY_RETRIES})…"
            )
            time.sleep(1.0 + attempt)
        except StoreMismatch as exc:
            notice.empty()
            st.warning(f"No data to show yet: {md(exc)}")
            st.stop()
    notice.warning("The store is still busy (the nightly job is writing). Try again in a minute.")
    st.button("Try again", key=f"retry-{fn.__name__}")
    st.stop()


def md(value: Any) -> str:
    """``value`` as literal text for any Streamlit string that is read as Markdown
    (st.markdown, captions, alerts, labels, metric values).

    Ids, names, notes, cue levels, paths and messages come from data or from people, so
    none of their characters may act: every ASCII punctuation character is
    backslash-escaped (CommonMark lets any of them be escaped, and an escaped one is
    plain text: no image, link, emphasis, HTML, code, directive or math), and line
    breaks become spaces so a value cannot start a block of its own.  None is shown
    as an en dash.
    """
    if value is None or (isinstance(value, float) and value != value):
        return "–"
    text = " ".join(str(value).splitlines())
    return _MD_PUNCTUATION.sub(r"\\\g<0>", text)


def given(value: Any) -> bool:
    """Whether a cell holds a value: not None, not NaN (pandas 3 reads a missing text
    cell as NaN, which is truthy) and not blank text."""
    if value is None or (isinstance(value, float) and value != value):
        return False
    return bool(str(value).strip())


def caution() -> None:
    """The caution every forbidden-cue view carries."""
    st.warning(CAUTION, icon=":material/balance:")


def number(v: Any, digits: int = 2) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return "–"
    return "–" if f != f else f"{f:.{digits}f}"
