"""Who may read what cuewatch writes: the one rule for file and folder permissions.

Every file cuewatch creates (the store and the files DuckDB keeps beside it: ``.wal``,
``.tmp/`` spill folder; the writer's ``.lock``; the alert file; audit exports) gets
``store.file_mode`` (default 0o600, owner only), every folder it creates the same bits
plus search (x) wherever read is allowed (0o700 by default).  DuckDB creates its own
files, so the rule is applied as the process umask while cuewatch writes
(``owner_only``); ``apply_mode`` tightens files that already exist (an older store).
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterator
from pathlib import Path

from monitor.config import Config

# os.umask is process-wide: the first block to enter sets it, the last to leave restores
# it, so overlapping blocks in the dashboard's threads cannot undo each other.
_LOCK = threading.Lock()
_state = {"depth": 0, "saved": 0}


def folder_mode(file_mode: int) -> int:
    """The folder bits that go with ``file_mode``: search (x) added wherever read (r) is."""
    return file_mode | ((file_mode & 0o444) >> 2)


def umask_for(file_mode: int) -> int:
    """The umask under which new files get ``file_mode`` and new folders ``folder_mode``."""
    return 0o777 & ~folder_mode(file_mode)


@contextlib.contextmanager
def owner_only(config: Config) -> Iterator[None]:
    """Create files and folders with the configured modes inside the block: the process
    umask is set for its duration and restored after.  Blocks may nest or overlap in
    threads; the outermost one's mode holds until the last one ends."""
    with _LOCK:
        if _state["depth"] == 0:
            _state["saved"] = os.umask(umask_for(config.store.file_mode))
        _state["depth"] += 1
    try:
        yield
    finally:
        with _LOCK:
            _state["depth"] -= 1
            if _state["depth"] == 0:
                os.umask(_state["saved"])


def apply_mode(config: Config, *paths: Path) -> None:
    """Give existing regular files the configured mode, for files created before the rule
    or under another umask.  Anything else (missing, a folder, a device) is left alone:
    a mistaken ``store.path`` must not change the permissions of someone's folder.  A file
    this account may not chmod (another owner's) keeps its mode; opening it decides."""
    for path in paths:
        if path.is_file():
            with contextlib.suppress(PermissionError):
                os.chmod(path, config.store.file_mode)


def set_process_umask(config: Config) -> None:
    """Make the configured modes the rule for the rest of this process (the command line
    calls it once the configuration is read; child processes such as the dashboard server
    inherit it), so files written outside the store's writer (the alert file, exports, the
    delivery lock) are covered too."""
    with _LOCK:
        if _state["depth"] == 0:
            os.umask(umask_for(config.store.file_mode))
        else:  # inside an owner_only block: the new value is the one it restores
            _state["saved"] = umask_for(config.store.file_mode)
