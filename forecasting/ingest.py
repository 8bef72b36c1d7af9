"""Quarter-hour rating history -> daily profiles (one row per zone x network x demo x date).

The reduction is ONE SQL statement (`profile_sql`) in standard SQL that both DuckDB and Spark SQL
accept: a GROUP BY over the series and the date with conditional aggregation of the 96
quarter-hours (in two levels, blocks of quarter-hours then days). DuckDB reads the
Parquet (or CSV) files directly and streams them, so the history never has to fit in memory; a
memory limit and a spill folder keep it out of core on hundreds of millions of rows.
"""
from __future__ import annotations

import glob as _glob
import os
import tempfile
from datetime import date
from pathlib import Path
from typing import Iterable, Sequence

import duckdb
import numpy as np
import pandas as pd

from forecasting.spark_engine import run_reduction_spark

QUARTER_HOURS = 96
KEYS = ["zone", "network", "demo", "date"]
QH_COLUMNS = [f"q{k:02d}" for k in range(QUARTER_HOURS)]

#: The relation name the reduction reads from; each engine binds it to the history files.
SOURCE_RELATION = "history"

#: Quarter-hours per block of the two-level reduction (see `PROFILE_SQL`).
BLOCK = 8

_INNER = ",\n    ".join(
    f"max(CASE WHEN quarter_hour - {BLOCK} * blk = {j} THEN rating END) AS s{j}" for j in range(BLOCK)
)
_OUTER = ",\n  ".join(
    f"max(CASE WHEN blk = {k // BLOCK} THEN s{k % BLOCK} END) AS {c}" for k, c in enumerate(QH_COLUMNS)
)

#: The reduction, standard SQL (CASE, FLOOR, CAST, GROUP BY only). Two levels: first the
#: quarter-hours of each block of BLOCK, then the blocks of each day. Each cell is still the
#: value of one history row (the key is unique), so the result equals a one-level pivot, but
#: only BLOCK conditional aggregates run over every input row instead of 96 (about 2x faster).
#: ``{where}`` is replaced by a WHERE clause (or nothing).
PROFILE_SQL = (
    "SELECT zone, network, demo, date,\n  " + _OUTER + "\nFROM (\n"
    "  SELECT zone, network, demo, d AS date, blk,\n    " + _INNER + "\n  FROM (\n"
    "    SELECT zone, network, demo, CAST(date AS DATE) AS d,\n"
    f"           CAST(FLOOR(quarter_hour / {BLOCK}) AS INTEGER) AS blk, quarter_hour, rating\n"
    f"    FROM {SOURCE_RELATION}\n    {{where}}\n  ) t0\n"
    "  GROUP BY zone, network, demo, d, blk\n) t1\n"
    "GROUP BY zone, network, demo, date\n"
    "ORDER BY zone, network, demo, date"
)


def _quote(text: str) -> str:
    return "'" + str(text).replace("'", "''") + "'"


def profile_sql(*, demos: Sequence[str] | None = None, start: date | None = None,
                end: date | None = None) -> str:
    """The reduction SQL with optional filters (standard SQL literals only).

    Parameters
    ----------
    demos : demos to keep (None: all).
    start, end : inclusive calendar-date bounds on the airing date (None: open).

    Returns
    -------
    str : a SELECT over the relation ``history`` yielding ``zone, network, demo, date, q00..q95``.
    """
    clauses = []
    if demos is not None:
        demos = list(demos)
        if not demos:
            clauses.append("1 = 0")
        else:
            clauses.append("demo IN (" + ", ".join(_quote(d) for d in demos) + ")")
    if start is not None:
        clauses.append(f"CAST(date AS DATE) >= DATE '{pd.Timestamp(start).date().isoformat()}'")
    if end is not None:
        clauses.append(f"CAST(date AS DATE) <= DATE '{pd.Timestamp(end).date().isoformat()}'")
    where = ("WHERE " + " AND ".join(clauses)) if clauses else ""
    return PROFILE_SQL.format(where=where)


def _duckdb_relation(source: str | os.PathLike) -> str:
    """DuckDB table function reading `source`: a Parquet file, a folder/glob of Parquet, or a CSV."""
    text = str(source)
    path = Path(text)
    if path.is_dir():
        pattern = str(path / "**" / "*.parquet")
        return f"read_parquet({_quote(pattern)}, hive_partitioning = true, union_by_name = true)"
    lower = text.lower()
    if lower.endswith(".csv") or lower.endswith(".csv.gz"):
        return (f"read_csv({_quote(text)}, header = true, "
                "columns = {'zone': 'VARCHAR', 'network': 'VARCHAR', 'demo': 'VARCHAR', "
                "'date': 'DATE', 'quarter_hour': 'INTEGER', 'rating': 'DOUBLE'})")
    if any(ch in text for ch in "*?["):
        hive = "true" if "=" in text else "false"
        return f"read_parquet({_quote(text)}, hive_partitioning = {hive}, union_by_name = true)"
    return f"read_parquet({_quote(text)})"


