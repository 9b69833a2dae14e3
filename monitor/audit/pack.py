"""The quarterly audit pack (`cuewatch export`): the quarter's tables as they stood at a time.

``export`` fetches the quarter's decisions (plus one window length before it, for the
rolling windows) with the outcome that counted at the as-of time T: only rows ingested
at or before T, the latest outcome correction ingested by T.  Rows come back in
decision-id order and every figure is computed from them with numpy, so the same T
always gives the same numbers, and floats are rounded (``audit_formats``) before they
reach a file.  This module fetches rows and writes the pack; the fitted tables come
from ``audit_figures``, coverage / alerts-as-of / restatements from ``audit_asof``,
the file formats from ``audit_formats`` and the words and HTML from ``audit_report``.
"""

from __future__ import annotations

import calendar
import hashlib
import json
import re
import shutil
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from monitor import __version__
from monitor.audit.asof import alerts_table, coverage_table, history_table, restatement_table
from monitor.audit.figures import quarter_tables
from monitor.audit.folder import earlier_pack, publish, staging_folder
from monitor.audit.formats import Table, write_csv, write_parquet, write_workbook
from monitor.audit.report import methodology_text, write_html
from monitor.audit.verdicts import fetch_window_findings, window_findings_table
from monitor.config import Config
from monitor.errors import UserError
from monitor.refit.buckets import design_expressions
from monitor.stats.monitoring import drift_limit, forbidden_cue_limit
from monitor.store.connection import Store
from monitor.store.rules import (
    current_outcome_rows_sql,
    decisions_known_at_sql,
    ingested_by,
    quote_ident,
    utc_now,
)

FORMATS = ("csv", "parquet", "xlsx", "html")
_QUARTER = re.compile(r"^\s*(\d{4})\s*-?\s*[Qq]([1-4])\s*$")


class ExportUsageError(UserError):
    """A user error in `cuewatch export` (one sentence; the CLI exits 2)."""


# --- arguments ------------------------------------------------------------------------


def parse_quarter(text: str) -> tuple[str, date, date]:
    """'2026Q3' -> ('2026Q3', first day, last day); raises ExportUsageError otherwise."""
    m = _QUARTER.match(text or "")
    if not m:
        raise ExportUsageError(f"--quarter must look like 2026Q3, not {text!r}.")
    year, q = int(m.group(1)), int(m.group(2))
    if year < 1000:  # four digits, and room for a window's look-back before the quarter
        raise ExportUsageError(f"--quarter must lie in the years 1000 to 9999, not {text!r}.")
    first = date(year, 3 * q - 2, 1)
    # The quarter's last day without stepping into the next year (9999Q4 has none).
    last = date(year, 3 * q, calendar.monthrange(year, 3 * q)[1])
    return f"{year}Q{q}", first, last


def parse_as_of(text: str | None, timezone: str) -> tuple[datetime, bool]:
    """The as-of instant in UTC and whether it defaulted to now.

    ISO 8601; a time without an offset is read in ``timezone`` (the decisions' zone,
    as ingest does); a bare date means 00:00 that day.  A moment after now is refused:
    rows may still arrive before it, so the pack could not be rebuilt the same later.
    """
    if text is None or not str(text).strip():
        return utc_now(), True
    try:
        dt = datetime.fromisoformat(str(text).strip())
    except ValueError:
        raise ExportUsageError(
            f"--as-of must be an ISO 8601 time such as 2026-10-05T09:00:00+00:00, not {text!r}."
        ) from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=ZoneInfo(timezone))
    now = utc_now()
    if dt > now:
        raise ExportUsageError(
            f"--as-of {text.strip()} lies in the future (it is now {iso(now)[:19]} UTC), "
            "and a pack can only show what had arrived by a moment that has passed."
        )
    return dt.astimezone(UTC), False


def iso(dt: datetime) -> str:
    return dt.astimezone(UTC).isoformat()


def quarter_end(last: date, timezone: str) -> datetime:
    """The instant the quarter whose last day is ``last`` is over: 00:00 of the next
    day in the decisions' time zone (the zone of the bucket days)."""
    if last >= date.max:  # 9999Q4 never ends
        return datetime.max.replace(tzinfo=UTC)
    return datetime.combine(last + timedelta(days=1), datetime.min.time(), ZoneInfo(timezone))


