"""Run the history reduction on Apache Spark (local mode or a cluster).

When the quarter-hour history outgrows one machine, the same reduction SQL that DuckDB runs
(`forecasting.ingest.profile_sql`) runs through a SparkSession: the history files are read with
``spark.read.parquet`` (or ``spark.read.csv`` with the contract's schema) into a temporary view
named as the SQL expects (``history``), the statement runs unchanged, and the result comes back
as a pandas DataFrame through Arrow. `forecasting.ingest.daily_profiles(..., engine="spark")`
routes here and applies the same tidy step as for DuckDB, so both engines give the same table.

pyspark is an optional extra (``pip install 'pledge[spark]'``) and needs a Java runtime (17+).
"""
from __future__ import annotations

import glob as _glob
import os
import shutil
from pathlib import Path

import duckdb
import pandas as pd

#: Environment variable naming the Spark master (e.g. ``spark://host:7077``); default local mode.
MASTER_ENV = "PLEDGE_SPARK_MASTER"

# The contract's history schema, as a Spark DDL string (CSV sources are read with it, so no
# type inference pass over the file).
HISTORY_DDL = "zone STRING, network STRING, demo STRING, date DATE, quarter_hour INT, rating DOUBLE"


def spark_available() -> tuple[bool, str]:
    """Whether pyspark imports and a Java runtime is on PATH or JAVA_HOME.

    Returns
    -------
    (bool, str) : availability and, when unavailable, the reason in words.
    """
    try:
        import pyspark  # noqa: F401, PLC0415 - optional heavy dependency (the 'spark' extra), imported on use
    except ImportError as exc:
        return False, f"pyspark is not installed ({exc}); install the 'spark' extra"
    java_home = os.environ.get("JAVA_HOME")
    if java_home and (Path(java_home) / "bin" / "java").exists():
        return True, ""
    if shutil.which("java") is None:
        return False, "no Java runtime found (java not on PATH and JAVA_HOME unset)"
    return True, ""


def get_spark_session(master: str | None = None, *, app_name: str = "pledge-history",
                      shuffle_partitions: int | None = None, driver_memory: str | None = None):
    """A SparkSession configured for the reduction (reuses an active session if one exists).

    Parameters
    ----------
    master : Spark master URL; None reads ``$PLEDGE_SPARK_MASTER``, else ``local[1]``.
    app_name : application name shown by the cluster manager.
    shuffle_partitions : ``spark.sql.shuffle.partitions``; None: 2 in local mode (quick start on
        small histories), Spark's default (200) on a cluster.
    driver_memory : ``spark.driver.memory`` (e.g. ``"4g"``), only effective for a new JVM.

    Returns
    -------
    pyspark.sql.SparkSession
    """
    from pyspark.sql import SparkSession  # noqa: PLC0415 - optional heavy dependency, imported on use

    active = SparkSession.getActiveSession()
    if active is not None and master is None:
        return active
    master = master or os.environ.get(MASTER_ENV) or "local[1]"
    local = master.startswith("local")
    builder = (
        SparkSession.builder.master(master)
        .appName(app_name)
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.execution.arrow.pyspark.enabled", "true")
        # Partition folders (zone=Z01) stay strings, as the contract's key columns are.
        .config("spark.sql.sources.partitionColumnTypeInference.enabled", "false")
        # Nanosecond Parquet timestamps (pandas' default) read as longs would break CAST(date AS
        # DATE); histories should store `date` as a Parquet DATE, which every writer here does.
    )
    if shuffle_partitions is None and local:
        shuffle_partitions = 2
    if shuffle_partitions is not None:
        builder = builder.config("spark.sql.shuffle.partitions", str(int(shuffle_partitions)))
    if local:
        builder = builder.config("spark.driver.bindAddress", "127.0.0.1").config(
            "spark.driver.host", "127.0.0.1")
    if driver_memory:
        builder = builder.config("spark.driver.memory", driver_memory)
    spark = builder.getOrCreate()
    spark.sparkContext.setLogLevel("ERROR")
    return spark


def _reader_paths(source: str | os.PathLike) -> tuple[str, list[str]]:
    """(format, paths) for Spark's reader, mirroring the DuckDB engine's accepted sources."""
    text = str(source)
    path = Path(text)
    if path.is_dir():
        if not any(path.rglob("*.parquet")):
            raise FileNotFoundError(f"{text}: no Parquet files in the history folder")
        return "parquet", [text]
    lower = text.lower()
    if any(ch in text for ch in "*?["):
        files = sorted(_glob.glob(text, recursive=True))
        if not files:
            raise FileNotFoundError(f"{text}: no history files match")
        fmt = "csv" if all(f.lower().endswith((".csv", ".csv.gz")) for f in files) else "parquet"
        return fmt, files
    if not path.exists():
        raise FileNotFoundError(f"{text}: history file not found")
    if lower.endswith(".csv") or lower.endswith(".csv.gz"):
        return "csv", [text]
    return "parquet", [text]


def run_reduction_spark(sql: str, source: str | os.PathLike, *, master: str | None = None,
                        spark=None, view: str = "history", shuffle_partitions: int | None = None,
                        threads: int | None = None, **_duckdb_only) -> pd.DataFrame:
    """Run the reduction `sql` on Spark over the history `source`.

    Parameters
    ----------
    sql : a query over the relation `view` (see `forecasting.ingest.profile_sql`), unchanged.
    source : Parquet file, folder of (partitioned) Parquet, glob, or CSV file with the history
        columns ``zone,network,demo,date,quarter_hour,rating``.
    master : Spark master URL (None: ``$PLEDGE_SPARK_MASTER`` or local mode).
    spark : an existing SparkSession to use instead of building one.
    view : the temporary view name the SQL reads (``history``).
    shuffle_partitions : see `get_spark_session`.
    threads : local mode only: worker threads, ``local[threads]``.
    **_duckdb_only : DuckDB options (``memory_limit``, ``temp_directory``) are accepted and ignored,
        so callers can switch engines without changing arguments.

    Returns
    -------
    DataFrame : the query result with the columns and row order of the SQL (strings, dates,
        doubles as DuckDB's pandas conversion gives them).
    """
    fmt, paths = _reader_paths(source)
    if spark is None:
        if master is None and threads and not os.environ.get(MASTER_ENV):
            master = f"local[{int(threads)}]"
        spark = get_spark_session(master, shuffle_partitions=shuffle_partitions)
    if fmt == "csv":
        frame = spark.read.csv(paths, header=True, schema=HISTORY_DDL)
    else:
        frame = spark.read.parquet(*paths)
    frame.createOrReplaceTempView(view)
    try:
        result = spark.sql(sql)
        table = result.toArrow()
    finally:
        spark.catalog.dropTempView(view)
    # Same Arrow -> pandas conversion as the DuckDB engine's `.df()` (dates to datetime64,
    # strings to the string dtype), so the two engines hand the tidy step identical inputs.
    return duckdb.from_arrow(table).df()
