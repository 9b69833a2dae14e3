"""The audit report's charts, drawn as inline SVG (no script, no plotting library) in
the dashboard's palette (``monitor.palette``)."""

from __future__ import annotations

import html
import math
from collections.abc import Sequence

from monitor.audit.formats import Table
from monitor.palette import ACHIEVEMENT, COLOURS, CONSISTENCY


def nice_ceiling(value: float) -> float:
    """The smallest of 1, 2, 2.5 or 5 times a power of ten at or above ``value`` (> 0),
    so an axis that ends there has short labels (0.175 -> 0.2, 0.26 -> 0.5)."""
    if not math.isfinite(value) or value <= 0:
        return 1.0
    power = 10.0 ** math.floor(math.log10(value))
    for step in (1.0, 2.0, 2.5, 5.0, 10.0):
        if step * power >= value * (1 - 1e-12):
            return float(f"{step * power:.12g}")
    return 10.0 * power


def tick_text(value: float) -> str:
    """An axis label: at most three significant digits, no trailing zeros, no '-0'."""
    text = f"{float(f'{value:.3g}'):g}"
    return "0" if text == "-0" else text


def bar_chart(
    title: str,
    labels: Sequence[str],
    series: Sequence[tuple[str, str, Sequence[float | None]]],
    *,
    lo: float,
    hi: float,
    marks: Sequence[float] = (),
) -> str:
    """A horizontal grouped bar chart as an inline SVG string.

    series: (name, colour, values) with one value per label (None = not estimated, drawn
    as a grey 'n/a'); values are clipped to [lo, hi]; ``marks`` draws dashed reference
    lines (e.g. the policy tolerance).
    """
    # 11px labels are about 6.5px a character wide: size the margin to the longest.
    left = max(120, int(6.5 * max((len(x) for x in labels), default=0)) + 16)
    bar, gap, width, top = 12, 8, 420, 34
    per = bar * len(series) + gap
    height = top + per * max(len(labels), 1) + 30
    sx = lambda v: left + (min(max(v, lo), hi) - lo) / (hi - lo) * width  # noqa: E731
    out = [
        f'<svg role="img" width="{left + width + 30}" '
        f'height="{height}" viewBox="0 0 {left + width + 30} {height}" class="chart">',
        f"<title>{html.escape(title)}</title>",
        f'<text x="4" y="16" class="ct">{html.escape(title)}</text>',
    ]
    for i, (name, colour, _) in enumerate(series):
        out.append(
            f'<rect x="{left + 130 * i}" y="22" width="10" height="8" fill="{colour}"/>'
            f'<text x="{left + 14 + 130 * i}" y="30" class="lg">{html.escape(name)}</text>'
        )
    zero = sx(0.0) if lo <= 0 <= hi else sx(lo)
    for r, label in enumerate(labels):
        y0 = top + r * per
        out.append(
            f'<text x="{left - 6}" y="{y0 + per / 2}" text-anchor="end" class="lb">'
            f"{html.escape(label)}</text>"
        )
        for s, (_, colour, values) in enumerate(series):
            v = values[r]
            y = y0 + s * bar
            if v is None or not math.isfinite(v):
                out.append(f'<text x="{zero + 3}" y="{y + bar - 2}" class="na">n/a</text>')
                continue
            x0, x1 = sorted((zero, sx(v)))
            out.append(
                f'<rect x="{x0:.1f}" y="{y}" width="{max(x1 - x0, 0.5):.1f}" '
                f'height="{bar - 2}" fill="{colour}"><title>{html.escape(label)}: '
                f"{v:.3f}</title></rect>"
            )
    axis_y = top + per * max(len(labels), 1)
    out.append(f'<line x1="{left}" y1="{axis_y}" x2="{left + width}" y2="{axis_y}" class="ax"/>')
    for t in sorted({lo, (lo + hi) / 2, hi, *([0.0] if lo < 0 < hi else [])}):
        out.append(
            f'<text x="{sx(t):.1f}" y="{axis_y + 14}" text-anchor="middle" class="tk">'
            f"{tick_text(t)}</text>"
        )
    for m in marks:
        if lo <= m <= hi:
            out.append(
                f'<line x1="{sx(m):.1f}" y1="{top - 4}" x2="{sx(m):.1f}" y2="{axis_y}" class="mk"/>'
            )
    out.append("</svg>")
    return "".join(out)


def key_charts(tables: dict[str, Table], tolerance: float) -> list[str]:
    charts = []
    dm = tables.get("decision_makers")
    if dm is not None:
        recs = [r for r in dm.records() if r["scope"] != "team"]
        charts.append(
            bar_chart(
                "Consistency R_s and achievement r_a, quarter fit",
                [f"{r['decision_maker']} (n={r['n_decisions']})" for r in recs],
                [
                    ("R_s consistency", CONSISTENCY, [r["R_s"] for r in recs]),
                    ("r_a achievement", ACHIEVEMENT, [r["r_a"] for r in recs]),
                ],
                lo=-0.2,
                hi=1.0,
            )
        )
    fc = tables.get("forbidden_cues")
    if fc is not None and fc.rows:
        recs = fc.records()
        span = nice_ceiling(
            max(
                [tolerance * 2]
                + [abs(r["std_weight"]) for r in recs if r["std_weight"] is not None]
            )
        )
        charts.append(
            bar_chart(
                "Forbidden cues: standardised direct weight (dashed: policy tolerance)",
                [
                    f"{r['decision_maker']} {r['cue']}{' FLAGGED' if r['flagged'] else ''}"
                    for r in recs
                ],
                [("std weight", COLOURS["forbidden"], [r["std_weight"] for r in recs])],
                lo=-span,
                hi=span,
                marks=(-tolerance, tolerance),
            )
        )
    return charts