def unfinished_warning(
    label: str, last: date, as_of: datetime, timezone: str, which: str = "the as-of time"
) -> str | None:
    """The warning for a pack taken (``which``: at ``as_of``) before its quarter was
    over; None when it was over."""
    end = quarter_end(last, timezone)
    if as_of >= end:
        return None
    return (
        f"{label} was not over at {which} ({iso(as_of)[:19]} UTC): it runs to "
        f"{last.isoformat()} (ends {iso(end)[:19]} UTC), so these tables hold only the "
        "decisions made and ingested by then, and an export as of a later time will differ."
    )


# --- rows -----------------------------------------------------------------------------


@dataclass(frozen=True)
class QuarterRows:
    """The rows one export uses, in decision-id order.

    frame: decision_id, batch_id, decision_maker, team, day (date), decided_s (epoch s),
        judgment, x0..x{k-1} (design columns), criterion (NaN if none linked by T),
        o_batch, o_line, observed_s, o_versions (outcome rows ingested by T);
        only rows with every cue present.
    in_quarter: bool mask of ``frame`` rows decided inside the quarter (the rest is the
        look-back for rolling windows).
    missing_cues: decisions in the quarter ingested by T but lacking a cue, per maker.
    """

    frame: pd.DataFrame
    in_quarter: np.ndarray
    missing_cues: dict[str, int]
    names: tuple[str, ...]

    def x(self, mask: np.ndarray | None = None) -> np.ndarray:
        f = self.frame if mask is None else self.frame[mask]
        return f[[f"x{i}" for i in range(len(self.names))]].to_numpy(dtype=float)


def _outcomes_as_of_sql() -> str:
    return (
        "SELECT decision_id, criterion, observed_at, batch_id, source_line, n_versions FROM ("
        + current_outcome_rows_sql(ingested_by(), count_versions=True)
        + ")"
    )


def fetch_rows(
    config: Config, first: date, last: date, quarter_first: date, as_of: str
) -> QuarterRows:
    """Decisions decided in [first, last] and ingested by ``as_of``, with their outcome."""
    xs = design_expressions(config)
    present = " AND ".join(f"d.{quote_ident(c)} IS NOT NULL" for c in config.cues)
    sql = (
        f"WITH o AS ({_outcomes_as_of_sql()}) "
        "SELECT d.decision_id, d.batch_id, d.decision_maker, d.team, d.decided_day AS day, "
        "epoch(d.decided_at) AS decided_s, d.judgment, "
        + "".join(f"{e} AS x{i}, " for i, e in enumerate(xs))
        + f"({present}) AS cues_ok, o.criterion, o.batch_id AS o_batch, "
        "o.source_line AS o_line, epoch(o.observed_at) AS observed_s, "
        "coalesce(o.n_versions, 0) AS o_versions "
        f"FROM ({decisions_known_at_sql()}) d LEFT JOIN o ON o.decision_id = d.decision_id "
        "WHERE d.decided_day BETWEEN ? AND ? AND " + ingested_by("d.ingested_at") + " "
        "ORDER BY d.decision_id"
    )
    store = Store(config)
    with store.reader() as con:
        store.ensure_ready(con)
        df = con.execute(sql, [as_of, as_of, as_of, as_of, first, last, as_of]).df()
    df["day"] = pd.to_datetime(df["day"]).dt.date
    df["criterion"] = df["criterion"].astype(float)
    in_q = (df["day"] >= quarter_first).to_numpy()
    lacking = df[in_q & ~df["cues_ok"].to_numpy(dtype=bool)]
    missing = lacking.groupby("decision_maker").size().to_dict() if len(lacking) else {}
    kept = df[df["cues_ok"].to_numpy(dtype=bool)].reset_index(drop=True)
    return QuarterRows(
        kept,
        (kept["day"] >= quarter_first).to_numpy(),
        {str(k): int(v) for k, v in missing.items()},
        tuple(config.design_columns()),
    )


