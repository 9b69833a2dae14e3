"""The lake path of ``cuewatch refit`` (``[lake]``): Spark reads the decision and
outcome datasets, checks the rows a run has not read yet, writes the rejected ones to a
quarantine dataset beside the input, and sums the bucket statistics; only the buckets
come back, into ``bucket_stats`` / ``bucket_shifts``, and ``refit.windows`` fits the
windows from them as it does for files.

``refit.windows.refit`` drives it, inside its store transaction:

1. ``prepare`` (Spark): the new rows are those whose watermark lies above the last
   run's (``lake_runs``), up to the largest value seen now.  A full refit sums every
   bucket; an incremental one sums again, whole, every bucket a new decision or a new
   outcome touches (marked in ``dirty_buckets``) - the store's own rule for buckets
   something changed - around the stored shifts.  The run's batches (one per kind,
   counts of rows read, accepted, quarantined and duplicate) and its ``lake_runs`` rows
   are written in the same transaction, so a failure anywhere, in Spark or after it,
   leaves the store as it was;
2. ``buckets`` (full) or ``resummed`` (incremental) hand the sums to the window code.

The store holds no lake row.  The few reads that need rows (a window refitted from its
raw rows when its sums lost precision) ask Spark for that window's rows
(``lake_rows_loader``).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pyarrow as pa

from monitor import __version__
from monitor.config import Config
from monitor.errors import UserError
from monitor.lake import records, sums
from monitor.lake.session import spark_session
from monitor.refit.buckets import StatLayout, stored_shifts
from monitor.refit.fits_write import (
    delete_buckets,
    insert_arrow,
    insert_bucket_rows,
    insert_bucket_shifts,
)
from monitor.refit.plan import Buckets, latest_teams
from monitor.store.rules import clock_kind, utc_now

RECORDED_FORMAT = "parquet (spark)"
_MIN = -(1 << 63)


class StoreHoldsRows(UserError):
    """[lake] is configured but the store holds decisions ingested from files."""


def _kinds(config: Config) -> list[str]:
    return ["decisions", "outcomes"] if config.lake.has_outcomes() else ["decisions"]


def location(config: Config, kind: str) -> str:
    lake = config.lake
    path = getattr(lake, kind)
    return path if path is not None else f"table {getattr(lake, kind + '_table')}"


def quarantine_folder(config: Config, kind: str, through: int) -> str:
    """Where a run's rejected rows of ``kind`` go: beside the input by default."""
    lake = config.lake
    base = (
        f"{lake.quarantine.rstrip('/')}/{kind}"
        if lake.quarantine
        else f"{getattr(lake, kind).rstrip('/')}_quarantine"
    )
    return f"{base}/through={through}"


def _read(spark, config: Config, kind: str):
    """The kind's rows with ``_wm``: the watermark as a BIGINT (epoch microseconds for a
    timestamp), rows without one left out."""
    from pyspark.sql import functions as F
    from pyspark.sql import types as T

    lake = config.lake
    try:
        if getattr(lake, kind) is not None:
            frame = spark.read.parquet(getattr(lake, kind))
        else:
            frame = spark.table(getattr(lake, kind + "_table"))
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise records.LakeUnreadable(
            f"the lake's {kind} ({location(config, kind)}) cannot be read: {first}"
        ) from None
    fields = {f.name: f.dataType for f in frame.schema.fields}
    wm = lake.watermark
    if wm not in fields:
        raise records.LakeUnreadable(
            f"the lake's {kind} have no watermark column {wm!r} ([lake] watermark)"
        )
    col = F.col(f"`{wm.replace('`', '``')}`")
    if isinstance(fields[wm], T.TimestampType | T.TimestampNTZType):
        key = F.unix_micros(col.cast("timestamp"))
    elif isinstance(fields[wm], T.IntegralType):
        key = col.cast("long")
    else:
        raise records.LakeUnreadable(
            f"the watermark column {wm!r} of the lake's {kind} must be an integer or a timestamp"
        )
    return frame.withColumn("_wm", key).filter(F.col("_wm").isNotNull())


