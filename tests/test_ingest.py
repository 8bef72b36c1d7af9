"""The history reduction (one SQL statement) against an independent pandas pivot."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from forecasting.ingest import QH_COLUMNS, daily_profiles


def _history(tmp_path, seed=3):
    rng = np.random.default_rng(seed)
    keys = pd.MultiIndex.from_product(
        [["z1", "z2"], ["n1", "n2"], ["hh", "a25-54"], pd.date_range("2026-01-01", periods=9), range(96)],
        names=["zone", "network", "demo", "date", "quarter_hour"]).to_frame(index=False)
    keys = keys.sample(frac=0.9, random_state=seed).reset_index(drop=True)  # gaps: missing quarter-hours
    keys["rating"] = rng.uniform(0, 0.02, len(keys))
    keys.loc[keys.sample(frac=0.05, random_state=1).index, "rating"] = 0.0  # true zeros
    keys["date"] = keys["date"].dt.date
    path = tmp_path / "history.parquet"
    keys.to_parquet(path, index=False)
    return keys, path


@pytest.mark.parametrize("demos", [None, ["hh"]])
def test_reduction_equals_pandas_pivot(tmp_path, demos):
    hist, path = _history(tmp_path)
    got = daily_profiles(path, demos=demos)
    ref = hist if demos is None else hist[hist["demo"].isin(demos)]
    # Reference: pandas pivot of the same rows (a missing quarter-hour stays missing, not zero).
    want = ref.pivot_table(index=["zone", "network", "demo", "date"], columns="quarter_hour",
                           values="rating", aggfunc="max", dropna=False)
    want = want.reindex(columns=range(96))
    want.columns = QH_COLUMNS
    want = want.dropna(how="all").reset_index().sort_values(["zone", "network", "demo", "date"])
    got = got.sort_values(["zone", "network", "demo", "date"]).reset_index(drop=True)
    want = want.reset_index(drop=True)
    assert list(got[["zone", "network", "demo"]].itertuples(index=False)) == \
        list(want[["zone", "network", "demo"]].itertuples(index=False))
    assert (pd.to_datetime(got["date"]).dt.date.to_numpy() == pd.to_datetime(want["date"]).dt.date.to_numpy()).all()
    np.testing.assert_array_equal(got[QH_COLUMNS].to_numpy(float), want[QH_COLUMNS].to_numpy(float))
