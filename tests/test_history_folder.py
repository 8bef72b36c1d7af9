"""A history too big for one file: a `history/` folder of Parquet parts (documented addition).

The same rows split into parts must load, validate and reduce exactly as the single file does.
"""
from __future__ import annotations

import os
import shutil

import pandas.testing as pdt
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from forecasting.ingest import daily_profiles
from planner.errors import ScenarioError
from planner.scenario import history_fingerprint, load_history, load_scenario, validate_history
from planner.workflows import open_scenario

KEY = ["zone", "network", "demo", "date", "quarter_hour"]


@pytest.fixture()
def split_scenario(small_scenario, tmp_path):
    """Copy of the small scenario with its history.parquet split into one part per zone."""
    single = tmp_path / "single"
    shutil.copytree(small_scenario, single)
    folder = tmp_path / "parts"
    shutil.copytree(small_scenario, folder)
    table = pq.read_table(folder / "history.parquet")
    (folder / "history.parquet").unlink()
    frame = table.to_pandas()
    (folder / "history").mkdir()
    for i, (zone, part) in enumerate(frame.groupby("zone", sort=True)):
        pq.write_table(pa.Table.from_pandas(part, schema=table.schema, preserve_index=False),
                       folder / "history" / f"part-{i:03d}.parquet")
    return single, folder


def test_folder_loads_validates_and_reads_like_the_file(split_scenario):
    single, folder = split_scenario
    a, b = load_scenario(single), load_scenario(folder)
    assert b.history_path == folder / "history" and b.history_path.is_dir()
    va, vb = validate_history(a), validate_history(b)
    assert (vb.rows, vb.series, vb.start, vb.end, vb.days) == (va.rows, va.series, va.start, va.end, va.days)
    assert vb.completeness == pytest.approx(va.completeness, rel=1e-12)
    ha = load_history(a).sort_values(KEY).reset_index(drop=True)
    hb = load_history(b).sort_values(KEY).reset_index(drop=True)
    pdt.assert_frame_equal(hb, ha, check_exact=True)
    pdt.assert_frame_equal(daily_profiles(b.history_path, threads=1), daily_profiles(a.history_path, threads=1),
                           check_exact=True)


def test_folder_fingerprint_follows_every_part(split_scenario):
    _, folder = split_scenario
    s = load_scenario(folder)
    before = history_fingerprint(s)
    part = sorted((folder / "history").glob("*.parquet"))[-1]
    st = part.stat()
    os.utime(part, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    assert history_fingerprint(s) != before


def test_duplicate_key_across_parts_is_reported(split_scenario):
    _, folder = split_scenario
    parts = sorted((folder / "history").glob("*.parquet"))
    shutil.copy(parts[0], folder / "history" / "part-copy.parquet")
    with pytest.raises(ScenarioError, match="duplicate key"):
        validate_history(load_scenario(folder))


def test_empty_history_folder_is_not_a_history(split_scenario):
    # An empty folder holds no history: the small scenario's [history_generator] makes the file.
    _, folder = split_scenario
    shutil.rmtree(folder / "history")
    (folder / "history").mkdir()
    s = open_scenario(folder)
    assert s.history_path == folder / "history.parquet" and s.history_path.is_file()
