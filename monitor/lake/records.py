"""The lake's decision and outcome rows checked in Spark: the record checks of ingest
(``monitor.ingest.checks``: the same reasons, in the same order, with the same kind of
message), the duplicate rules, and which rows count.

Every row is checked against the clock of the run that first read it (``lake_runs``:
each run's watermark range and horizon), so a row's fate never changes on a later run
and an incremental run sums exactly the rows a full one does.  What counts:

* decisions: the first valid row of each id in watermark order (ties: the row whose
  values hash lower) is the decision; a later valid row with the same parsed values is
  a duplicate, one with other values is quarantined as ``conflicting_duplicate`` - the
  rule a file's rows follow;
* outcomes: a valid row identical (id, observed_at, criterion) to an earlier one is a
  duplicate; a row dated before its decision, when that decision was read in an
  earlier run or earlier in the same run, is quarantined as ``outcome_before_decision``;
  of the rest, the latest in watermark order is the decision's current outcome.

Values may be typed (numbers, timestamps) or text: text is trimmed and parsed as
ingest parses it; timestamps without an offset are read in ``[decisions] timezone``
(the Spark session's time zone, set by ``monitor.lake.session``).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from monitor.config import Config
from monitor.errors import UserError

# Decision ids, people and teams as text; numbers and times parsed.
_TEXT_ROLES = ("id", "maker", "team")


class LakeUnreadable(UserError):
    """A lake dataset cannot be used as configured (missing, a missing column)."""


@dataclass(frozen=True)
class Column:
    source: str  # the column in the lake
    role: str  # id | time | maker | team | value | cue
    required: bool
    cue: str | None = None


def columns(config: Config, kind: str) -> list[Column]:
    """The columns a kind's rows must carry, in ingest's check order."""
    if kind == "decisions":
        d = config.decisions
        cols = [Column(d.id, "id", True), Column(d.decided_at, "time", True)]
        cols.append(Column(d.decision_maker, "maker", True))
        if d.team:
            cols.append(Column(d.team, "team", False))
        cols.append(Column(d.judgment, "value", True))
        cols += [Column(config.cue_column(n), "cue", True, cue=n) for n in config.cues]
        return cols
    o = config.outcomes
    return [Column(o.id, "id", True), Column(o.observed_at, "time", True),
            Column(o.criterion, "value", True)]  # fmt: skip


def _F():
    from pyspark.sql import functions as F

    return F


def _text(col):
    F = _F()
    return F.nullif(F.trim(col.cast("string")), F.lit(""))


def _is_numeric(dtype) -> bool:
    from pyspark.sql import types as T

    return isinstance(dtype, T.NumericType)


def _number(col, dtype):
    """A finite double from a typed number or from text (NULL when it is not one)."""
    F = _F()
    x = col.cast("double") if _is_numeric(dtype) else _text(col).try_cast("double")
    return F.when(~F.isnan(x) & (F.abs(x) != F.lit(float("inf"))), x)


def _timestamp(col, dtype):
    from pyspark.sql import types as T

    if isinstance(dtype, T.TimestampType | T.DateType | T.TimestampNTZType):
        return col.cast("timestamp")
    return _text(col).try_cast("timestamp")


def _about(source: str, text, rest: str):
    """The message "<column>='<value>'<rest>" (ingest's wording)."""
    F = _F()
    shown = F.coalesce(F.concat(F.lit("'"), text, F.lit("'")), F.lit("empty"))
    return F.concat(F.lit(source + "="), shown, F.lit(rest))


def _mapped(text, values: dict[str, float]):
    F = _F()
    out = None
    for key, value in values.items():
        cond = text == F.lit(key)
        out = (
            F.when(cond, F.lit(float(value)))
            if out is None
            else out.when(cond, F.lit(float(value)))
        )
    return out


def check(config: Config, kind: str, frame, *, earliest: str):
    """``frame`` (the lake rows with ``_wm``, their watermark key, and ``_horizon``,
    their run's clock plus the tolerance) with the parsed columns ``p_<i>`` (in
    ``columns`` order), ``reason`` and ``message`` (NULL when the row passes).

    Three projections, as ingest's SQL has layers: each column's trimmed text
    (``t_<i>``), its parsed value (``p_<i>``), then the checks on those; Spark keeps
    them apart (an expression used twice is not copied into the next layer), so no
    text is parsed twice and the generated code stays small."""
    F = _F()
    cols = columns(config, kind)
    dtypes = {f.name: f.dataType for f in frame.schema.fields}
    missing = [c.source for c in cols if c.required and c.source not in dtypes]
    if missing:
        raise LakeUnreadable(
            f"the lake's {kind} have no column {', '.join(repr(m) for m in missing)} "
            f"(the configuration's [{kind}] / [cues] name it)"
        )
    present = [(i, c) for i, c in enumerate(cols) if c.source in dtypes]
    texts = [_text(F.col(f"`{c.source.replace('`', '``')}`")).alias(f"t_{i}") for i, c in present]
    layer = frame.select("*", *texts)
    parsed, checks = [], []
    floor = F.lit(earliest).cast("timestamp")
    for i, c in enumerate(cols):
        if c.source not in dtypes:  # an optional column (team) the lake does not carry
            parsed.append(F.lit(None).cast("string").alias(f"p_{i}"))
            continue
        raw = F.col(f"`{c.source.replace('`', '``')}`")
        dtype = dtypes[c.source]
        text = F.col(f"t_{i}")
        p = F.col(f"p_{i}")
        empty = (text.isNull(), "missing_field", F.lit(f"{c.source} is empty"))
        if c.role in _TEXT_ROLES:
            parsed.append(text.alias(f"p_{i}"))
            if c.required:
                checks.append(empty)
            continue
        if c.role == "time":
            from pyspark.sql import types as T

            typed = isinstance(dtype, T.TimestampType | T.DateType | T.TimestampNTZType)
            parsed.append(
                (raw.cast("timestamp") if typed else text.try_cast("timestamp")).alias(f"p_{i}")
            )
            checks += [
                empty,
                (p.isNull(), "unparseable_timestamp", _about(c.source, text, " is not a timestamp")),
                ((p > F.col("_horizon")) | (p < floor), "implausible_timestamp",
                 _about(c.source, text, f" is in the future or before {earliest}")),
            ]  # fmt: skip
            continue
        if c.role == "value":
            if kind == "decisions":
                d = config.decisions
                values, rng, prefix = d.judgment_values, d.judgment_range, "judgment"
            else:
                o = config.outcomes
                values, rng, prefix = o.criterion_values, o.criterion_range, "criterion"
            kind_of = "numeric"
        else:
            cue = config.cues[c.cue]
            values, rng, prefix = cue.values, cue.range, "cue"
            kind_of = cue.type
        checks.append(empty)
        if kind_of == "categorical":
            cue = config.cues[c.cue]
            parsed.append(F.when(text.isin(*cue.levels), text).alias(f"p_{i}"))
            allowed = ", ".join(cue.levels)
            checks.append((p.isNull(), "undeclared_level",
                           _about(c.source, text, f" is not a declared level ({allowed})")))  # fmt: skip
            continue
        if values:
            value = _mapped(text, values)
        else:
            x = raw.cast("double") if _is_numeric(dtype) else text.try_cast("double")
            value = F.when(~F.isnan(x) & (F.abs(x) != F.lit(float("inf"))), x)
            if kind_of == "binary":
                value = F.when(value.isin(0.0, 1.0), value)
        parsed.append(value.alias(f"p_{i}"))
        if kind_of == "binary":
            allowed = ", ".join(values) if values else "0, 1"
            checks.append((p.isNull(), "binary_not_in_map",
                           _about(c.source, text, f" is not one of {allowed}")))  # fmt: skip
            continue
        if values:
            checks.append((p.isNull(), f"{prefix}_not_in_map",
                           _about(c.source, text, f" is not one of {', '.join(values)}")))  # fmt: skip
        else:
            checks.append((p.isNull(), f"{prefix}_not_numeric",
                           _about(c.source, text, " is not a number")))  # fmt: skip
        if rng is not None:
            lo, hi = float(rng[0]), float(rng[1])
            checks.append((~p.between(lo, hi), f"{prefix}_out_of_range",
                           _about(c.source, text, f" is outside [{lo:g}, {hi:g}]")))  # fmt: skip
        elif not values:
            bound = float(config.ingest.max_magnitude)
            checks.append((F.abs(p) > F.lit(bound), "implausible_magnitude", _about(
                c.source, text, f" is larger in magnitude than {bound:g} ([ingest] max_magnitude)")))  # fmt: skip
    layer = layer.select("*", *parsed)
    # The reason first (one CASE over the parsed values), the message only for the
    # rows that have one.
    reason = None
    for cond, code, _ in checks:
        cond = F.coalesce(cond, F.lit(False))
        reason = F.when(cond, F.lit(code)) if reason is None else reason.when(cond, F.lit(code))
    layer = layer.select("*", reason.alias("reason"))
    message = None
    for _, code, msg in checks:
        hit = F.col("reason") == F.lit(code)
        # Several checks share a reason (missing_field of each column): the first that
        # fires names the column, as in ingest.
        message = (
            F.when(hit & _first(checks, code, msg), msg)
            if message is None
            else message.when(hit & _first(checks, code, msg), msg)
        )
    texts_out = [f"t_{i}" for i, _ in present]
    checked = layer.select("*", message.alias("message")).drop(*texts_out)
    # Materialised once (in the executors, spilling to disk): the later steps filter on
    # ``reason`` several times, and Spark would otherwise copy the whole CASE into each
    # filter and join (measured: generated code too large to compile, 57 s on the demo).
    return checked.localCheckpoint(eager=True)


def _first(checks, code: str, msg):
    """The condition of the check with reason ``code`` and message ``msg``, and that
    no earlier check of the same reason fired."""
    F = _F()
    out = F.lit(True)
    for cond, c, m in checks:
        if c != code:
            continue
        hit = F.coalesce(cond, F.lit(False))
        if m is msg:
            return out & hit
        out = out & ~hit
    return out


def parsed_names(config: Config, kind: str) -> dict[str, str]:
    """role (or cue name) -> the parsed column ``p_<i>`` of ``check``'s result."""
    out = {}
    for i, c in enumerate(columns(config, kind)):
        out[c.cue or c.role] = f"p_{i}"
    return out


def settle_decisions(config: Config, checked):
    """``checked`` decisions with ``reason`` extended by the duplicate rule and
    ``duplicate`` (a repeat of the decision, counted, not kept).  The accepted rows are
    those with neither."""
    from pyspark.sql import Window

    F = _F()
    names = parsed_names(config, "decisions")
    values = [names[k] for k in names if k != "id"]
    ident = F.xxhash64(*[F.col(v) for v in values])
    ok = checked.filter(F.col("reason").isNull())
    order = Window.partitionBy(names["id"]).orderBy("_wm", ident)
    ranked = ok.select("*", F.row_number().over(order).alias("_rank"))
    first = ranked.filter(F.col("_rank") == 1).select(
        F.col(names["id"]).alias("_fid"), *[F.col(v).alias(f"_f{v}") for v in values]
    )
    later = ranked.filter(F.col("_rank") > 1).join(
        first, F.col(names["id"]) == F.col("_fid"), "left"
    )
    same = None
    for v in values:
        eq = F.col(v).eqNullSafe(F.col(f"_f{v}"))
        same = eq if same is None else same & eq
    conflict_msg = F.concat(
        F.lit("id "), F.col(names["id"]),
        F.lit(" is already stored with different content; the stored record is kept"),
    )  # fmt: skip
    later = later.select(
        *checked.columns[:-2],
        F.when(~same, F.lit("conflicting_duplicate")).alias("reason"),
        F.when(~same, conflict_msg).alias("message"),
    ).withColumn("duplicate", F.col("reason").isNull())
    keep = ranked.filter(F.col("_rank") == 1).drop("_rank").withColumn("duplicate", F.lit(False))
    bad = checked.filter(F.col("reason").isNotNull()).withColumn("duplicate", F.lit(False))
    return keep.unionByName(later).unionByName(bad)


def settle_outcomes(config: Config, checked, decisions):
    """``checked`` outcomes with the duplicate rule, ``outcome_before_decision`` and
    ``current`` (the row that counts for its decision).  ``decisions``: the accepted
    decisions with ``_did``, ``_dat`` (decided_at) and ``_drun`` (the batch that read
    them)."""
    from pyspark.sql import Window

    F = _F()
    n = parsed_names(config, "outcomes")
    idc, tc, vc = n["id"], n["time"], n["value"]
    ok = checked.filter(F.col("reason").isNull())
    tie = F.xxhash64(F.col(tc), F.col(vc))
    same_rows = Window.partitionBy(idc, tc, vc).orderBy("_wm", tie)
    ranked = ok.select("*", F.row_number().over(same_rows).alias("_rank"))
    dup = ranked.filter(F.col("_rank") > 1).drop("_rank").withColumn("duplicate", F.lit(True))
    first = ranked.filter(F.col("_rank") == 1).drop("_rank")
    joined = first.join(decisions, F.col(idc) == F.col("_did"), "left")
    early = (F.col(tc) < F.col("_dat")) & (F.col("_drun") <= F.col("_run"))
    early = F.coalesce(early, F.lit(False))
    msg = F.concat(
        F.lit("outcome observed at "), F.col(tc).cast("string"),
        F.lit(" is before its decision at "), F.col("_dat").cast("string"),
    )  # fmt: skip
    judged = joined.select(
        *checked.columns[:-2],
        F.when(early, F.lit("outcome_before_decision")).alias("reason"),
        F.when(early, msg).alias("message"),
    ).withColumn("duplicate", F.lit(False))
    bad = checked.filter(F.col("reason").isNotNull()).withColumn("duplicate", F.lit(False))
    return judged.unionByName(dup).unionByName(bad)


def current_outcomes(config: Config, settled):
    """(``_oid``, ``_crit``): each decision's current outcome among the settled rows."""
    from pyspark.sql import Window

    F = _F()
    n = parsed_names(config, "outcomes")
    kept = settled.filter(F.col("reason").isNull() & ~F.col("duplicate"))
    tie = F.xxhash64(F.col(n["time"]), F.col(n["value"]))
    latest = Window.partitionBy(n["id"]).orderBy(F.col("_wm").desc(), tie.desc())
    return (
        kept.select(n["id"], n["value"], F.row_number().over(latest).alias("_rank"))
        .filter(F.col("_rank") == 1)
        .select(F.col(n["id"]).alias("_oid"), F.col(n["value"]).alias("_crit"))
    )


def horizon_of(now: datetime, config: Config) -> datetime:
    from datetime import timedelta

    return now + timedelta(hours=config.ingest.future_tolerance_hours)