def _with_runs(spark, frame, runs: list[tuple]):
    """Each row with ``_run`` (the batch that first read it) and ``_horizon`` (that run's
    latest plausible timestamp); rows above the newest range are left out."""
    from pyspark.sql import functions as F

    table = spark.createDataFrame(
        [(int(b), _MIN if a is None else int(a), int(t), int(h)) for b, a, t, h in runs],
        "_run long, _after long, _through long, _hmicros long",
    ).withColumn("_horizon", F.timestamp_micros("_hmicros"))
    cond = (F.col("_wm") > F.col("_after")) & (F.col("_wm") <= F.col("_through"))
    return frame.join(F.broadcast(table), cond, "inner").drop("_after", "_through", "_hmicros")


def _settled(spark, config: Config, frames: dict, cache: bool = False):
    """The record checks and duplicate rules applied to the frames of ``_with_runs``:
    (settled decisions, settled outcomes or None, the accepted decisions, the current
    outcome per decision as (_oid, _crit)).  ``cache``: keep the settled frames (the
    caller counts and writes from them, then unpersists)."""
    from pyspark.sql import functions as F

    earliest = config.ingest.earliest
    settled_d = records.settle_decisions(
        config, records.check(config, "decisions", frames["decisions"], earliest=earliest)
    )
    if cache:
        settled_d = settled_d.cache()
    accepted = settled_d.filter(F.col("reason").isNull() & ~F.col("duplicate"))
    if frames.get("outcomes") is None:
        return settled_d, None, accepted, spark.createDataFrame([], "_oid string, _crit double")
    names = records.parsed_names(config, "decisions")
    dec = accepted.select(
        F.col(names["id"]).alias("_did"), F.col(names["time"]).alias("_dat"),
        F.col("_run").alias("_drun"),
    )  # fmt: skip
    settled_o = records.settle_outcomes(
        config, records.check(config, "outcomes", frames["outcomes"], earliest=earliest), dec
    )
    if cache:
        settled_o = settled_o.cache()
    return settled_d, settled_o, accepted, records.current_outcomes(config, settled_o)


def _micros(ts) -> int:
    return int(ts.timestamp() * 1_000_000)


