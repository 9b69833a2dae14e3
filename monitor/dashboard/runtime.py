"""Whether this process's Streamlit runtime is up (shared by the server and its warm-up)."""

from __future__ import annotations

import time


def server_started(timeout_s: float) -> bool:
    """Wait up to ``timeout_s`` for this process's Streamlit runtime to be up."""
    from streamlit import runtime
    from streamlit.runtime import RuntimeState

    deadline = time.monotonic() + timeout_s
    while not (runtime.exists() and runtime.get_instance().state != RuntimeState.INITIAL):
        if time.monotonic() > deadline:
            return False
        time.sleep(0.02)
    return True
