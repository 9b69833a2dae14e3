"""The audit pack's words and pictures: methodology-and-cautions text and the HTML report.

The report is one self-contained HTML file: inline CSS, charts drawn here as inline
SVG, no script and no external resource, so it opens offline and prints as is.
"""

from __future__ import annotations

import html
import json
import math
import textwrap
from collections.abc import Sequence
from importlib import resources
from pathlib import Path

from monitor.audit.formats import ESCAPE, FORMULA_TRIGGERS, Table, csv_text
from monitor.cautions import CAUTION, caution_lines
from monitor.config import Config

MAX_HTML_ROWS = 400  # per table; the CSV/XLSX files carry every row


def methodology_text(config: Config, quarter: str, as_of: str, *, compare: bool = False) -> str:
    """Plain-text methodology and cautions for one pack (the figures' meaning, their
    computation, their limits and the legal caution), with this configuration's values."""
    w = config.windows
    binary = "yes (0/1)" if config.judgment_is_binary else "no"
    parts = [
        f"cuewatch audit pack - quarter {quarter}, as of {as_of}",
        "",
        "WHAT THE DATA ARE",
        "Each row is one recorded judgment (the 'judgment' Ys) with the case facts the",
        "decision-maker saw (the 'cues' x), and, where one has arrived, the later outcome",
        "(the 'criterion' Ye). As of the time above means: only decisions and outcomes",
        "ingested at or before that moment are used; of several versions of an outcome the",
        "latest one ingested by then counts. Re-running the export with the same as-of time",
        "reproduces these tables exactly, whatever arrived later.",
        "",
        "HOW THE FIGURES ARE COMPUTED (lens model of judgment)",
        "- Quarter fit: per decision-maker, per team and for everyone, an ordinary least",
        "  squares regression of the judgment on the cues over all decisions of the calendar",
        "  quarter (the judge model, 'policy capturing'). Categorical cues enter as one",
        "  indicator per level against the declared reference level ('cue=level').",
        "- weight: change in judgment per unit of the cue, other cues held fixed; std_error,",
        "  t and p from the t distribution with n - k - 1 degrees of freedom; ci_low/ci_high",
        "  the 95% interval. std_weight: weight x sd(cue) / sd(judgment), comparable across",
        "  cues. utilization_r: plain correlation of the cue with the judgment (cue",
        "  utilisation); validity_r: correlation of the cue with the criterion (ecological",
        "  validity), on rows with an outcome.",
        "- R_s (consistency): multiple correlation of the judge model. R_e: the same for the",
        "  criterion on the cues (environmental predictability). r_a (achievement):",
        "  correlation of judgment and criterion. G (matching index): correlation of the two",
        "  models' predictions; C: correlation of their residuals; model_of_judge_r = G x R_e.",
        "  Lens model equation: r_a = G R_e R_s + C sqrt(1-R_e^2) sqrt(1-R_s^2), computed on",
        "  the rows with an outcome (R_s_linked is R_s on those rows).",
        f"- Binary judgment: {binary}. For a 0/1 judgment the figures above are a linear",
        "  probability model; logistic_weights adds a logistic regression (maximum",
        "  likelihood) per group with odds ratios and 95% Wald intervals.",
        "- Forbidden cues: disparity is the difference in mean judgment between a level and",
        "  the reference level (the slope on the cue alone); direct is the cue's weight in",
        "  the full judge model; indirect = disparity - direct is the part carried by",
        "  permitted cues that differ between the groups (proxies; per proxy in",
        "  forbidden_proxy_parts). One verdict per decision-maker and cue: a cue with one",
        "  column is tested on its weight; a categorical cue with several levels on all its",
        "  levels together (joint F test), sized by sd(sum of its level weights x",
        "  indicators) / sd(judgment), which does not depend on the reference level; its",
        "  levels follow as level_detail rows with their own figures and no verdict.",
        "  q_value: Benjamini-Hochberg adjusted p-value over every decision-maker x",
        "  forbidden cue verdict in this pack (indirect_q_value: the same for the indirect",
        "  part, a family of its own).",
        *_flag_rule_lines(config),
        "  ci_low / ci_high stand around std_weight (standardised scale); direct_ci_low /",
        "  direct_ci_high around the raw direct weight; indirect_ci_* around std_indirect.",
        "  The indirect part's standard error counts the proxies' imbalance as estimated",
        "  (delta method, Sobel 1982), not as fixed.",
        f"- window_summary: the rolling {w.length_days}-day windows (every {w.step_days} days)",
        "  ending inside the quarter, recomputed from the same rows (min/median/max).",
        "- window_findings: the verdicts the alerts were raised on, exactly as stored by the",
        "  assessment for each rolling window ending in the quarter and as they stood at the",
        "  as-of time (a later assessment that changed one is kept as a new version; the",
        "  version shown is the one evaluated by then and not yet superseded). Nothing in",
        "  this table is recomputed by the export. forbidden_cues above is the whole",
        "  quarter as one look; a weekly verdict and the quarter's can differ, and only the",
        "  weekly ones open alerts.",
        f"- A figure needs at least {w.min_rows} rows and more rows than cues + 1; a cue that",
        "  is constant, a constant judgment or collinear cues give an empty figure and a",
        "  reason, never a guess.",
        "- coverage: rows used, rows lacking a cue, outcomes linked and corrected, outcome",
        "  lag (days from decision to outcome), and rows quarantined in the batches used.",
        "- alerts: alerts active at any time in the quarter (by the data window or by the",
        "  clock), in the state their recorded history gives them at the as-of time.",
        "- Numbers are rounded to 12 significant digits in every file.",
        *_formula_note(),
    ]
    if compare:
        parts += [
            "- restatements: every compared figure whose value differs between the two as-of",
            "  times, with the row-level reasons found for that group: outcomes newly linked,",
            "  outcomes corrected (a later version with a different value), decisions",
            "  ingested late.",
        ]
    parts += ["", *operating_characteristics_lines(config)]
    parts += [
        "",
        "LIMITS AND CAUTIONS",
        *caution_lines(),
        "- Sample sizes: n_decisions, n_linked and n stand beside every estimate, with its",
        "  interval.",
        "- Outcomes arrive late: achievement and validity figures for a recent quarter rest",
        "  on the cases decided early enough to have an outcome, and may be restated.",
        "- The linear model describes the average policy over the quarter; a decision-maker",
        "  who changed policy within the quarter is better described by the rolling windows.",
        "- These tables support, and do not replace, the judgment of the organisation's",
        "  legal and compliance advisers under the law that applies locally.",
        "- Privacy: the pack holds aggregates only unless row-level data were requested",
        "  explicitly (see manifest.json, include_rows).",
    ]
    return "\n".join(parts) + "\n"