class LakeSource:
    """One refit's Spark work; see the module docstring."""

    def __init__(self, config: Config):
        self.config = config
        self._full: dict | None = None
        self._resum: dict | None = None
        self._shifts: dict[str, np.ndarray] = {}
        self._dirty: list[tuple[str, int]] = []

    # --- step 1: Spark, inside the store's transaction ---------------------------------

    def prepare(self, con, full: bool) -> bool:
        """Read, check and sum (see the module docstring); returns whether the refit is
        full (always when no run is stored yet)."""
        from pyspark.sql import functions as F

        config = self.config
        if con.execute("SELECT count(*) FROM decisions").fetchall()[0][0]:
            raise StoreHoldsRows(
                "the store holds decisions ingested from files and [lake] is configured: "
                "use a store of its own for the lake."
            )
        spark = spark_session(config)
        started = utc_now()
        horizon = records.horizon_of(started, config)
        stored = {
            k: [
                tuple(r[1:])
                for r in con.execute(
                    "SELECT kind, batch_id, watermark_after, watermark_through, horizon FROM lake_runs "
                    "WHERE kind = ? ORDER BY watermark_through",
                    [k],
                ).fetchall()
            ]  # fmt: skip
            for k in _kinds(config)
        }
        if not any(stored.values()):
            full = True
        frames, new_runs = {}, {}
        for kind in _kinds(config):
            raw = _read(spark, config, kind)
            top = raw.agg(F.max("_wm")).first()[0]
            runs = [(b, a, t, _micros(h)) for b, a, t, h in stored[kind]]
            prev = runs[-1][2] if runs else None
            if top is not None and (prev is None or top > prev):
                batch_id = int(con.execute("SELECT nextval('batch_ids')").fetchall()[0][0])
                new_runs[kind] = (batch_id, prev, int(top))
                runs.append((batch_id, prev, int(top), _micros(horizon)))
            frames[kind] = _with_runs(spark, raw, runs) if runs else None
        if not new_runs and not full:
            return False
        if frames["decisions"] is None:  # an empty lake: nothing to sum
            self._full = None
            return full
        settled_d, settled_o, accepted, current = _settled(spark, config, frames, cache=True)
        names = records.parsed_names(config, "decisions")
        try:
            settled = {"decisions": settled_d, "outcomes": settled_o}
            counts = {k: self._write_quarantine(settled[k], k, new_runs[k]) for k in new_runs}
            layout = StatLayout(len(config.design_columns()))
            rows = sums.design(config, accepted, names)
            crit_ref = 0.0
            if settled_o is not None:
                crit_ref = sums.criterion_reference(
                    settled_o, records.parsed_names(config, "outcomes")["value"]
                )
            if full:
                self._sum_all(spark, rows, current, layout, crit_ref)
            else:
                self._sum_dirty(spark, con, rows, current, settled_o, new_runs, layout, crit_ref)
        finally:
            settled_d.unpersist()
            if settled_o is not None:
                settled_o.unpersist()
        for kind, (batch_id, prev, top) in new_runs.items():
            self._record_run(con, kind, batch_id, prev, top, horizon, started, counts[kind])
        return full

    def _write_quarantine(self, settled, kind: str, run: tuple[int, int | None, int]) -> dict:
        """Write the run's rejected rows beside the input; returns the run's counts."""
        from pyspark.sql import functions as F

        batch_id, _, top = run
        mine = settled.filter(F.col("_run") == batch_id)
        agg = mine.agg(
            F.count(F.lit(1)),
            F.count(F.when(F.col("reason").isNotNull(), 1)),
            F.count(F.when(F.col("duplicate"), 1)),
        ).first()
        read, quarantined, duplicates = (int(v) for v in agg)
        folder = None
        if quarantined:
            folder = quarantine_folder(self.config, kind, top)
            source = [
                c.source for c in records.columns(self.config, kind) if c.source in settled.columns
            ]
            out = mine.filter(F.col("reason").isNotNull()).select(
                *[F.col(f"`{s.replace('`', '``')}`").cast("string").alias(s) for s in source],
                F.col("_wm").alias("watermark_key"), "reason", "message",
                F.lit(batch_id).alias("batch_id"),
            )  # fmt: skip
            out.write.mode("overwrite").parquet(folder)
        return {"read": read, "quarantined": quarantined, "duplicates": duplicates,
                "accepted": read - quarantined - duplicates, "folder": folder}  # fmt: skip

    def _record_run(self, con, kind, batch_id, prev, top, horizon, started, counts) -> None:
        label = (
            f"lake {location(self.config, kind)} {self.config.lake.watermark} in "
            f"({'-inf' if prev is None else prev}, {top}]"
        )
        if counts["folder"]:
            label += f"; quarantine {counts['folder']}"
        con.execute(
            "INSERT INTO batches VALUES "
            "(?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'ingested', NULL, ?, ?, ?)",
            [batch_id, kind, label, hashlib.sha256(label.encode()).hexdigest(), 0,
             RECORDED_FORMAT, counts["read"], counts["accepted"], counts["quarantined"],
             counts["duplicates"], started, utc_now(), self.config.digest, __version__,
             clock_kind()],
        )  # fmt: skip
        con.execute(
            "INSERT INTO lake_runs VALUES (?, ?, ?, ?, ?, ?)",
            [kind, batch_id, prev, top, horizon, counts["folder"]],
        )

    def _sum_all(self, spark, rows, current, layout: StatLayout, crit_ref: float) -> None:
        known = spark.createDataFrame([], "decision_maker string")
        shifts = sums.new_shifts(rows, layout.p_linked, crit_ref, known).toArrow()
        self._shifts = _shift_map(shifts, layout.p_linked)
        every, linked = sums.bucket_sums(
            rows, current, _shift_frame(spark, self._shifts, layout.p_linked), layout
        )
        self._full = sums.collect_sets(every, linked, layout)

    def _sum_dirty(self, spark, con, rows, current, settled_o, new_runs, layout, crit_ref) -> None:
        from pyspark.sql import functions as F

        parts = []
        # Buckets of decisions read by this run, and of decisions whose outcomes were.
        batch_d = new_runs.get("decisions", (None,))[0]
        batch_o = new_runs.get("outcomes", (None,))[0]
        if batch_d is not None:
            parts.append(rows.filter(F.col("_run") == batch_d).select("dm", "day"))
        if batch_o is not None and settled_o is not None:
            oid = records.parsed_names(self.config, "outcomes")["id"]
            touched = (
                settled_o.filter(
                    (F.col("_run") == batch_o) & F.col("reason").isNull() & ~F.col("duplicate")
                )
                .select(F.col(oid).alias("_tid"))
                .distinct()
            )
            parts.append(rows.join(touched, F.col("_did") == F.col("_tid")).select("dm", "day"))
        if not parts:
            self._resum = None
            return
        dirty = parts[0]
        for more in parts[1:]:
            dirty = dirty.unionByName(more)
        dirty = dirty.distinct()
        marked = dirty.toArrow()
        self._dirty = list(
            zip(marked.column("dm").to_pylist(), marked.column("day").to_pylist(), strict=True)
        )
        keys, shift = stored_shifts(con, layout.p_linked)
        known = dict(zip(keys, shift, strict=True))
        dirty_frame = spark.createDataFrame(self._dirty, "dm string, day int")
        mine = rows.join(F.broadcast(dirty_frame), ["dm", "day"])
        known_frame = spark.createDataFrame([(k,) for k in known], "decision_maker string")
        fresh = _shift_map(
            sums.new_shifts(mine, layout.p_linked, crit_ref, known_frame).toArrow(), layout.p_linked
        )
        self._shifts = fresh
        every, linked = sums.bucket_sums(
            mine, current, _shift_frame(spark, {**known, **fresh}, layout.p_linked), layout
        )
        self._resum = sums.collect_sets(every, linked, layout)
        now = utc_now()
        marks = pa.table({
            "decision_maker": pa.array([d for d, _ in self._dirty], pa.string()),
            "day": pa.array([int(x) for _, x in self._dirty], pa.int32()).cast(pa.date32()),
            "marked_at": pa.array([now] * len(self._dirty), pa.timestamp("us", tz="UTC")),
        })  # fmt: skip
        insert_arrow(con, "dirty_buckets", marks)

    # --- step 2: the sums, as the window code takes them ---------------------------------

    def buckets(self, layout: StatLayout) -> Buckets | None:
        """The full refit's buckets, laid out as ``refit.full.sum_buckets`` lays them."""
        got = self._full
        if got is None or not len(got["day"]):
            return None
        keys = np.array(sorted(self._shifts), dtype=object)
        number = {k: i for i, k in enumerate(keys)}
        ent = np.array([number[d] for d in got["dm"]], dtype=np.int64)
        order = np.lexsort((ent, got["day"]))
        ent = ent[order]
        day2, linked2, row_team, pair = _two_rows({k: v[order] for k, v in got.items()}, layout)
        ent2 = np.repeat(ent, 2)
        shift = np.stack([self._shifts[k] for k in keys])
        return Buckets(keys, shift, latest_teams(len(keys), ent2, day2, row_team, _rank(row_team)),
                       ent2, day2, linked2, row_team, pair)  # fmt: skip

    def resummed(self, con, layout: StatLayout, numbered_sql: str):
        """Write the buckets summed again (and the new decision-makers' shifts) to the
        store; returns (an empty delta, their decision-maker numbers, their days) for
        ``refit.windows._refit_incremental``."""
        w = layout.set_width
        empty = {
            "ent": np.zeros(0, np.int64), "day": np.zeros(0, np.int64),
            "linked": np.zeros(0, bool), "team": np.zeros(0, dtype=object),
            "team_code": np.zeros(0, np.int64), "sums": np.zeros((0, w)),
        }  # fmt: skip
        got = self._resum
        if got is None:
            return empty, np.zeros(0, np.int64), np.zeros(0, np.int64)
        if self._shifts:
            keys = sorted(self._shifts)
            insert_bucket_shifts(con, keys, np.stack([self._shifts[k] for k in keys]))
        gone = pa.table({
            "decision_maker": pa.array(list(got["dm"]), pa.string()),
            "day": pa.array(got["day"].astype(np.int32)).cast(pa.date32()),
        })  # fmt: skip
        keys, ent = np.unique(np.asarray(got["dm"], dtype=str), return_inverse=True)
        day2, linked2, team2, sums2 = _two_rows(got, layout)
        con.register("_lake_resummed", gone)
        try:
            delete_buckets(con, "_lake_resummed")
            insert_bucket_rows(con, keys, np.repeat(ent, 2), day2, linked2, team2, sums2)
            again = con.execute(
                "SELECT k.ent, (r.day - DATE '1970-01-01')::BIGINT FROM _lake_resummed r "
                f"JOIN {numbered_sql} k USING (decision_maker)"
            ).fetchnumpy()
        finally:
            con.unregister("_lake_resummed")
        ent, day = (np.asarray(v, dtype=np.int64) for v in again.values())
        return empty, ent, day


