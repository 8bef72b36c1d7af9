"""The history reduction on Spark (local mode) equals DuckDB's, exactly.

Both engines run the same SQL (`forecasting.ingest.profile_sql`); each output cell is the one
rating of a (series, date, quarter-hour), so equality is exact, not within a tolerance. The
reduction itself is also checked against an independent pandas pivot (pandas.pivot_table, a
general-purpose reference implementation of the same reshape).

With PLEDGE_REQUIRE_SPARK=1 (CI) a missing pyspark or Java is a failure, not a skip.
"""
from __future__ import annotations

import os
from datetime import date

import numpy as np
import pandas as pd
import pandas.testing as pdt
import pytest

from forecasting.ingest import QH_COLUMNS, daily_profiles

pytestmark = pytest.mark.spark

REQUIRE = os.environ.get("PLEDGE_REQUIRE_SPARK", "") not in ("", "0")
QUICK_JVM = ("-XX:TieredStopAtLevel=1", "-XX:+UseSerialGC")


def _small_history(seed: int = 5) -> pd.DataFrame:
    """A small invented history: 3 zones x 2 networks x 2 demos x 10 days, with gaps and zeros."""
    rng = np.random.default_rng(seed)
    zones, networks, demos = ["z-north", "z-south", "z'east"], ["netA", "netB"], ["hh", "a25-54"]
    days = pd.date_range("2026-02-20", periods=10, freq="D")  # crosses a month end
    idx = pd.MultiIndex.from_product([zones, networks, demos, days, range(96)],
                                     names=["zone", "network", "demo", "date", "quarter_hour"])
    frame = idx.to_frame(index=False)
    frame["rating"] = rng.gamma(2.0, 0.002, len(frame)).round(6)
    frame.loc[rng.random(len(frame)) < 0.05, "rating"] = 0.0   # true zeros
    frame = frame[rng.random(len(frame)) > 0.08]               # gaps: unknown, not zero
    frame = frame.sample(frac=1.0, random_state=seed)          # rows in no particular order
    frame["date"] = frame["date"].dt.date
    frame["quarter_hour"] = frame["quarter_hour"].astype("int32")
    return frame.reset_index(drop=True)


@pytest.fixture(scope="module")
def spark():
    from forecasting.spark_engine import get_spark_session, spark_available

    ok, why = spark_available()
    if not ok:
        if REQUIRE:
            pytest.fail(f"PLEDGE_REQUIRE_SPARK is set but Spark cannot run: {why}")
        pytest.skip(why)
    try:
        # The JVM of these few small queries starts and runs faster on its first JIT tier alone
        # and the serial collector (about half the time on 2 cores); the results do not depend on it.
        with pytest.MonkeyPatch.context() as mp:
            mp.setenv("JAVA_TOOL_OPTIONS", " ".join(filter(None, [os.environ.get("JAVA_TOOL_OPTIONS"),
                                                                  *QUICK_JVM])))
            session = get_spark_session("local[1]", shuffle_partitions=1)
    except Exception as exc:  # the JVM did not start
        if REQUIRE:
            pytest.fail(f"PLEDGE_REQUIRE_SPARK is set but Spark did not start: {exc}")
        pytest.skip(f"Spark did not start: {exc}")
    yield session
    session.stop()


@pytest.fixture(scope="module")
def history_files(tmp_path_factory):
    """The same history as one Parquet file, a zone-partitioned folder, and a CSV file."""
    root = tmp_path_factory.mktemp("spark_hist")
    frame = _small_history()
    single = root / "history.parquet"
    frame.to_parquet(single, index=False)
    folder = root / "history"
    for zone, part in frame.groupby("zone"):
        target = folder / f"part-{abs(hash(zone)) % 10_000:04d}.parquet"
        target.parent.mkdir(parents=True, exist_ok=True)
        part.to_parquet(target, index=False)
    hive = root / "hive"
    for zone, part in frame.groupby("zone"):
        target = hive / f"zone={zone}" / "part.parquet"
        target.parent.mkdir(parents=True, exist_ok=True)
        part.drop(columns="zone").to_parquet(target, index=False)
    csv = root / "history.csv"
    frame.to_csv(csv, index=False)
    return {"frame": frame, "single": single, "folder": folder, "hive": hive, "csv": csv}


def test_duckdb_reduction_matches_pandas_pivot(history_files):
    # Reference: pandas.pivot_table (independent of both SQL engines).
    frame = history_files["frame"].copy()
    frame["date"] = pd.to_datetime(frame["date"])
    ref = frame.pivot_table(index=["zone", "network", "demo", "date"], columns="quarter_hour",
                            values="rating", aggfunc="max")
    ref = ref.reindex(columns=range(96))
    ref.columns = QH_COLUMNS
    ref = ref.reset_index().sort_values(["zone", "network", "demo", "date"]).reset_index(drop=True)
    got = daily_profiles(history_files["single"], threads=1)
    assert len(got) == 3 * 2 * 2 * 10
    np.testing.assert_array_equal(got[QH_COLUMNS].to_numpy(), ref[QH_COLUMNS].to_numpy())
    assert list(got["zone"]) == list(ref["zone"].astype(str))
    assert (got["date"].to_numpy() == ref["date"].to_numpy().astype("datetime64[ns]")).all()


@pytest.mark.parametrize("kind", ["single", "folder", "hive", "csv"])
def test_spark_equals_duckdb_exactly(spark, history_files, kind):
    source = history_files[kind]
    duck = daily_profiles(source, threads=1)
    sparked = daily_profiles(source, engine="spark", spark=spark)
    assert len(duck) == 120
    assert list(sparked.columns) == list(duck.columns)
    assert dict(sparked.dtypes) == dict(duck.dtypes)
    pdt.assert_frame_equal(sparked, duck, check_exact=True)
    # Missing quarter-hours stay unknown (NaN), true zeros stay zero, in both engines.
    assert duck[QH_COLUMNS].isna().to_numpy().sum() > 0
    assert (duck[QH_COLUMNS].to_numpy() == 0.0).sum() > 0


def test_spark_with_filters_equals_duckdb(spark, history_files):
    kwargs = dict(demos=["hh"], start=date(2026, 2, 25), end=date(2026, 2, 28))
    duck = daily_profiles(history_files["single"], threads=1, **kwargs)
    sparked = daily_profiles(history_files["single"], engine="spark", spark=spark, **kwargs)
    assert set(duck["demo"]) == {"hh"}
    assert duck["date"].min() == pd.Timestamp("2026-02-25")
    assert duck["date"].max() == pd.Timestamp("2026-02-28")
    pdt.assert_frame_equal(sparked, duck, check_exact=True)


def test_spark_missing_source_is_clear(spark, tmp_path):
    with pytest.raises(FileNotFoundError, match="not found"):
        daily_profiles(tmp_path / "nope.parquet", engine="spark", spark=spark)
