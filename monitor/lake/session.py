"""The Spark session of the lake path: one per process, at ``[lake] master``.

The session's time zone is ``[decisions] timezone``: Spark then reads a timestamp
without an offset in that zone and ``to_date`` gives the decision's day there, as the
store's ``decided_day`` is.  Spark's own UI is off (a refit is a batch job)."""

from __future__ import annotations

from monitor.config import Config
from monitor.errors import UserError


class SparkMissing(UserError):
    """pyspark (or the Java runtime Spark needs) is not there."""


def spark_session(config: Config):
    """The process's Spark session for ``config`` (created on first use)."""
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise SparkMissing(
            "[lake] needs Apache Spark: install cuewatch with the 'spark' extra "
            "(pip install 'cuewatch[spark]') and a Java 17 runtime."
        ) from None
    lake = config.lake
    builder = (
        SparkSession.builder.master(lake.master)
        .appName("cuewatch-buckets")
        .config("spark.ui.enabled", "false")
        .config("spark.sql.session.timeZone", config.decisions.timezone)
    )
    for key, value in lake.spark_conf.items():
        builder = builder.config(key, value)
    try:
        spark = builder.getOrCreate()
    except Exception as exc:  # no Java, a master that does not answer
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SparkMissing(f"Spark could not start at {lake.master}: {first}") from None
    # getOrCreate hands back a running session unchanged: set what depends on config.
    spark.conf.set("spark.sql.session.timeZone", config.decisions.timezone)
    # The record checks are one long CASE over parsed values; inferring filter
    # constraints from it ran the optimizer out of memory (measured: a 1 GB heap gone
    # planning the demo's duplicate rule), and it gains nothing here.
    spark.conf.set("spark.sql.constraintPropagation.enabled", "false")
    return spark