def _two_rows(got: dict, layout: StatLayout):
    """``sums.collect_sets``'s buckets as the store's two rows each (all rows, then the
    linked rows): (day, linked_only, team, sums (2 nb, set_width))."""
    nb = len(got["day"])
    team = np.empty(2 * nb, dtype=object)
    team[0::2], team[1::2] = got["team_all"], got["team_linked"]
    return (np.repeat(got["day"], 2), np.tile(np.array([False, True]), nb), team,
            got["sums"].reshape(2 * nb, layout.set_width))  # fmt: skip


def _rank(team: np.ndarray) -> np.ndarray:
    names = sorted({t for t in team if t is not None})
    code = {t: i for i, t in enumerate(names)}
    return np.array([-1 if t is None else code[t] for t in team], dtype=np.int64)


def _shift_map(table: pa.Table, p: int) -> dict[str, np.ndarray]:
    if not table.num_rows:
        return {}
    cols = np.column_stack([table.column(f"c{i}").to_numpy(zero_copy_only=False) for i in range(p)])
    return dict(zip(table.column("dm").to_pylist(), cols.astype(float), strict=True))


def _shift_frame(spark, shifts: dict[str, np.ndarray], p: int):
    schema = "dm string, " + ", ".join(f"c{i} double" for i in range(p))
    return spark.createDataFrame([(k, *map(float, v)) for k, v in shifts.items()], schema)