def _formula_note() -> list[str]:
    """How a reader gets the true text back from a neutralised spreadsheet cell."""
    names = {"\t": "a tab", "\r": "a carriage return", ESCAPE: f"{ESCAPE} (an apostrophe)"}
    starts = [names.get(c, c) for c in FORMULA_TRIGGERS]
    text = (
        "Spreadsheet safety: in the CSV and XLSX files a text cell that starts with "
        f"{', '.join(starts[:-1])} or {starts[-1]} is written with one extra leading {ESCAPE}, "
        "so that no spreadsheet runs it as a formula; the true value is the cell without "
        f"that first {ESCAPE}. Numbers, dates and true/false cells are never changed; the "
        "Parquet files and the HTML report hold the text as it is."
    )
    return textwrap.wrap(text, 84, initial_indent="- ", subsequent_indent="  ")


# The simulated operating characteristics of the alert rules, written by
# `python -m benchmarks.bench_alerts` (package data beside this module).
OPERATING_CHARACTERISTICS = "operating_characteristics.json"


def _rate(row: dict) -> str:
    if row["per_100"] is None:
        return "-"
    return f"{row['per_100']:.2f} (<= {row['upper_95']:.2f})"


def _delay(row: dict) -> str:
    med, p90, never = row["median_weeks"], row["p90_weeks"], row["never_share"]
    if never is None:
        return "-"
    fmt = lambda v: ">52" if v is None else f"{v:.0f}"  # noqa: E731
    return f"{fmt(med)} / {fmt(p90)} / {100 * never:.0f}%"


