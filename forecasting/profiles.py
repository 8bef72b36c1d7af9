"""Daily profiles as a dense cube (series x day x quarter-hour) and their principal components.

References
----------
Jolliffe, I. T. (2002). Principal Component Analysis, 2nd ed. Springer.
Ramsay, J. O. & Silverman, B. W. (2005). Functional Data Analysis, 2nd ed. Springer.
Hyndman, R. J. & Ullah, M. S. (2007). Robust forecasting of mortality and fertility rates:
    a functional data approach. Computational Statistics & Data Analysis 51(10).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .ingest import QH_COLUMNS, QUARTER_HOURS

SERIES_KEYS = ["zone", "network", "demo"]


@dataclass
class ProfileCube:
    """Quarter-hour ratings of every series on a common daily calendar.

    Attributes
    ----------
    series : DataFrame ``zone, network, demo`` (one row per series, row i = cube index i).
    day0 : Timestamp of day index 0.
    values : float32 array (n_series, n_days, 96) of ratings (fractions), NaN where missing.
    """

    series: pd.DataFrame
    day0: pd.Timestamp
    values: np.ndarray

    @property
    def n_series(self) -> int:
        return self.values.shape[0]

    @property
    def n_days(self) -> int:
        return self.values.shape[1]

    def dates(self) -> pd.DatetimeIndex:
        """Calendar dates of the day axis."""
        return pd.date_range(self.day0, periods=self.n_days, freq="D")

    def day_index(self, when) -> int:
        """Day index of a date (may fall outside the cube)."""
        return int((pd.Timestamp(when) - self.day0) // pd.Timedelta(days=1))

    @classmethod
    def from_profiles(cls, profiles: pd.DataFrame, series: pd.DataFrame | None = None,
                      day0=None, n_days: int | None = None) -> "ProfileCube":
        """Scatter daily profiles (`forecasting.ingest.daily_profiles`) into a cube.

        Parameters
        ----------
        profiles : ``zone, network, demo, date, q00..q95``.
        series : the series to lay out (default: those present, sorted). Series absent from
            `profiles` get all-NaN rows (no history).
        day0, n_days : calendar of the day axis (default: the span of `profiles`).
        """
        if series is None:
            series = profiles[SERIES_KEYS].drop_duplicates()
        series = series[SERIES_KEYS].astype(str).sort_values(SERIES_KEYS).reset_index(drop=True)
        dates = pd.to_datetime(profiles["date"])
        if day0 is None:
            day0 = dates.min() if len(profiles) else pd.Timestamp("2000-01-03")
        day0 = pd.Timestamp(day0).normalize()
        t = ((dates - day0) // pd.Timedelta(days=1)).to_numpy(dtype=np.int64)
        if n_days is None:
            n_days = int(t.max()) + 1 if len(t) else 1
        key = pd.MultiIndex.from_frame(series)
        s = key.get_indexer(pd.MultiIndex.from_frame(profiles[SERIES_KEYS].astype(str)))
        keep = (s >= 0) & (t >= 0) & (t < n_days)
        values = np.full((len(series), n_days, QUARTER_HOURS), np.nan, dtype=np.float32)
        values[s[keep], t[keep]] = profiles[QH_COLUMNS].to_numpy(dtype=np.float32, na_value=np.nan)[keep]
        return cls(series=series, day0=day0, values=values)

    def history_days(self, end: int | None = None) -> np.ndarray:
        """Days with any observed quarter-hour per series, before day index `end` (int array)."""
        v = self.values if end is None else self.values[:, :end]
        return np.isfinite(v).any(axis=2).sum(axis=1)


class ProfilePCA:
    """Principal components of daily profiles (rows of 96 values), by the thin SVD.

    Parameters
    ----------
    n_components : number of components kept; None chooses the smallest number explaining
        `variance_target` of the variance (clipped to [min_components, max_components]).

    Attributes
    ----------
    mean_ : (96,) mean profile.
    components_ : (k, 96) orthonormal principal axes (rows), sign fixed so the largest
        absolute loading is positive.
    explained_variance_ : (k,) variances of the scores; explained_variance_ratio_ likewise as
        shares of the total.
    pinv_ : (96, k) pseudo-inverse of ``components_`` used to compute scores.

    References
    ----------
    Jolliffe (2002), ch. 3 (PCA by the singular value decomposition).
    """

    def __init__(self, n_components: int | None = None, variance_target: float = 0.97,
                 min_components: int = 3, max_components: int = 12):
        self.n_components = n_components
        self.variance_target = variance_target
        self.min_components = min_components
        self.max_components = max_components

    def fit(self, Y: np.ndarray) -> "ProfilePCA":
        """Fit on complete profiles `Y` (n, 96), no NaN."""
        Y = np.asarray(Y, dtype=float)
        self.mean_ = Y.mean(axis=0)
        _, s, vt = np.linalg.svd(Y - self.mean_, full_matrices=False)
        var = s**2 / max(len(Y) - 1, 1)
        ratio = var / var.sum() if var.sum() > 0 else np.zeros_like(var)
        if self.n_components is None:
            k = int(np.searchsorted(np.cumsum(ratio), self.variance_target) + 1)
            k = int(np.clip(k, self.min_components, self.max_components))
        else:
            k = int(self.n_components)
        k = min(k, vt.shape[0])
        comps = vt[:k]
        flip = np.sign(comps[np.arange(k), np.abs(comps).argmax(axis=1)])
        flip[flip == 0] = 1.0
        self.components_ = comps * flip[:, None]
        self.explained_variance_ = var[:k]
        self.explained_variance_ratio_ = ratio[:k]
        self.pinv_ = np.linalg.pinv(self.components_)
        return self

    def transform(self, Y: np.ndarray) -> np.ndarray:
        """Scores (n, k) of complete profiles: ``(Y - mean_) @ pinv_``."""
        return (np.asarray(Y, dtype=float) - self.mean_) @ self.pinv_

    def inverse_transform(self, scores: np.ndarray) -> np.ndarray:
        """Profiles (n, 96) rebuilt from scores: ``mean_ + scores @ components_``."""
        return self.mean_ + np.asarray(scores, dtype=float) @ self.components_
