"""Text tables and small charts for the command line, fitted to the terminal's width.

The width comes from ``shutil.get_terminal_size`` (which honours ``COLUMNS``; 80 when
output is not a terminal and ``COLUMNS`` is unset), so a table wraps its cells instead of
its lines on an ordinary terminal.
"""

from __future__ import annotations

import io
import shutil
from collections.abc import Sequence

# Below this a table is unreadable however it wraps; a narrower terminal gets this width.
MIN_WIDTH = 60
_BLOCKS = " ▏▎▍▌▋▊▉█"


def terminal_width() -> int:
    return max(MIN_WIDTH, shutil.get_terminal_size((80, 24)).columns)


def render_table(
    title: str | None,
    headers: Sequence[str],
    rows: Sequence[Sequence[object]],
    *,
    width: int | None = None,
    no_wrap: Sequence[str] = (),
) -> str:
    """A boxed table as plain text, at most ``width`` (default: the terminal's) wide.
    Cells are shown as text (``None`` as '-'); columns named in ``no_wrap`` keep their
    cells on one line (rich shortens the others first)."""
    from rich.console import Console
    from rich.table import Table

    table = Table(title=title, title_justify="left")
    for h in headers:
        table.add_column(h, no_wrap=h in no_wrap, overflow="fold")
    for r in rows:
        table.add_row(*("-" if v is None else str(v) for v in r))
    console = Console(width=width or terminal_width(), record=True, file=io.StringIO())
    console.print(table)
    return console.export_text()


def paragraphs(texts: Sequence[str], width: int | None = None, bullet: str = "") -> str:
    """Each text wrapped to ``width`` (default: the terminal's), one paragraph a line."""
    import textwrap

    w = width or terminal_width()
    indent = " " * len(bullet)
    return "".join(
        textwrap.fill(t, w, initial_indent=bullet, subsequent_indent=indent) + "\n" for t in texts
    )


def bar(value: float | None, scale: float, cells: int) -> str:
    """A horizontal bar of ``value`` on ``cells`` character cells for |value| = ``scale``,
    drawn with eighth blocks (whole cells for negative values, which grow leftwards of a
    '|' axis).  Empty for
    a missing value."""
    if value is None or value != value or scale <= 0:
        return " " * cells + "|" + " " * cells
    if value < 0:  # eighth blocks fill from the left: whole cells on this side
        whole = min(cells, round(abs(value) / scale * cells))
        return ("█" * whole).rjust(cells) + "|" + " " * cells
    eighths = min(cells * 8, round(value / scale * cells * 8))
    full, rest = divmod(eighths, 8)
    body = "█" * full + (_BLOCKS[rest] if rest else "")
    return " " * cells + "|" + body.ljust(cells)
