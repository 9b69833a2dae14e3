"""The per-record checks of ingest, written as set-based SQL built from the configuration.

Every reason code a record can be quarantined with is listed in ``REASONS``; the
first failing check (in the order of that list) names the reason.  All identifiers
and literals that come from the configuration go through the store's quoting.  What
happens to the checked records next (duplicates, the writes) is in monitor.ingest.writes.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from monitor.config import Config, CueConfig
from monitor.errors import UserError
from monitor.store.rules import quote_ident as qi
from monitor.store.rules import sql_literal as lit

KINDS = ("decisions", "outcomes")

REASONS = {
    "malformed_record": "the record could not be read (CSV line split wrongly, or not a JSON object)",
    "missing_field": "a required field is empty or absent",
    "unparseable_timestamp": "a timestamp could not be read",
    "implausible_timestamp": "a timestamp lies in the future beyond the tolerance or before the earliest date",
    "judgment_not_numeric": "the judgment is not a number",
    "judgment_not_in_map": "the judgment is not one of the configured judgment_values",
    "judgment_out_of_range": "the judgment lies outside judgment_range",
    "criterion_not_numeric": "the criterion is not a number",
    "criterion_not_in_map": "the criterion is not one of the configured criterion_values",
    "criterion_out_of_range": "the criterion lies outside criterion_range",
    "cue_not_numeric": "a numeric cue is not a number",
    "cue_out_of_range": "a numeric cue lies outside its configured range",
    "implausible_magnitude": "a numeric cue, judgment or criterion without a range of its own is larger in magnitude than [ingest] max_magnitude",
    "binary_not_in_map": "a binary cue value is not in its values map (or not 0/1)",
    "undeclared_level": "a categorical cue value is not one of its declared levels",
    "conflicting_duplicate": "the id is already stored (or earlier in the file) with different content",
    "outcome_before_decision": "the outcome is dated before its decision",
    "unknown_change": "the decisions' change column holds neither the correct nor the retract value (nor is empty)",
    "unknown_decision": "a correction or retraction names a decision id that is not stored (or was retracted)",
}


class FileRejected(UserError):
    """The whole file cannot be ingested (missing column, unknown format): a user error."""


@dataclass(frozen=True)
class FileColumn:
    alias: str  # safe staging name
    source: str  # the column / key name in the file
    role: str  # id | change | time | maker | team | value | cue
    required: bool
    cue: str | None = None


def _v(alias: str) -> str:
    """The trimmed text value of a staged column, NULL when empty."""
    return f"NULLIF(trim({alias}), '')"


def _shown(alias: str) -> str:
    return f"coalesce('''' || {alias} || '''', 'empty')"


def _about(c: FileColumn, rest: str) -> str:
    """SQL for the message "<column>='<value>'<rest>".  The column's name and ``rest``
    come from the configuration, so both enter as literals, never as SQL text."""
    return f"{lit(c.source + '=')} || {_shown(c.alias)} || {lit(rest)}"


@dataclass
class Checks:
    """SQL for one kind of file under one configuration."""

    config: Config
    kind: str
    columns: list[FileColumn]
    timezone: str

    # --- file level ---------------------------------------------------------------

    def require_columns(self, present: list[str], label: str) -> None:
        if not present:  # JSON Lines: checked per record
            return
        missing = [c.source for c in self.columns if c.required and c.source not in present]
        if missing:
            raise FileRejected(
                f"{label} has no column {', '.join(repr(m) for m in missing)} "
                f"(the configuration's [{self.kind}] / [cues] name it)"
            )

    def col(self, role: str) -> FileColumn:
        return next(c for c in self.columns if c.role == role)

    # --- parsing ---------------------------------------------------------------------

    # Parsing runs in two layers so no text is trimmed or cast twice: the first gives
    # each column its trimmed text (t_<alias>) or its number (c_<alias>; DuckDB's cast
    # to DOUBLE ignores surrounding whitespace itself), the second the parsed value.

    def _pre_column(self, c: FileColumn) -> tuple[str, str] | None:
        """(name, expression) of column ``c``'s first layer (None: parsed straight
        from the text)."""
        if c.role in ("id", "maker", "team", "change"):
            return f"t_{c.alias}", _v(c.alias)
        if c.role == "value":
            numeric = not self._value_spec()[0]
        elif c.role == "cue":
            cue = self.config.cues[c.cue]
            numeric = cue.type == "numeric" or (cue.type == "binary" and not cue.values)
        else:
            return None
        if numeric:
            return f"c_{c.alias}", f"TRY_CAST({c.alias} AS DOUBLE)"
        return f"t_{c.alias}", _v(c.alias)

    def _value_expr(self, alias: str, values: dict[str, float]) -> str:
        if values:
            whens = " ".join(f"WHEN {lit(k)} THEN {float(v)!r}" for k, v in values.items())
            return f"(CASE t_{alias} {whens} END)"
        return f"(CASE WHEN isfinite(c_{alias}) THEN c_{alias} END)"

    def _cue_expr(self, c: FileColumn, cue: CueConfig) -> str:
        if cue.type == "categorical":
            levels = ", ".join(lit(x) for x in cue.levels)
            return f"(CASE WHEN t_{c.alias} IN ({levels}) THEN t_{c.alias} END)"
        if cue.type == "binary":
            if cue.values:
                return self._value_expr(c.alias, cue.values)
            return f"(CASE WHEN c_{c.alias} IN (0, 1) THEN c_{c.alias} END)"
        return self._value_expr(c.alias, {})

    def _value_checks(
        self, c: FileColumn, values: dict, rng, prefix: str
    ) -> list[tuple[str, str, str]]:
        v = _v(c.alias)
        parsed = f"p_{c.alias}"
        out = [(f"{v} IS NULL", "missing_field", lit(f"{c.source} is empty"))]
        if values:
            keys = ", ".join(values)
            out.append(
                (f"{parsed} IS NULL", f"{prefix}_not_in_map", _about(c, f" is not one of {keys}"))
            )
        else:
            out.append(
                (f"{parsed} IS NULL", f"{prefix}_not_numeric", _about(c, " is not a number"))
            )
        if rng is not None:
            lo, hi = float(rng[0]), float(rng[1])
            out.append(
                (
                    f"{parsed} NOT BETWEEN {lo!r} AND {hi!r}",
                    f"{prefix}_out_of_range",
                    _about(c, f" is outside [{lo:g}, {hi:g}]"),
                )
            )
        elif not values:
            out.append(self._magnitude_check(c))
        return out

    def _magnitude_bound(self) -> float:
        return float(self.config.ingest.max_magnitude)

    def _magnitude_check(self, c: FileColumn) -> tuple[str, str, str]:
        """A number with no range of its own may not exceed [ingest] max_magnitude."""
        bound = self._magnitude_bound()
        return (
            f"abs(p_{c.alias}) > {bound!r}",
            "implausible_magnitude",
            _about(c, f" is larger in magnitude than {bound:g} ([ingest] max_magnitude)"),
        )

    def _unbounded(self, c: FileColumn) -> bool:
        """Whether column ``c`` is a number with no range or map of its own (the
        magnitude check applies)."""
        if c.role == "value":
            values, rng, _ = self._value_spec()
            return not values and rng is None
        if c.role == "cue":
            cue = self.config.cues[c.cue]
            return cue.type == "numeric" and cue.range is None
        return False

    def _cue_checks(self, c: FileColumn, cue: CueConfig) -> list[tuple[str, str, str]]:
        v = _v(c.alias)
        parsed = f"p_{c.alias}"
        out = [(f"{v} IS NULL", "missing_field", lit(f"{c.source} is empty"))]
        if cue.type == "numeric":
            out.append((f"{parsed} IS NULL", "cue_not_numeric", _about(c, " is not a number")))
            if cue.range is not None:
                lo, hi = float(cue.range[0]), float(cue.range[1])
                out.append(
                    (
                        f"{parsed} NOT BETWEEN {lo!r} AND {hi!r}",
                        "cue_out_of_range",
                        _about(c, f" is outside [{lo:g}, {hi:g}]"),
                    )
                )
            else:
                out.append(self._magnitude_check(c))
        elif cue.type == "binary":
            allowed = ", ".join(cue.values) if cue.values else "0, 1"
            out.append(
                (f"{parsed} IS NULL", "binary_not_in_map", _about(c, f" is not one of {allowed}"))
            )
        else:
            allowed = ", ".join(cue.levels)
            out.append(
                (
                    f"{parsed} IS NULL",
                    "undeclared_level",
                    _about(c, f" is not a declared level ({allowed})"),
                )
            )
        return out

    def checked_sql(
        self, reader: str, fmt: str, *, horizon: datetime, earliest: str, shortcut: bool = True
    ) -> str:
        """SELECT over the file reader ``reader`` giving the parsed columns and a reason
        code per record, in file order (so the staged table's rowid is the record's
        ordinal).  Only a record that fails a check gets its message and its raw form
        (``raw_record``, JSON text): an accepted record needs its parsed values only,
        which keeps the staging table narrow.  ``shortcut`` False leaves out the
        one-test pass for the common case (the tests compare the two)."""
        parsed, checks = self._parse_and_checks(horizon, earliest)
        # Almost every record passes: one cheap test on the parsed values settles
        # those, and only the others go through the checks in order for their reason.
        reason = "CASE " + " ".join(f"WHEN {w} THEN '{r}'" for w, r, _ in checks) + " END"
        if shortcut:
            reason = f"CASE WHEN {' AND '.join(self._passes(horizon, earliest))} THEN NULL ELSE {reason} END"
        pre = [nc for nc in map(self._pre_column, self.columns) if nc is not None]
        working = ", ".join(name for name, _ in pre)
        aliases = ", ".join(c.alias for c in self.columns)
        return (
            f"WITH pre AS (SELECT *, {', '.join(f'{e} AS {n}' for n, e in pre)} FROM ({reader})), "
            f"parsed AS (SELECT *, {', '.join(parsed)} FROM pre), "
            f"checked AS (SELECT parsed.*, {reason} AS reason FROM parsed) "
            f"SELECT is_blank, "
            f"checked.* EXCLUDE (is_blank, is_malformed, raw_line, reason, {aliases}, {working}), "
            f"reason, CASE WHEN reason IS NOT NULL THEN {self._message_expr()} END AS message, "
            f"CASE WHEN reason IS NOT NULL THEN {self._raw_record_expr(fmt)} END AS raw_record, "
            f"false AS is_duplicate "
            f"FROM checked"
        )

    def _passes(self, horizon: datetime, earliest: str) -> list[str]:
        """Conditions that all hold exactly when none of the checks of
        ``_parse_and_checks`` fires: a parsed value is NULL whenever its text is
        empty, so testing the parsed values (and ranges) is enough."""
        out = ["NOT is_malformed"]
        always = 1  # the leading conditions a retraction must meet too
        for c in self.columns:
            p = f"p_{c.alias}"
            if c.role == "change":
                out.append(f"({p} IS NULL OR {p} IN {self._change_values()})")
                always = len(out)
                continue
            if c.role in ("id", "maker", "team"):
                if c.required:
                    out.append(f"{p} IS NOT NULL")
                    if c.role == "id":
                        always = len(out)
            elif c.role == "time":
                out.append(
                    f"{p} IS NOT NULL AND {p} <= {lit(horizon.isoformat())}::TIMESTAMPTZ "
                    f"AND {p} >= {lit(earliest)}::TIMESTAMPTZ"
                )
            else:
                out.append(f"{p} IS NOT NULL")
                if c.role == "value":
                    rng = self._value_spec()[1]
                else:
                    cue = self.config.cues[c.cue]
                    rng = cue.range if cue.type == "numeric" else None
                if rng is not None:
                    out.append(f"{p} BETWEEN {float(rng[0])!r} AND {float(rng[1])!r}")
                elif self._unbounded(c):
                    out.append(f"abs({p}) <= {self._magnitude_bound()!r}")
        retracting = self.retracting_sql()
        if retracting is None:
            return out
        # A retraction needs its id (and a known change value) only.
        return out[:always] + [f"(({x}) OR {retracting})" for x in out[always:]]

    # --- corrections and retractions (the optional change column) -----------------------

    def change_column(self) -> FileColumn | None:
        return next((c for c in self.columns if c.role == "change"), None)

    def _change_values(self) -> str:
        d = self.config.decisions
        return f"({lit(d.correct_value)}, {lit(d.retract_value)})"

    def retracting_sql(self, prefix: str = "") -> str | None:
        """SQL: the staged record (``prefix`` its table alias and dot) retracts its
        decision; None when the configuration has no change column."""
        c = self.change_column()
        if c is None:
            return None
        return (
            f"({prefix}p_{c.alias} IS NOT DISTINCT FROM {lit(self.config.decisions.retract_value)})"
        )

    def correcting_sql(self, prefix: str = "") -> str | None:
        """SQL: the staged record corrects its decision; None without a change column."""
        c = self.change_column()
        if c is None:
            return None
        return (
            f"({prefix}p_{c.alias} IS NOT DISTINCT FROM {lit(self.config.decisions.correct_value)})"
        )

    def _parse_and_checks(
        self, horizon: datetime | None, earliest: str
    ) -> tuple[list[str], list[tuple[str, str, str]]]:
        """The parsing expressions and the ordered (condition, reason, message) checks.
        ``horizon`` None: the future check's condition is left out (message use only)."""
        parsed: list[str] = []
        checks: list[tuple[str, str, str]] = [
            (
                "is_malformed",
                "malformed_record",
                "'not a JSON object: ' || left(coalesce(raw_line, ''), 200)",
            ),
        ]
        first_field = len(checks)
        for c in self.columns:
            v = _v(c.alias)
            if c.role == "change":
                d = self.config.decisions
                parsed.append(f"t_{c.alias} AS p_{c.alias}")
                checks.append(
                    (
                        f"p_{c.alias} IS NOT NULL AND p_{c.alias} NOT IN {self._change_values()}",
                        "unknown_change",
                        _about(c, f" is neither {d.correct_value}, {d.retract_value} nor empty"),
                    )
                )
                first_field = len(checks)
            elif c.role in ("id", "maker", "team"):
                parsed.append(f"t_{c.alias} AS p_{c.alias}")
                if c.required:
                    checks.append((f"{v} IS NULL", "missing_field", lit(f"{c.source} is empty")))
                    if c.role == "id":
                        first_field = len(checks)
            elif c.role == "time":
                parsed.append(f"TRY_CAST({v} AS TIMESTAMPTZ) AS p_{c.alias}")
                checks.append((f"{v} IS NULL", "missing_field", lit(f"{c.source} is empty")))
                checks.append(
                    (
                        f"p_{c.alias} IS NULL",
                        "unparseable_timestamp",
                        _about(c, " is not a timestamp"),
                    )
                )
                checks.append(
                    (
                        "true"
                        if horizon is None
                        else f"p_{c.alias} > {lit(horizon.isoformat())}::TIMESTAMPTZ "
                        f"OR p_{c.alias} < {lit(earliest)}::TIMESTAMPTZ",
                        "implausible_timestamp",
                        _about(c, f" is in the future or before {earliest}"),
                    )
                )
            elif c.role == "value":
                values, rng, prefix = self._value_spec()
                parsed.append(f"{self._value_expr(c.alias, values)} AS p_{c.alias}")
                checks.extend(self._value_checks(c, values, rng, prefix))
            elif c.role == "cue":
                cue = self.config.cues[c.cue]
                parsed.append(f"{self._cue_expr(c, cue)} AS p_{c.alias}")
                checks.extend(self._cue_checks(c, cue))
        retracting = self.retracting_sql()
        if retracting is not None:
            # A retraction needs its id and a known change value only: every later
            # check leaves it alone.
            checks[first_field:] = [
                (f"({w}) AND NOT {retracting}", r, m) for w, r, m in checks[first_field:]
            ]
        return parsed, checks

    def _value_spec(self):
        if self.kind == "decisions":
            d = self.config.decisions
            return d.judgment_values, d.judgment_range, "judgment"
        o = self.config.outcomes
        return o.criterion_values, o.criterion_range, "criterion"

    def set_line_numbers(self, fmt: str, csv_rejects: bool) -> None:
        """Fix how a staged record's line number follows from its ordinal (rowid)."""
        self.line_format = fmt
        self.line_rejects = csv_rejects

    def line_expr(self, ordinal: str) -> str:
        """SQL for the source line of the staged record whose 0-based ordinal is
        ``ordinal`` (e.g. ``c.rowid``)."""
        fmt = getattr(self, "line_format", "csv")
        if fmt == "parquet":
            return f"({ordinal} + 1)"
        first = 1 if fmt == "jsonl" else 2  # the line of record 0 (a CSV header is line 1)
        if not getattr(self, "line_rejects", True):  # the common case: no join per file
            return f"({ordinal} + {first})"
        # Lines the reader rejected (CSV lines it could not split, lines of either
        # format that do not decode) shift later records.
        return (
            f"({ordinal} + {first} + (SELECT count(*) FROM (SELECT line - row_number() OVER (ORDER BY line) AS t "
            f"FROM (SELECT DISTINCT line FROM _rejects)) WHERE t <= {ordinal} + {first - 1}))"
        )

    # --- messages ----------------------------------------------------------------------

    def _message_expr(self) -> str:
        """The one-line message of a record that failed a check, from its reason and
        values (staging evaluates it for those records only)."""
        _, checks = self._parse_and_checks(None, self.config.ingest.earliest)
        counts: dict[str, int] = {}
        for _, r, _ in checks:
            counts[r] = counts.get(r, 0) + 1
        whens = " ".join(
            f"WHEN reason = '{r}' THEN {m}"
            if counts[r] == 1
            else f"WHEN reason = '{r}' AND {w} THEN {m}"
            for w, r, m in checks
        )
        return f"coalesce(CASE {whens} END, reason)"

    # --- the record as quarantine keeps it -----------------------------------------------

    def _raw_record_expr(self, fmt: str) -> str:
        """SQL: a failing record as JSON text, as it was read.  A JSON Lines record is
        its own line; a line that is not a JSON object becomes a JSON string, so
        json.loads gives back the exact text."""
        if fmt == "jsonl":
            return (
                "CASE WHEN reason = 'malformed_record' THEN CAST(to_json(raw_line) AS VARCHAR) "
                f"ELSE coalesce(raw_line, {self._record_json(True)}) END"
            )
        return self._record_json(True)

    def _record_json(self, raw: bool) -> str:
        pairs = ", ".join(
            f"{lit(c.source)}, "
            + (
                f"coalesce({c.alias}, CAST(p_{c.alias} AS VARCHAR))"
                if raw
                else f"CAST(p_{c.alias} AS VARCHAR)"
            )
            for c in self.columns
        )
        return f"CAST(json_object({pairs}) AS VARCHAR)"

    def quarantined_record_expr(self) -> str:
        """SQL over the staging table: the quarantined record as JSON text.  A record
        found to conflict only after staging (a duplicate id with other content) kept
        no raw form: its parsed values stand in for it."""
        return f"coalesce(raw_record, {self._record_json(False)})"


