"""The audit pack's words and pictures: methodology-and-cautions text and the HTML report.

The report is one self-contained HTML file: inline CSS, charts drawn here as inline
SVG, no script and no external resource, so it opens offline and prints as is.
"""

from __future__ import annotations

import html
import json
import textwrap
from collections.abc import Sequence
from importlib import resources
from pathlib import Path

from monitor.audit.charts import key_charts
from monitor.audit.formats import (
    ESCAPE,
    FORMULA_TRIGGERS,
    P_FLOOR,
    Table,
    csv_text,
    is_probability,
    whole,
)
from monitor.cautions import CAUTION, caution_lines
from monitor.config import Config

MAX_HTML_ROWS = 400  # per table; the note under a longer one says where the rest are


def methodology_text(
    config: Config,
    quarter: str,
    as_of: str,
    *,
    compare: bool = False,
    warnings: Sequence[str] = (),
) -> str:
    """Plain-text methodology and cautions for one pack (the figures' meaning, their
    computation, their limits and the legal caution), with this configuration's values;
    ``warnings`` (the pack's, as in the manifest) come first."""
    w = config.windows
    binary = "yes (0/1)" if config.judgment_is_binary else "no"
    parts = [f"cuewatch audit pack - quarter {quarter}, as of {as_of}", ""]
    for text in warnings:
        parts += textwrap.wrap(f"WARNING: {text}", 84, subsequent_indent="  ")
        parts.append("")
    parts += [
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
        "- Numbers are rounded to 12 significant digits in every file. Counts are written",
        "  as whole numbers (coverage's value column mixes counts, a share and lags in days:",
        "  a float column in Parquet, whole numbers written without a decimal point).",
        f"- A p- or q-value is never written as 0: one below {P_FLOOR:g} (double precision",
        f"  ends near 2.2e-308, where a tail probability underflows) is written as {P_FLOOR:g}",
        f"  and means '{P_FLOOR:g} or smaller'; the HTML report shows it as <{P_FLOOR:g}.",
        *_formula_note(),
    ]
    if compare:
        parts += [
            "- restatements: every compared figure whose value differs between the two as-of",
            "  times, with the row-level reasons found for that group: outcomes newly linked,",
            "  outcomes corrected (a later version with a different value), decisions",
            "  ingested late, corrected or retracted.  A row the later time no longer has",
            "  (every decision of a person retracted) is listed with no value after.",
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


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,Segoe UI,sans-serif;margin:24px;color:#1d2430;max-width:1200px}
h1{font-size:22px}h2{font-size:17px;margin-top:28px;border-bottom:1px solid #ccd3dd}
.caution{background:#fff6e5;border:1px solid #e4b55c;padding:10px 14px;border-radius:4px}
.warning{background:#fde8e8;border:1px solid #c94a4a;padding:10px 14px;border-radius:4px}
table{border-collapse:collapse;font-size:12px;margin:8px 0}
th,td{border:1px solid #d5dbe3;padding:3px 6px;text-align:left;white-space:nowrap}
th{background:#dde4ee;position:sticky;top:0}td.n{text-align:right;font-variant-numeric:tabular-nums}
.wrap{overflow-x:auto;max-height:480px}pre{white-space:pre-wrap;background:#f5f7fa;padding:10px}
.chart{margin:8px 16px 8px 0}.ct{font-weight:600;font-size:13px}.lb,.lg,.tk,.na{font-size:11px}
.na{fill:#888}.ax{stroke:#666}.mk{stroke:#444;stroke-dasharray:4 3}
dl{display:grid;grid-template-columns:max-content auto;gap:2px 14px}dt{font-weight:600}
@media print{
body{margin:0;max-width:none;font-size:11px}
.wrap{overflow:visible;max-height:none}
table{font-size:8px;width:100%;table-layout:auto}
th{position:static}
th,td{white-space:normal;overflow-wrap:anywhere;padding:1px 3px}
tr,.chart{break-inside:avoid}h2{break-after:avoid}
}
"""


def cell_text(value: object, name: str, kind: str) -> str:
    """A table cell as the report shows it: four significant digits, whole numbers of a
    count column as integers, a floored p- or q-value as '<1e-300'."""
    if kind == "float" and is_probability(name) and value is not None and value <= P_FLOOR:
        return f"<{P_FLOOR:g}"
    if kind == "number" and whole(value) is not None:
        return str(whole(value))
    if isinstance(value, float):
        return f"{value:.4g}"
    return csv_text(value)


def _more_rows_note(t: Table, fmts: Sequence[str]) -> str:
    """Where the rows past MAX_HTML_ROWS are, in the formats this pack was written in."""
    shown = f"The first {MAX_HTML_ROWS} of {len(t.rows)} rows are shown"
    places = [f"{t.name}.{f}" for f in ("csv", "parquet") if f in fmts]
    if "xlsx" in fmts:
        places.append(f"the workbook's {t.name} sheet")
    if places:
        where = places[0] if len(places) == 1 else ", ".join(places[:-1]) + " and " + places[-1]
        return f"{shown}; every row is in {where}."
    return (
        f"{shown}; this pack was written as HTML only, so the other "
        f"{len(t.rows) - MAX_HTML_ROWS} rows are in none of its files: export again with "
        "--format csv (or parquet, xlsx) for every row."
    )


def _table_html(t: Table, fmts: Sequence[str]) -> str:
    kinds = dict(t.columns)
    head = "".join(f"<th>{html.escape(c)}</th>" for c in t.names)
    body = []
    for row in t.rows[:MAX_HTML_ROWS]:
        cells = []
        for c, v in zip(t.names, row, strict=True):
            num = kinds[c] in ("int", "float", "number")
            text = cell_text(v, c, kinds[c])
            cells.append(f"<td{' class=n' if num else ''}>{html.escape(text)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    more = len(t.rows) > MAX_HTML_ROWS
    note = f'<p class="more">{html.escape(_more_rows_note(t, fmts))}</p>' if more else ""
    return (
        f'<h2 id="{t.name}">{html.escape(t.title)} <small>({t.name}, {len(t.rows)} rows)'
        f'</small></h2><div class="wrap"><table><thead><tr>{head}</tr></thead><tbody>'
        + "".join(body)
        + f"</tbody></table></div>{note}"
    )


def write_html(
    tables: Sequence[Table],
    path: Path,
    manifest: dict,
    method: str,
    fmts: Sequence[str] = ("html",),
) -> Path:
    """Write the self-contained report (no script, no external resource); ``fmts`` are
    the formats the pack is written in (a long table's note says where its rows are)."""
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
        '<h2 id="charts">Key charts</h2><div>' + "".join(key_charts(by, tolerance)) + "</div>",
        "<p>Tables: " + ", ".join(f'<a href="#{t.name}">{t.name}</a>' for t in tables) + "</p>",
        *(_table_html(t, fmts) for t in tables),
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