def operating_characteristics_lines(config: Config, data: dict | None = None) -> list[str]:
    """The methodology paragraph on the alerts' simulated false-alarm rates and
    detection delays, for the configured ``policy.alert_rule``; ``data`` defaults to the
    file the benchmark wrote."""
    head = ["HOW OFTEN THE ALERTS ERR (simulated operating characteristics)"]
    if data is None:
        try:
            text = (resources.files("monitor.audit") / OPERATING_CHARACTERISTICS).read_text()
            data = json.loads(text)
        except (OSError, ValueError):
            return [*head, "- Not available in this installation."]
    rule = config.policy.alert_rule
    figures = data["rules"][rule]
    run, settings = data["run"], data["settings"]
    if rule == "calibrated":
        scheme = (
            "Alert rule: calibrated - each weekly look compares a window's p-value with a "
            "control limit set by simulation so that an innocent series opens at most "
            f"{config.policy.false_alerts_per_100_years:g} direct or proxy and "
            f"{config.policy.drift_false_alerts_per_100_years:g} drift alerts per 100 years."
        )
    else:
        scheme = (
            "Alert rule: per_window_fdr - the previous scheme (Benjamini-Hochberg within one "
            "window end, drift at p < drift_alpha; overlapping weekly windows treated as "
            "independent tests). The figures below are that old scheme's, kept for "
            "comparison; it does not control false alerts over time."
        )
    world = data["world"]
    prose = [
        scheme,
        "The figures are SIMULATED, not measured on this organisation's decisions: a "
        f"simulation with planted truth ({run['command']}, {run['date']}) ran the same "
        "statistics and alert rules as this pack on synthetic decision-makers. Its "
        f"assumptions: {world['cues']}; {world['judges']}; {world['organisation']} per "
        "organisation. Real decision-makers with other volumes, cues or consistency will "
        "differ.",
    ]
    small = [
        f"{r['volume']} ({100 * (1 - r['assessable_share']):.0f}%)"
        for r in figures["false_alerts"]
        if r["kind"] == "forbidden_cue" and (r["assessable_share"] or 0) < 0.95
    ]
    if small:
        prose.append(
            "Share of weekly windows below the policy's minimum of "
            f"{settings['policy.min_rows']} decisions, and so not assessed, by decisions "
            f"per 90 days: {', '.join(small)}."
        )
    ours = {f"policy.{k}": v for k, v in config.policy.model_dump().items()}
    ours.update({f"windows.{k}": v for k, v in config.windows.model_dump().items()})
    differ = sorted(k for k, v in settings.items() if k in ours and ours[k] != v)
    if differ:
        prose.append(
            "This configuration differs from the simulated settings in "
            f"{', '.join(differ)}: the figures are indicative only."
        )
    lines = list(head)
    for text in prose:
        lines += textwrap.wrap(text, 84, break_on_hyphens=False)
    kinds = tuple(dict.fromkeys(r["kind"] for r in figures["false_alerts"]))
    lines += [
        "False alerts per 100 innocent person-cue-years (exact 95% upper bound):",
        f"  {'decisions/90 days':<18}" + "".join(f"{k:>20}" for k in kinds),
    ]
    rates = {(r["volume"], r["kind"]): r for r in figures["false_alerts"]}
    for volume in data["volumes"]:
        lines.append(f"  {volume:<18}" + "".join(f"{_rate(rates[volume, k]):>20}" for k in kinds))
    lines += [
        "Weeks from a change to the first open alert (median / 90th percentile / share",
        "not detected within 52 weeks), by decisions per 90 days:",
        f"  {'planted change':<16}" + "".join(f"{v:>20}" for v in data["volumes"]),
    ]
    delays = {(r["volume"], r["planted"]): r for r in figures["detection"]}
    for planted in data["world"]["planted"]:
        lines.append(
            f"  {planted:<16}"
            + "".join(f"{_delay(delays[v, planted]):>20}" for v in data["volumes"])
        )
    lines += [
        "(direct/proxy sizes: standardised weight / indirect part of the forbidden cue;",
        "drift: standardised change of a permitted cue's weight.) Faster detection costs",
        "more false accusations; benchmarks/README.md shows the trade-off.",
    ]
    return lines


