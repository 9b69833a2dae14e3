"""Alert episodes: when a run of flagged windows opens an alert and a run of clear ones
resolves it (the hysteresis that keeps one noisy window from doing either)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np


def window_states(flagged: np.ndarray, assessable: np.ndarray) -> list[bool | None]:
    """Per-window states for ``episodes``: True flagged, False clear, None not assessable."""
    return [bool(f) if a else None for f, a in zip(flagged, assessable, strict=True)]


@dataclass(frozen=True)
class Episode:
    """An alert episode: opened at window ``open_index``; ``resolve_index`` None if open."""

    open_index: int
    resolve_index: int | None


def episodes(states: Sequence[bool | None], consecutive_windows: int) -> list[Episode]:
    """Alert episodes of one (decision-maker, kind, cue) key over its ordered windows.

    An episode opens at the window that completes a run of ``consecutive_windows``
    flagged windows and resolves at the window that completes a run of as many clear
    ones.  A None window (not assessable) is skipped: it neither counts towards nor
    breaks a run, because missing evidence is not evidence either way.  So with N >= 2 a
    single noisy window can neither open nor close an episode.
    """
    if consecutive_windows < 1:
        raise ValueError("consecutive_windows must be at least 1")
    found: list[Episode] = []
    opened: int | None = None
    run = 0
    for i, state in enumerate(states):
        if state is None:
            continue
        # While closed we count flags, while open we count clears; anything else resets.
        run = run + 1 if bool(state) == (opened is None) else 0
        if run < consecutive_windows:
            continue
        run = 0
        if opened is None:
            opened = i
        else:
            found.append(Episode(opened, i))
            opened = None
    if opened is not None:
        found.append(Episode(opened, None))
    return found