def _check_source(source: str | os.PathLike) -> None:
    text = str(source)
    if any(ch in text for ch in "*?["):
        if not _glob.glob(text, recursive=True):
            raise FileNotFoundError(f"{text}: no history files match")
    elif not Path(text).exists():
        raise FileNotFoundError(f"{text}: history file not found")


def run_reduction_duckdb(sql: str, source: str | os.PathLike, *, memory_limit: str = "4GB",
                         threads: int | None = None, temp_directory: str | None = None) -> pd.DataFrame:
    """Run the reduction `sql` with DuckDB over `source`, out of core.

    Parameters
    ----------
    sql : a query over the relation ``history`` (see `profile_sql`).
    source : Parquet file, folder of (hive-partitioned) Parquet, glob, or CSV file.
    memory_limit : DuckDB memory limit (larger intermediate state spills to `temp_directory`).
    threads : DuckDB worker threads (None: DuckDB's default, the machine's cores).

    Returns
    -------
    DataFrame : the query result.
    """

    _check_source(source)
    con = duckdb.connect(database=":memory:")
    try:
        con.execute(f"SET memory_limit = {_quote(memory_limit)}")
        con.execute(f"SET temp_directory = {_quote(temp_directory or tempfile.gettempdir())}")
        con.execute("SET preserve_insertion_order = false")
        if threads:
            con.execute(f"SET threads = {int(threads)}")
        con.execute(f"CREATE VIEW {SOURCE_RELATION} AS SELECT * FROM {_duckdb_relation(source)}")
        return con.execute(sql).df()
    finally:
        con.close()


def _run(sql: str, source, engine: str, **engine_options) -> pd.DataFrame:
    if engine == "duckdb":
        return run_reduction_duckdb(sql, source, **engine_options)
    if engine == "spark":
        return run_reduction_spark(sql, source, **engine_options)
    raise ValueError(f"unknown engine {engine!r} (use 'duckdb' or 'spark')")


def daily_profiles(source: str | os.PathLike, *, engine: str = "duckdb",
                   demos: Iterable[str] | None = None, start: date | None = None,
                   end: date | None = None, dtype=np.float64, **engine_options) -> pd.DataFrame:
    """Daily profiles of quarter-hour ratings, one row per zone x network x demo x date.

    Parameters
    ----------
    source : the history (``zone,network,demo,date,quarter_hour,rating``): a Parquet file, a
        folder or glob of partitioned Parquet, or a CSV file.
    engine : ``"duckdb"`` (default, out of core) or ``"spark"``.
    demos : keep only these demos (None: all).
    start, end : inclusive date bounds (None: the whole history).
    dtype : float dtype of the rating columns.
    **engine_options : passed to the engine (DuckDB: ``memory_limit``, ``threads``, ``temp_directory``).

    Returns
    -------
    DataFrame : columns ``zone, network, demo, date`` (datetime64, midnight) then ``q00..q95``,
        ratings as fractions of the universe; NaN where the quarter-hour is missing.
        Sorted by ``zone, network, demo, date``.
    """
    sql = profile_sql(demos=list(demos) if demos is not None else None, start=start, end=end)
    out = _run(sql, source, engine, **engine_options)
    return _tidy(out, dtype)


def _tidy(out: pd.DataFrame, dtype) -> pd.DataFrame:
    for col in ("zone", "network", "demo"):
        out[col] = out[col].astype(str)
    out["date"] = pd.to_datetime(out["date"]).astype("datetime64[ns]")
    for col in QH_COLUMNS:
        if col not in out.columns:
            out[col] = np.nan
    values = out[QH_COLUMNS].to_numpy(dtype=dtype, na_value=np.nan)
    frame = pd.DataFrame(values, columns=QH_COLUMNS, index=out.index)
    result = pd.concat([out[KEYS], frame], axis=1)
    # Engines may not keep ORDER BY through their collect; sort here for determinism.
    return result.sort_values(KEYS, kind="stable").reset_index(drop=True)


def profiles_from_frame(history: pd.DataFrame, dtype=np.float64) -> pd.DataFrame:
    """Same reduction on an in-memory history DataFrame (DuckDB scans the frame in place).

    Parameters
    ----------
    history : DataFrame with ``zone,network,demo,date,quarter_hour,rating``.

    Returns
    -------
    DataFrame : as `daily_profiles`.
    """

    con = duckdb.connect(database=":memory:")
    try:
        con.register(SOURCE_RELATION, history)
        out = con.execute(profile_sql()).df()
    finally:
        con.close()
    return _tidy(out, dtype)