def fetch_alerts(config: Config, as_of: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Alerts and their history rows changed at or before ``as_of`` (UTC ISO strings)."""
    store = Store(config)
    with store.reader() as con:
        hist = con.execute(
            "SELECT alert_id, changed_at, from_state, to_state, changed_by, note, evidence "
            "FROM alert_history WHERE " + ingested_by("changed_at") + " "
            "ORDER BY alert_id, changed_at, CASE to_state WHEN 'open' THEN 0 "
            "WHEN 'acknowledged' THEN 1 ELSE 2 END",
            [as_of],
        ).df()
        alerts = con.execute(
            "SELECT alert_id, kind, scope, decision_maker, team, cue, opened_window_end, "
            "resolved_window_end, evidence, updated_at FROM alerts "
            "WHERE alert_id IN (SELECT alert_id FROM alert_history "
            "WHERE " + ingested_by("changed_at") + ") ORDER BY alert_id",
            [as_of],
        ).df()
    return alerts, hist


def fetch_quarantine(config: Config, batch_ids: list[int], as_of: str) -> pd.DataFrame:
    """Quarantined rows of the given batches, counted per (kind, reason)."""
    store = Store(config)
    with store.reader() as con:
        return con.execute(
            "SELECT kind, reason, count(*) AS n FROM quarantine "
            "WHERE quarantined_at <= ?::TIMESTAMPTZ AND list_contains(?, batch_id) "
            "GROUP BY kind, reason ORDER BY kind, reason",
            [as_of, batch_ids],
        ).df()


def fetch_decision_rows(config: Config, maker: str, first: date, last: date, as_of: str) -> Table:
    """One decision-maker's raw rows for the quarter (only on request: privacy)."""
    from monitor.audit.formats import make_table

    cues = list(config.cues)
    cols = [("decision_id", "str"), ("decided_at", "str"), ("decision_maker", "str")]
    cols += [("team", "str"), ("judgment", "float")]
    cols += [(c, "str" if config.cues[c].type == "categorical" else "float") for c in cues]
    cols += [("criterion", "float"), ("observed_at", "str")]
    sql = (
        f"WITH o AS ({_outcomes_as_of_sql()}) SELECT d.decision_id, "
        "strftime(timezone('UTC', d.decided_at), '%Y-%m-%dT%H:%M:%S+00:00'), d.decision_maker, "
        "d.team, d.judgment, " + "".join(f"d.{quote_ident(c)}, " for c in cues) + "o.criterion, "
        "strftime(timezone('UTC', o.observed_at), '%Y-%m-%dT%H:%M:%S+00:00') "
        f"FROM ({decisions_known_at_sql()}) d LEFT JOIN o ON o.decision_id = d.decision_id "
        "WHERE d.decision_maker = ? AND d.decided_day BETWEEN ? AND ? "
        "AND " + ingested_by("d.ingested_at") + " ORDER BY d.decision_id"
    )
    store = Store(config)
    with store.reader() as con:
        rows = con.execute(sql, [as_of, as_of, as_of, as_of, maker, first, last, as_of]).fetchall()
    if not rows:
        raise ExportUsageError(
            f"--include-rows {maker}: no decisions by that decision-maker in the quarter."
        )
    return make_table("decision_rows", f"Decision rows of {maker}", cols, rows)


# --- fingerprint and manifest -----------------------------------------------------------


def fingerprint(rows: QuarterRows, history: pd.DataFrame) -> dict:
    """sha256 over exactly the keys used: decisions (decision_id, batch_id), outcomes
    (decision_id, batch_id, source_line), the batch ids and the alert-history rows."""
    f = rows.frame
    linked = f[f["o_batch"].notna()]
    batches = sorted({int(b) for b in f["batch_id"]} | {int(b) for b in linked["o_batch"]})
    lines = [f"d\t{d}\t{int(b)}" for d, b in zip(f["decision_id"], f["batch_id"], strict=True)]
    lines += [
        f"o\t{d}\t{int(b)}\t{'' if pd.isna(n) else int(n)}"
        for d, b, n in zip(linked["decision_id"], linked["o_batch"], linked["o_line"], strict=True)
    ]
    lines += [f"b\t{b}" for b in batches]
    lines += [
        f"a\t{int(a)}\t{pd.Timestamp(at).isoformat()}\t{to}"
        for a, at, to in zip(
            history["alert_id"], history["changed_at"], history["to_state"], strict=True
        )
    ]
    h = hashlib.sha256(("\n".join(lines) + "\n").encode())
    return {
        "sha256": h.hexdigest(),
        "decisions": int(len(f)),
        "outcomes": int(len(linked)),
        "batches": batches,
        "alert_history_rows": int(len(history)),
    }


def _sha256_file(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --- the entry point --------------------------------------------------------------------


def _check_formats(formats: list[str]) -> list[str]:
    wanted = [f.strip().lower() for f in formats if f.strip()]
    unknown = [f for f in wanted if f not in FORMATS]
    if unknown or not wanted:
        raise ExportUsageError(
            f"--format takes a comma-separated list of {', '.join(FORMATS)}; "
            f"got {', '.join(unknown) or 'nothing'}."
        )
    return sorted(set(wanted), key=FORMATS.index)


@dataclass(frozen=True)
class Snapshot:
    """The quarter's tables as of one instant, and the rows behind them."""

    as_of: str
    rows: QuarterRows
    tables: list[Table]
    fingerprint: dict


def snapshot(config: Config, quarter: str, as_of: str) -> Snapshot:
    """Every contract table of ``quarter`` computed from rows ingested by ``as_of``."""
    label, first, last = parse_quarter(quarter)
    look_back = first - timedelta(days=config.windows.length_days - 1)
    rows = fetch_rows(config, look_back, last, first, as_of)
    if not rows.in_quarter.any():
        raise ExportUsageError(
            f"no usable decisions of {label} were ingested by {as_of}: nothing to export."
        )
    alerts, history = fetch_alerts(config, as_of)
    fp = fingerprint(rows, history)
    quarantine = fetch_quarantine(config, fp["batches"], as_of)
    tables = quarter_tables(config, rows, (first, last))
    tables[3:3] = [
        alerts_table(alerts, history, (first, last), config.decisions.timezone),
        coverage_table(rows, quarantine),
    ]
    tables.append(history_table(history))
    tables.append(window_findings_table(fetch_window_findings(config, first, last, as_of)))
    return Snapshot(as_of, rows, tables, fp)


def export(
    config: Config,
    *,
    quarter: str,
    out_dir: Path,
    as_of: str | None = None,
    formats: list[str] | None = None,
    include_rows: list[str] | None = None,
    compare: tuple[str, str] | None = None,
) -> dict:
    """Write the quarter's audit tables to ``out_dir`` and return a JSON-able account.

    Returns {"summary": text, "files": [paths], "manifest": dict, "warnings": [...]}.
    With ``compare`` = (T1, T2) the pack holds the restatements between the two as-of
    times instead of the tables.  User errors raise ExportUsageError.
    """
    label, first, last = parse_quarter(quarter)
    fmts = _check_formats(formats or list(FORMATS))
    tz = config.decisions.timezone
    if compare is not None and (as_of is not None or include_rows):
        raise ExportUsageError("--compare-as-of takes neither --as-of nor --include-rows.")
    created = utc_now()
    warnings: list[str] = []
    if compare is not None:
        (t1, _), (t2, _) = parse_as_of(compare[0], tz), parse_as_of(compare[1], tz)
        if t2 < t1:
            raise ExportUsageError("--compare-as-of T1 T2 needs T1 at or before T2.")
        early = unfinished_warning(label, last, t2, tz, "either as-of time") or (
            unfinished_warning(label, last, t1, tz, "the first as-of time")
        )
        if early:
            warnings.append(early)
        before, after = snapshot(config, label, iso(t1)), snapshot(config, label, iso(t2))
        tables = [restatement_table(before, after)]
        as_of_text, defaulted = iso(t2), False
        fp = {"before": before.fingerprint, "after": after.fingerprint}
    else:
        t, defaulted = parse_as_of(as_of, tz)
        as_of_text = iso(t)
        early = unfinished_warning(label, last, t, tz)
        if early:
            warnings.append(early)
        snap = snapshot(config, label, as_of_text)
        tables, fp = list(snap.tables), snap.fingerprint
        for maker in include_rows or []:
            tables.append(fetch_decision_rows(config, maker, first, last, as_of_text))
        if include_rows:
            warnings.append(
                "This pack contains row-level decision data for "
                f"{', '.join(include_rows)}: personal data, handle under your data-protection rules."
            )
    out_dir = Path(out_dir)
    # A folder that holds other files is refused before anything is written; errors
    # about the quarter's data (nothing to export) come first, they say more.
    earlier_pack(out_dir)
    complete = datetime.fromisoformat(as_of_text) >= quarter_end(last, tz)
    manifest = {
        "quarter": label,
        "quarter_start": first.isoformat(),
        "quarter_end": last.isoformat(),
        "as_of": as_of_text,
        "as_of_defaulted_to_now": defaulted,
        "quarter_over_at_as_of": complete,
        "compare_as_of": [iso(parse_as_of(c, tz)[0]) for c in compare] if compare else None,
        "config_digest": config.digest,
        "config_path": str(config.source) if config.source else None,
        # Every policy and window setting under its own key, and the control limits the
        # alert rule derived from them.
        "policy": config.policy.model_dump(mode="json"),
        "windows": config.windows.model_dump(mode="json"),
        "control_limits": _control_limits(config),
        "store_fingerprint": fp,
        "software": {"name": "cuewatch", "version": __version__},
        "created_at": iso(created),
        "include_rows": list(include_rows or []),
        "warnings": warnings,
        "methodology": "methodology.txt",
        "tables": {},
    }
    method = methodology_text(
        config, label, as_of_text, compare=compare is not None, warnings=warnings
    )
    stage = staging_folder(out_dir)
    try:
        files = _write_all(tables, fmts, stage, label, manifest, method, created)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    files = publish(stage, files, out_dir)
    summary = _summary(label, as_of_text, tables, out_dir, compare is not None, warnings)
    return {
        "summary": summary,
        "files": [str(p) for p in files],
        "manifest": manifest,
        "warnings": warnings,
    }


def _write_all(tables, fmts, out_dir: Path, label, manifest, method, created) -> list[Path]:
    files: list[Path] = []
    method_path = out_dir / "methodology.txt"
    method_path.write_text(method, encoding="utf-8")
    files.append(method_path)
    for t in tables:
        entry = {"title": t.title, "rows": len(t.rows), "columns": dict(t.columns), "files": {}}
        for fmt, writer in (("csv", write_csv), ("parquet", write_parquet)):
            if fmt in fmts:
                p = writer(t, out_dir / f"{t.name}.{fmt}")
                entry["files"][fmt] = {"path": p.name, "sha256": _sha256_file(p)}
                files.append(p)
        manifest["tables"][t.name] = entry
    cover = [
        (
            "Quarter",
            f"{manifest['quarter']} ({manifest['quarter_start']} to {manifest['quarter_end']})",
        ),
        ("As of", manifest["as_of"]),
        ("Config digest", manifest["config_digest"]),
        ("Store fingerprint", json.dumps(manifest["store_fingerprint"], sort_keys=True)[:2000]),
        ("Software", f"cuewatch {__version__}"),
        ("Created", manifest["created_at"]),
        *(("Warning", w) for w in manifest["warnings"]),
        *(("Sheet", f"{t.name}: {t.title} ({len(t.rows)} rows)") for t in tables),
        ("Methodology", method),
    ]
    if "xlsx" in fmts:
        files.append(write_workbook(tables, out_dir / f"audit_{label}.xlsx", cover, created))
        manifest["workbook"] = files[-1].name
    if "html" in fmts:
        files.append(write_html(tables, out_dir / f"audit_{label}.html", manifest, method, fmts))
        manifest["report"] = files[-1].name
    path = out_dir / "manifest.json"
    path.write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    files.append(path)
    return files


def _summary(label, as_of, tables: list[Table], out_dir, compare: bool, warnings) -> str:
    by = {t.name: t for t in tables}
    if compare:
        n = len(by["restatements"].rows)
        head = f"{label}: {n} figure(s) restated between the two as-of times"
    else:
        dm = by["decision_makers"]
        makers = sum(1 for s in dm.column("scope") if s == "decision_maker")
        total = next(r for r in dm.records() if r["scope"] == "all")
        fc = by["forbidden_cues"]
        direct = sum(1 for f in fc.column("flagged") if f)
        proxy = sum(1 for f in fc.column("proxy_flagged") if f)
        head = (
            f"{label} as of {as_of}: {makers} decision-maker(s), {total['n_decisions']} "
            f"decisions ({total['n_linked']} with outcomes); forbidden cues over the whole "
            f"quarter: {direct} flagged for direct use, {proxy} through proxies; "
            f"{len(by['alerts'].rows)} alert(s)"
        )
    lines = [f"{head}; tables written to {out_dir}."]
    lines += [f"WARNING: {w}" for w in warnings]
    return "\n".join(lines)


def _control_limits(config: Config) -> dict:
    """The calibrated limits of the weekly looks (empty under the per-window FDR rule)."""
    from dataclasses import asdict

    limits = {
        "forbidden_cue": forbidden_cue_limit(config.policy, config.windows),
        "drift": drift_limit(config.policy, config.windows),
    }
    return {name: asdict(limit) for name, limit in limits.items() if limit is not None}