def build_checks(config: Config, kind: str) -> Checks:
    cols: list[FileColumn] = []
    if kind == "decisions":
        d = config.decisions
        cols.append(FileColumn("f_id", d.id, "id", True))
        if d.change:
            cols.append(FileColumn("f_change", d.change, "change", False))
        cols += [
            FileColumn("f_time", d.decided_at, "time", True),
            FileColumn("f_maker", d.decision_maker, "maker", True),
        ]
        if d.team:
            cols.append(FileColumn("f_team", d.team, "team", False))
        cols.append(FileColumn("f_value", d.judgment, "value", True))
        for i, name in enumerate(config.cues):
            cols.append(FileColumn(f"f_cue{i}", config.cue_column(name), "cue", True, cue=name))
        tz = d.timezone
    elif kind == "outcomes":
        o = config.outcomes
        if o is None:
            raise FileRejected("the configuration has no [outcomes] section")
        cols += [
            FileColumn("f_id", o.id, "id", True),
            FileColumn("f_time", o.observed_at, "time", True),
            FileColumn("f_value", o.criterion, "value", True),
        ]
        tz = o.timezone or config.decisions.timezone
    else:
        raise FileRejected(f"unknown kind {kind!r}")
    return Checks(config, kind, cols, tz)


# JSON Lines are read one line a record with DuckDB's CSV reader and a delimiter that
# never occurs in text (four control characters in a row), so no line is ever split.
_LINE_DELIM = "\x1f\x1e\x1d\x1c"