# --- charts ------------------------------------------------------------------------------------


def _esc(value: object) -> str:
    return html.escape(csv_text(value), quote=True)


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
            f'<text x="{sx(t):.1f}" y="{axis_y + 14}" text-anchor="middle" class="lg">{t:g}</text>'
        )
    for m in marks:
        if lo <= m <= hi:
            out.append(
                f'<line x1="{sx(m):.1f}" y1="{top - 4}" x2="{sx(m):.1f}" y2="{axis_y}" class="mk"/>'
            )
    out.append("</svg>")
    return "".join(out)


def _charts(tables: dict[str, Table], tolerance: float) -> list[str]:
    charts = []
    dm = tables.get("decision_makers")
    if dm is not None:
        recs = [r for r in dm.records() if r["scope"] != "team"]
        charts.append(
            bar_chart(
                "Consistency R_s and achievement r_a, quarter fit",
                [f"{r['decision_maker']} (n={r['n_decisions']})" for r in recs],
                [
                    ("R_s consistency", "#3b6ea5", [r["R_s"] for r in recs]),
                    ("r_a achievement", "#d08c2b", [r["r_a"] for r in recs]),
                ],
                lo=-0.2,
                hi=1.0,
            )
        )
    fc = tables.get("forbidden_cues")
    if fc is not None and fc.rows:
        recs = fc.records()
        span = max(
            [tolerance * 2] + [abs(r["std_weight"]) for r in recs if r["std_weight"] is not None]
        )
        charts.append(
            bar_chart(
                "Forbidden cues: standardised direct weight (dashed: policy tolerance)",
                [
                    f"{r['decision_maker']} {r['cue']}{' FLAGGED' if r['flagged'] else ''}"
                    for r in recs
                ],
                [("std weight", "#b23a48", [r["std_weight"] for r in recs])],
                lo=-span,
                hi=span,
                marks=(-tolerance, tolerance),
            )
        )
    return charts


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,Segoe UI,sans-serif;margin:24px;color:#1d2430;max-width:1200px}
h1{font-size:22px}h2{font-size:17px;margin-top:28px;border-bottom:1px solid #ccd3dd}
.caution{background:#fff6e5;border:1px solid #e4b55c;padding:10px 14px;border-radius:4px}
.warning{background:#fde8e8;border:1px solid #c94a4a;padding:10px 14px;border-radius:4px}
table{border-collapse:collapse;font-size:12px;margin:8px 0}
th,td{border:1px solid #d5dbe3;padding:3px 6px;text-align:left;white-space:nowrap}
th{background:#dde4ee;position:sticky;top:0}td.n{text-align:right;font-variant-numeric:tabular-nums}
.wrap{overflow-x:auto;max-height:480px}pre{white-space:pre-wrap;background:#f5f7fa;padding:10px}
.chart{margin:8px 16px 8px 0}.ct{font-weight:600;font-size:13px}.lb,.lg,.na{font-size:11px}
.na{fill:#888}.ax{stroke:#666}.mk{stroke:#444;stroke-dasharray:4 3}
dl{display:grid;grid-template-columns:max-content auto;gap:2px 14px}dt{font-weight:600}
"""


def _table_html(t: Table) -> str:
    kinds = dict(t.columns)
    head = "".join(f"<th>{html.escape(c)}</th>" for c in t.names)
    body = []
    for row in t.rows[:MAX_HTML_ROWS]:
        cells = []
        for c, v in zip(t.names, row, strict=True):
            num = kinds[c] in ("int", "float")
            text = f"{v:.4g}" if isinstance(v, float) else csv_text(v)
            cells.append(f"<td{' class=n' if num else ''}>{html.escape(text)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    more = len(t.rows) - MAX_HTML_ROWS
    note = f"<p>{more} more rows in {t.name}.csv / the workbook.</p>" if more > 0 else ""
    return (
        f'<h2 id="{t.name}">{html.escape(t.title)} <small>({t.name}, {len(t.rows)} rows)'
        f'</small></h2><div class="wrap"><table><thead><tr>{head}</tr></thead><tbody>'
        + "".join(body)
        + f"</tbody></table></div>{note}"
    )


def write_html(tables: Sequence[Table], path: Path, manifest: dict, method: str) -> Path:
    """Write the self-contained report (no script, no external resource)."""
    by = {t.name: t for t in tables}
    tolerance = float(manifest["policy"]["tolerance"])
    fp = manifest["store_fingerprint"]
    fp_text = (
        fp.get("sha256")
        if "sha256" in fp
        else "; ".join(f"{k}: {v['sha256']}" for k, v in fp.items())
    )
    facts = [
        (
            "Quarter",
            f"{manifest['quarter']} ({manifest['quarter_start']} to {manifest['quarter_end']})",
        ),
        ("As of", manifest["as_of"]),
        ("Config digest", manifest["config_digest"]),
        ("Store fingerprint", fp_text),
        ("Software", f"cuewatch {manifest['software']['version']}"),
        ("Created", manifest["created_at"]),
    ]
    parts = [
        "<!DOCTYPE html><html lang=en><head><meta charset=utf-8>",
        f"<title>cuewatch audit {html.escape(manifest['quarter'])}</title><style>{_CSS}</style></head><body>",
        f"<h1>Decision audit, {html.escape(manifest['quarter'])}</h1>",
        "<dl>"
        + "".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(str(v))}</dd>" for k, v in facts)
        + "</dl>",
        *(f'<p class="warning">{html.escape(w)}</p>' for w in manifest.get("warnings", [])),
        f'<p class="caution"><b>Caution.</b> {html.escape(CAUTION)}</p>',
        '<h2 id="charts">Key charts</h2><div>' + "".join(_charts(by, tolerance)) + "</div>",
        "<p>Tables: " + ", ".join(f'<a href="#{t.name}">{t.name}</a>' for t in tables) + "</p>",
        *(_table_html(t) for t in tables),
        f'<h2 id="methodology">Methodology and cautions</h2><pre>{html.escape(method)}</pre>',
        "</body></html>",
    ]
    path.write_text("\n".join(parts), encoding="utf-8")
    return path


def _flag_rule_lines(config: Config) -> list[str]:
    """How flagged / proxy_flagged are decided, in this configuration's numbers."""
    from monitor.stats.monitoring import forbidden_cue_limit

    p, w = config.policy, config.windows
    proxy_tol = p.proxy_tolerance or p.tolerance
    limit = forbidden_cue_limit(p, w)
    if limit is None:
        return [
            f"  flagged = |std_weight| >= {p.tolerance:g} and q_value <= {p.fdr:g};",
            f"  proxy_flagged = |std_indirect| >= {proxy_tol:g} and indirect_q_value <= {p.fdr:g}.",
        ]
    return [
        f"  flagged = |std_weight| >= {p.tolerance:g} and p_value <= {limit.p_limit:.3g};",
        f"  proxy_flagged = |std_indirect| >= {proxy_tol:g} and indirect_p <= {limit.p_limit:.3g}.",
        "  The p limit is the weekly alerts' control limit: the level at which an innocent",
        f"  series of {w.length_days}-day windows looked at every {w.step_days} days opens at",
        f"  most {p.false_alerts_per_100_years:g} alerts per 100 years (rolling windows overlap,",
        "  so the weekly looks are not independent tests; see the operating characteristics",
        "  below). The quarter is one look at a window of its own.",
    ]