def lake_rows_loader(con, config: Config):
    """The raw rows of one window from the lake (the QR fallback of ``refit.windows``):
    the accepted decisions of the window's days with their current outcomes, in
    decision id order, as (X, judgment, criterion with NaN for none)."""
    from pyspark.sql import functions as F

    from monitor.refit.plan import ALL_KEY

    spark = spark_session(config)
    length = config.windows.length_days
    cache: dict = {}

    def frames():
        if "rows" in cache:
            return cache["rows"], cache["current"]
        out = {}
        for kind in _kinds(config):
            runs = [(b, a, t, _micros(h)) for b, a, t, h in con.execute(
                "SELECT batch_id, watermark_after, watermark_through, horizon FROM lake_runs "
                "WHERE kind = ? ORDER BY watermark_through", [kind]).fetchall()]  # fmt: skip
            out[kind] = _with_runs(spark, _read(spark, config, kind), runs) if runs else None
        _, _, accepted, current = _settled(spark, config, out)
        names = records.parsed_names(config, "decisions")
        cache["rows"] = sums.design(config, accepted, names).cache()
        cache["current"] = current
        return cache["rows"], current

    def load(scope: str, key: str, end_day: int):
        rows, current = frames()
        lo = end_day - length + 1
        sel = rows.filter((F.col("day") >= lo) & (F.col("day") <= end_day))
        if scope == "decision_maker":
            sel = sel.filter(F.col("dm") == key)
        elif scope == "team":
            sel = sel.filter(F.col("team") == key)
        else:
            assert key == ALL_KEY
        got = sel.join(current, F.col("_did") == F.col("_oid"), "left").orderBy("_did").toPandas()
        k = len(config.design_columns())
        x = got[[f"x{i}" for i in range(k)]].to_numpy(dtype=float).reshape(-1, k)
        y = got[f"x{k}"].to_numpy(dtype=float)
        crit = got["_crit"].to_numpy(dtype=float)
        return x, y, crit

    return load
