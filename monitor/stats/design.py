"""Which design columns belong to a cue: the one naming rule for dummy columns.

A numeric or binary cue is one design column named like the cue; a categorical cue is
one dummy per non-reference level, named ``cue=level``.  Everything that maps a design
column back to its cue (the fits, the policy checks, the audit pack, the dashboard) asks
here.
"""

from __future__ import annotations

from collections.abc import Sequence

LEVEL_SEPARATOR = "="


def dummy_name(cue: str, level: str) -> str:
    """The design column of ``level`` of the categorical ``cue``."""
    return f"{cue}{LEVEL_SEPARATOR}{level}"


def cue_of(column: str) -> str:
    """The cue a design column belongs to (``cue=level`` -> ``cue``)."""
    return str(column).split(LEVEL_SEPARATOR, 1)[0]


def level_of(column: str) -> str | None:
    """The level a dummy column stands for (``cue=level`` -> ``level``), None for a
    numeric or binary cue's column."""
    _, sep, level = str(column).partition(LEVEL_SEPARATOR)
    return level if sep else None


def cue_columns(names: Sequence[str], cue: str) -> list[int]:
    """Indices of the design columns among ``names`` that belong to ``cue``."""
    return [j for j, name in enumerate(names) if cue_of(name) == cue]