def reader_sql(
    config: Config, path: Path, fmt: str, columns: list[FileColumn], present: list[str]
) -> str:
    """SELECT staging the needed columns as text, plus is_blank / is_malformed / raw_line.
    Lines the reader cannot take (wrong field count, bytes that do not decode, too long)
    go to the reject table ``_reject_errors``."""
    p = lit(literal_path(path))
    rejects = (
        "store_rejects = true, rejects_table = '_reject_errors', rejects_scan = '_reject_scans'"
    )
    if fmt == "jsonl":
        keys = ", ".join(
            f"json_extract_string(obj, {lit('$.' + _json_key(c.source))}) AS {c.alias}"
            for c in columns
        )
        return (
            # json_type() raises on text that is not JSON, and AND does not short-circuit
            # in a vectorised engine, so it is only reached through a CASE on json_valid().
            f"SELECT {keys}, is_blank, NOT is_blank AND NOT is_object AS is_malformed, raw_line FROM ("
            f"  SELECT *, CASE WHEN is_object THEN raw_line END AS obj FROM ("
            f"    SELECT line AS raw_line, (line IS NULL OR trim(line, ' \t\r\n\f\v') = '') AS is_blank,"
            f"      coalesce(CASE WHEN json_valid(line) THEN json_type(line) = 'OBJECT' END, false)"
            f"        AS is_object"
            f"    FROM read_csv({p}, columns = {{'line': 'VARCHAR'}}, header = false, delim = '{_LINE_DELIM}',"
            f"      quote = '', escape = '', auto_detect = false, {rejects})))"
        )
    sel = []
    for c in columns:
        if present and c.source not in present:
            sel.append(f"NULL::VARCHAR AS {c.alias}")
        elif fmt == "parquet":
            sel.append(f"CAST({qi(c.source)} AS VARCHAR) AS {c.alias}")
        else:
            sel.append(f"{qi(c.source)} AS {c.alias}")
    flags = "false AS is_blank, false AS is_malformed, NULL::VARCHAR AS raw_line"
    if fmt == "parquet":
        return f"SELECT {', '.join(sel)}, {flags} FROM read_parquet({p})"
    # Every header column is declared as text so no sniffing is needed; lines with
    # the wrong number of fields go to the reject table (and then to quarantine).
    declared = ", ".join(f"{lit(name)}: 'VARCHAR'" for name in present)
    return (
        f"SELECT {', '.join(sel)}, {flags} FROM read_csv({p}, header = true, auto_detect = false, "
        f"columns = {{{declared}}}, delim = {lit(config.ingest.delimiter)}, quote = '\"', "
        f"escape = '\"', encoding = {lit(config.ingest.encoding)}, {rejects})"
    )


def literal_path(path: Path) -> str:
    """``path`` as DuckDB's file readers take it literally.  They expand '*', '?' and
    '[...]' as a file pattern (a file named 'a*.csv' read every 'a....csv' beside it);
    each of those characters is escaped as a one-character class ('[*]'), which DuckDB
    matches to that character only.  Other paths are returned unchanged, so reading a
    file with an ordinary name costs nothing extra."""
    text = str(path)
    if not any(ch in text for ch in "*?["):
        return text
    return "".join(f"[{ch}]" if ch in "*?[" else ch for ch in text)


def _json_key(name: str) -> str:
    return '"' + name.replace("\\", "\\\\").replace('"', '\\"') + '"'
