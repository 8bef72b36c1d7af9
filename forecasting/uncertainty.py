"""Uncertainty of daypart forecasts, estimated from held-out errors and from history.

Level error. For each rolling-origin refit (fold j) and each unit-week (zone z, network n,
daypart d, demo m, week w) the relative error of the daypart mean is
``e = actual / forecast - 1``. It is decomposed as nested random effects

    e = s[j] + a[n, j] + g[n, w, j] + b[z, n, d, m, j] + c[z, n, d, m, w, j]

(common factor shared by every unit of the forecast, all networks, zones, dayparts, demos and
weeks; network factor shared by every unit of the network; network-week factor shared by every unit
of the network in one week, all zones, dayparts and demos; flight factor shared across the
weeks of a zone x network x daypart (x demo); unit-week own factor), with variances estimated
by the method of moments of the nested ANOVA, pooled by daypart x size class (expected
impressions) x genre and shrunk toward daypart x size class, then toward the daypart.
The common factor is carved out of the network factor by the method of moments on the refits'
means over networks: without it, a deal spread over many networks would look safer than it is,
as if the networks' errors averaged out. The bias correction (the mean error of the refits) takes
out the refits' mean shift, so the in-sample errors hold (1 - 1/J) of its variance (J refits) and
a forecast's error (1 + 1/J) of it (the shift plus the error of its J-refit mean).
The network-week factor is estimated from the network-week means of the within-flight
deviations (below); without it, errors that move together in every zone of a network in one
week would count as independent and a deal spread over many zones would look safer than it is.
Units with short history: series truncated on purpose in the folds measure how much larger
their errors are; the extra variance goes to the flight factor (a poorly known level persists
through the flight).

Airing noise. The spread of one spot around the unit-week level: the dispersion of the
quarter-hour-day ratings of a daypart week around their mean, as a coefficient of variation
pooled over the weeks of the recent history and shrunk toward network x daypart x demo.

References
----------
Searle, S. R., Casella, G. & McCulloch, C. E. (1992). Variance Components. Wiley, ch. 3-4
    (ANOVA / method-of-moments estimators for nested random effects).
Tashman, L. J. (2000). Out-of-sample tests of forecasting accuracy: an analysis and review.
    Int. J. Forecasting 16(4) (rolling-origin evaluation).
"""
from __future__ import annotations

import copy

import numpy as np
import pandas as pd
from scipy.stats import norm

from .factors import LEVEL_FACTORS, factor_named
from .scoring import pooled_level_ratio

FLIGHT_KEYS = ["fold", *factor_named("flight").keys]
#: the relative-sd columns of `LevelErrorModel.predict` and the keys of the unit-weeks that share
#: each factor within one refit (None: each unit-week alone), from `forecasting.factors`
COMPONENT_KEYS = tuple((f.rel_column, None if f.keys is None else list(f.keys)) for f in LEVEL_FACTORS)



def factor_components(rows: pd.DataFrame, spec=COMPONENT_KEYS, divide_by=None) -> list:
    """``(sd, group)`` pairs of `rows` for `forecasting.scoring.coverage_if_calibrated` and
    `forecasting.scoring.total_bias_sd`: per ``(column, keys)`` of `spec`, the column's sds
    (divided by `divide_by`, shape (n,), when given: absolute sds to fractions) and the integer
    code of each row's group under `keys` (None: each row its own factor; []: one factor for all)."""
    scale = 1.0 if divide_by is None else np.asarray(divide_by, dtype=float)

    def group(keys):
        if keys is None:
            return None
        if not keys:
            return np.zeros(len(rows), dtype=np.int64)
        return rows.groupby(keys, sort=False, observed=True).ngroup().to_numpy()

    return [(rows[col].to_numpy(float) / scale, group(keys)) for col, keys in spec]


#: floors on the relative sds (fractions of the mean) so nothing has zero variance
FLOOR_SD = {"network": 0.01, "network_week": 0.005, "flight": 0.01, "week": 0.02, "airing": 0.05}


def _group_mean(df: pd.DataFrame, keys, col: str) -> pd.Series:
    return df.groupby(keys, sort=False, observed=True)[col].transform("mean")


class LevelErrorModel:
    """Variance components of relative unit-week level errors (fractions of the forecast mean).

    Parameters
    ----------
    prior_flights : shrinkage weight (in flights) of a daypart x genre cell toward its daypart.
    ratio_prior : refits' worth of pull of the mean correction toward none (see `_weighted_bias`).

    Attributes
    ----------
    bias_ : dict daypart -> mean relative error (the forecast is multiplied by 1 + bias).
    var_common_ : float, variance of the common factor in a forecast (the shift and the error of
        its mean over the refits); var_common_heldout_ : the part of it the bias-corrected
        held-out errors hold.
    common_floor_var_ : float, the floor `with_common_floor` put under the forecasts' common
        variance (0 when none); daypart_scale_ : {daypart: multiplier of every sd} (`with_daypart_scale`).
    var_network_ : float, variance of the network factor.
    var_network_week_ : float, variance of the network-week factor.
    var_cells_ : DataFrame indexed by (daypart, size_bin, genre), columns ``flight, week``.
    var_mid_ : the same by (daypart, size_bin); var_flight_daypart_, var_week_daypart_ : Series
        by daypart (fallbacks for unseen cells).
    history_ratio_ : DataFrame ``weeks, ratio`` -- error variance of series with that many weeks
        of history over the full-history variance (>= 1, non-increasing in weeks).
    full_weeks_ : typical history length (weeks) of the full-history series in the folds.
    scale_ : quantile scale of every level sd; n_rows_ : number of held-out unit-weeks used.
    """

    def __init__(self, prior_flights: float = 30.0, ratio_prior: float = 1.0):
        self.prior_flights = prior_flights
        self.ratio_prior = ratio_prior

    def fit(self, errors: pd.DataFrame) -> "LevelErrorModel":
        """Fit on held-out errors.

        Parameters
        ----------
        errors : one row per held-out unit-week with ``fold, zone, network, genre, daypart, demo,
            week, rel_error`` (actual / forecast - 1), ``truncated`` (bool: history cut on
            purpose), ``history_weeks`` (weeks of history the fold's fit had for the series) and
            optionally ``recent`` (log residual before the origin) and ``size`` (log10 expected
            impressions).
        """
        df = errors[np.isfinite(errors["rel_error"]) & (errors["rel_error"] > -1.0)].copy()
        if "recent" not in df:
            df["recent"] = 0.0
        full = df[~df["truncated"]].copy()
        if len(full) < 10:
            raise ValueError("too few held-out unit-weeks to estimate forecast uncertainty")
        self._fit_recent(full)
        for frame in (df, full):
            frame["ratio"] = (1.0 + frame["rel_error"]) / np.exp(self.recent_beta(frame["week"]) * frame["recent"])
        self.bias_ = self._weighted_bias(full)
        # the variance components are taken around each daypart's mean unit-week ratio
        centre = (full.groupby("daypart")["ratio"].mean() - 1.0).to_dict()
        for frame in (df, full):
            b = frame["daypart"].map(centre).astype(float).fillna(0.0)
            frame["e"] = frame["ratio"] / (1.0 + b) - 1.0
        self.n_rows_ = len(full)
        if "size" in full and np.isfinite(full["size"]).any():
            self.size_edges_ = np.quantile(full["size"][np.isfinite(full["size"])], [0.25, 0.5, 0.75])
        else:
            self.size_edges_ = np.array([])
        for frame in (df, full):
            frame["size_bin"] = self.size_bin(frame)

        flights, net = self._flights(full)
        var_g = self._network_week_var(full)
        self._fit_pools(flights, var_g)
        self.var_network_week_ = var_g
        self._fit_common(self._fit_network(flights, net))
        self._fit_history(df[df["truncated"]], full)  # ratios to the unscaled full-history variance
        self._apply_scale(self._fit_scale(full))
        self.widened_common_var_ = 0.0
        self.common_floor_var_ = 0.0
        self.daypart_scale_ = {}
        return self

    def _weighted_bias(self, full: pd.DataFrame) -> dict:
        """Mean correction by daypart, `forecasting.scoring.pooled_level_ratio` - 1 of the actual over
        the forecast with its recent carry-over (forecast impressions ``10**size``; without ``size``
        every unit-week weighs the same), refits weighted by ``season_weight`` when given.
        Impression-weighted, as a deal's total is: one refit's few unit-weeks with huge ratios cannot
        set the level of every unit, nor can refits of another season."""
        size = full["size"].to_numpy(float) if "size" in full else np.zeros(len(full))
        fcst = np.power(10.0, np.where(np.isfinite(size), size, np.nanmedian(size) if np.isfinite(size).any() else 0.0))
        carry = (1.0 + full["rel_error"].to_numpy(float)) / full["ratio"].to_numpy(float)
        actual = fcst * (1.0 + full["rel_error"].to_numpy(float))
        out = {}
        for dp, idx in full.groupby("daypart").indices.items():
            g = full.iloc[idx]
            out[str(dp)] = pooled_level_ratio(actual[idx], (fcst * carry)[idx], g["fold"],
                                              g["season_weight"] if "season_weight" in g else None,
                                              self.ratio_prior) - 1.0
        return out

    def widen_common(self, var_shift: float, n_refits: int) -> None:
        """Add a shift shared by every unit, of variance `var_shift` (fraction^2) in a refit's
        total, to the common factor: a forecast's error holds it (1 + 1/J) times (its J-refit mean
        correction), the held-out errors (1 - 1/J) times."""
        self.widened_common_var_ = float(var_shift)
        self.var_common_ += (1.0 + 1.0 / n_refits) * var_shift
        self.var_common_heldout_ += (1.0 - 1.0 / n_refits) * var_shift

    def with_common_floor(self, var_floor: float) -> "LevelErrorModel":
        """A copy whose forecasts' common factor has at least variance `var_floor` (fraction^2), e.g.
        the candidates' disagreement about the total (`StackedCombiner.disagreement`): the shared
        error a combination of forecasts claims for itself. The fitted components are unchanged."""
        law = copy.copy(self)
        law.common_floor_var_ = float(max(var_floor, 0.0))
        return law

    def with_daypart_scale(self, scale: dict) -> "LevelErrorModel":
        """A copy whose relative sds are multiplied by ``scale[daypart]`` (1 where absent): the law
        learned on the refits' forecasts carried to a forecast whose candidates err more or less
        (`forecasting.pipeline.DaypartForecaster.law_scale`). The common factor is not scaled."""
        law = copy.copy(self)
        law.daypart_scale_ = {str(k): float(v) for k, v in scale.items()}
        return law

    # ------------------------------------------------------------------ components
    @staticmethod
    def _flights(full: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Per flight (fold x zone x network x daypart x demo): weeks W, mean, within sum of squares;
        per fold x network: mean, rows N, flights M, weeks."""
        full["flight_mean"] = _group_mean(full, FLIGHT_KEYS, "e")
        full["dev2"] = (full["e"] - full["flight_mean"]) ** 2
        g = full.groupby(FLIGHT_KEYS, sort=False, observed=True)
        flights = g.agg(daypart=("daypart", "first"), genre=("genre", "first"), network=("network", "first"),
                        size_bin=("size_bin", "first"), fold=("fold", "first"), W=("e", "size"),
                        mean=("e", "mean"), ss=("dev2", "sum")).reset_index(drop=True)
        net = full.groupby(["fold", "network"], observed=True).agg(
            net_mean=("e", "mean"), N=("e", "size"), weeks=("week", "nunique")).reset_index()
        nflights = flights.groupby(["fold", "network"]).size().rename("M").reset_index()
        net = net.merge(nflights, on=["fold", "network"])
        flights = flights.merge(net, on=["fold", "network"], how="left")
        flights["dev"] = flights["mean"] - flights["net_mean"]
        return flights, net

    @staticmethod
    def _network_week_var(full: pd.DataFrame) -> float:
        """Variance of the network-week factor (method of moments), from `full` with ``e`` and
        ``flight_mean`` (see `_flights`).

        With r = e - flight mean, the mean m of r over the n flights of a network in one week has
        ``E[m^2] = (1 - 1/W)(var_g + var_c / n)`` and the pooled within-flight variance is
        ``S1 = var_g + var_c``; solved for var_g.
        """
        r = full["e"] - full["flight_mean"]
        key = [full["fold"], full["network"], full["week"]]
        cell = pd.DataFrame({"m": r.groupby(key, observed=True).mean(),
                             "n": r.groupby(key, observed=True).size()}).reset_index()
        W = full.groupby(FLIGHT_KEYS, observed=True)["e"].transform("size")
        dof = float((1.0 - 1.0 / W).sum())
        if dof <= 0 or len(cell) == 0:
            return FLOOR_SD["network_week"] ** 2
        s1 = float((r ** 2).sum() / dof)
        w_typ = float(W.mean())
        shrink = max(1.0 - 1.0 / w_typ, 1e-6)
        inv_n = float(np.mean(1.0 / cell["n"]))
        m2 = float(np.mean(cell["m"] ** 2)) / shrink
        var_g = (m2 - s1 * inv_n) / max(1.0 - inv_n, 1e-6)
        return float(min(max(var_g, FLOOR_SD["network_week"] ** 2), s1))

    def _components(self, fl: pd.DataFrame, var_g: float) -> tuple[float, float, float]:
        """(within-flight variance var_g + var_c, flight variance, flights) of a pool of flights."""
        dof = float((fl["W"] - 1).clip(lower=0).sum())
        var_w = float(fl["ss"].sum() / dof) if dof > 0 else np.nan
        m = fl["M"].clip(lower=2).to_numpy(float)
        corr = m / (m - 1.0)  # the deviation from a mean of M flights loses 1/M of the variance
        own = max(var_w - var_g, 0.0) if np.isfinite(var_w) else 0.0  # g is common to the network's flights
        var_f = float(np.mean(fl["dev"].to_numpy() ** 2 * corr) - np.mean(own / fl["W"]))
        return var_w, var_f, float(len(fl))

    def _fit_pools(self, flights: pd.DataFrame, var_g: float) -> None:
        """Flight and unit-week variances by pool: daypart <- daypart x size class <- daypart x
        size class x genre, each shrunk toward its parent by `prior_flights` (size: the unit's
        expected impressions, whose relative errors shrink as the audience grows). The unit-week
        variance is the within-flight one less var_g."""
        k0 = self.prior_flights
        floor_w = FLOOR_SD["week"] ** 2 + var_g
        by_dp = {}
        for dp, fl in flights.groupby("daypart"):
            var_w, var_f, n = self._components(fl, var_g)
            by_dp[dp] = (max(var_w, floor_w) if np.isfinite(var_w) else floor_w, max(var_f, FLOOR_SD["flight"] ** 2))

        def shrunk(fl, parent_w, parent_f):
            var_w, var_f, n = self._components(fl, var_g)
            var_w = parent_w if not np.isfinite(var_w) else (n * var_w + k0 * parent_w) / (n + k0)
            var_f = (n * max(var_f, 0.0) + k0 * parent_f) / (n + k0)
            return max(var_w, floor_w), max(var_f, FLOOR_SD["flight"] ** 2)

        mid = {(dp, sb): shrunk(fl, *by_dp[dp]) for (dp, sb), fl in flights.groupby(["daypart", "size_bin"])}
        cells = {key: shrunk(fl, *mid[key[:2]])
                 for key, fl in flights.groupby(["daypart", "size_bin", "genre"])}
        own = lambda v: max(v - var_g, FLOOR_SD["week"] ** 2)  # noqa: E731
        self.var_week_daypart_ = pd.Series({k: own(v[0]) for k, v in by_dp.items()})
        self.var_flight_daypart_ = pd.Series({k: v[1] for k, v in by_dp.items()})
        self.var_mid_ = pd.DataFrame([{"daypart": k[0], "size_bin": k[1], "week": own(v[0]), "flight": v[1]}
                                      for k, v in mid.items()]).set_index(["daypart", "size_bin"])
        self.var_cells_ = pd.DataFrame([{"daypart": k[0], "size_bin": k[1], "genre": k[2], "week": own(v[0]),
                                         "flight": v[1]} for k, v in cells.items()]
                                       ).set_index(["daypart", "size_bin", "genre"])

    def _fit_network(self, flights: pd.DataFrame, net: pd.DataFrame) -> pd.DataFrame:
        """Network factor: mean square of the network x fold means less what the network-week,
        flight and unit-week factors add to them. Returns `net` indexed by (fold, network) with
        that addition as column ``v``."""
        fl_var = flights["daypart"].map(self.var_flight_daypart_).astype(float)
        wk_var = flights["daypart"].map(self.var_week_daypart_).astype(float)
        inner = (fl_var + wk_var / flights["W"]).groupby([flights["fold"], flights["network"]]).mean()
        net = net.set_index(["fold", "network"])
        noise = inner.reindex(net.index).to_numpy() / net["M"].to_numpy() \
            + self.var_network_week_ / net["weeks"].to_numpy(float)
        self.var_network_ = max(float(np.mean(net["net_mean"].to_numpy() ** 2 - noise)),
                                FLOOR_SD["network"] ** 2)
        return net.assign(v=noise)

    def _fit_common(self, net: pd.DataFrame) -> None:
        """Carve the common factor out of the network factor (method of moments).

        With the refit x network means ``u[j, n]`` (column ``net_mean`` of `net`) and what the
        inner factors add to their mean squares ``v[j, n]`` (`_fit_network`), the network mean
        square is ``A = mean(u^2 - v) = c var_s + var_a`` and the mean square of the refits' means over their
        N networks is ``B = mean_j(mean_n(u)^2 - mean_n(v) / N) = c var_s + var_a / N``, with
        ``c = 1 - 1/J`` (J refits; the bias correction took out their mean shift); solved for the
        common variance var_s and the network variance var_a. Without two refits and two networks
        the two are not separable and the common factor is zero.
        """
        self.var_common_ = self.var_common_heldout_ = 0.0
        per = net.groupby(level="fold").agg(u=("net_mean", "mean"), v=("v", "mean"), N=("net_mean", "size"))
        n_refits = len(per)
        n_harm = float(n_refits / np.sum(1.0 / per["N"]))
        if n_refits < 2 or n_harm < 2:
            return
        c = 1.0 - 1.0 / n_refits
        A = float(np.mean(net["net_mean"] ** 2 - net["v"]))
        B = float(np.mean(per["u"] ** 2 - per["v"] / per["N"]))
        var_a = max((A - B) / (1.0 - 1.0 / n_harm), FLOOR_SD["network"] ** 2)
        var_s = max((B - var_a / n_harm) / c, 0.0)
        self.var_network_ = var_a
        self.var_common_heldout_ = c * var_s
        self.var_common_ = (1.0 + 1.0 / n_refits) * var_s

    def _fit_scale(self, full: pd.DataFrame) -> float:
        """One factor k on every level sd so the held-out errors' central 50/80/95% coverage is
        closest to nominal (least squares over the three levels), on the errors of `full` with
        the components fitted on them.

        The errors are heavier-tailed than normal (shocks), so sds matched to the variance give
        bands too wide in the centre; matching the quantiles that deals are priced on is what the
        normal model downstream needs. k is estimated from the same held-out errors.
        """
        vf, vw = self._cell_vars(full)
        z = np.abs(full["e"].to_numpy(float)) / np.sqrt(self.var_common_heldout_ + self.var_network_
                                                        + self.var_network_week_ + vf + vw)
        levels = np.array([0.5, 0.8, 0.95])
        q = norm.ppf(0.5 + levels / 2)
        grid = np.arange(0.5, 2.0001, 0.005)
        zs = np.sort(z)
        cover = np.searchsorted(zs, np.outer(grid, q), side="right") / len(zs)  # (grid, levels)
        loss = ((cover - levels[None, :]) ** 2).sum(axis=1)
        return float(grid[int(np.argmin(loss))])

    def _apply_scale(self, k: float) -> None:
        self.scale_ = k
        self.var_common_ *= k * k
        self.var_common_heldout_ *= k * k
        self.var_network_ *= k * k
        self.var_network_week_ *= k * k
        self.var_cells_ = self.var_cells_ * (k * k)
        self.var_mid_ = self.var_mid_ * (k * k)
        self.var_flight_daypart_ = self.var_flight_daypart_ * (k * k)
        self.var_week_daypart_ = self.var_week_daypart_ * (k * k)

    def _fit_recent(self, full: pd.DataFrame) -> None:
        """Carry-over of the recent residual: per horizon week w, the slope of
        ``log(actual / forecast)`` on ``recent`` (log(actual / fitted) just before the origin),
        within dayparts (least squares), clipped to [0, 1]. A stacked correction estimated on
        held-out errors at the real lead time (Wolpert 1992)."""
        y = np.log1p(full["rel_error"].to_numpy(float))
        r = full["recent"].to_numpy(float)
        keys = full["daypart"].astype(str) + "|" + full["week"].astype(str)
        yc = y - pd.Series(y).groupby(keys.to_numpy()).transform("mean").to_numpy()
        rc = r - pd.Series(r).groupby(keys.to_numpy()).transform("mean").to_numpy()
        wk = full["week"].to_numpy(int)
        num = pd.Series(yc * rc).groupby(wk).sum()
        den = pd.Series(rc * rc).groupby(wk).sum()
        beta = (num / den.where(den > 0)).fillna(0.0).clip(0.0, 1.0)
        self.recent_beta_ = beta.to_dict()

    def mean_factor(self, units: pd.DataFrame) -> np.ndarray:
        """Multiplier of a raw forecast: ``exp(beta_week * recent) * (1 + bias_daypart)``.

        `units` has ``daypart, week, recent``."""
        b = units["daypart"].astype(str).map(self.bias_).astype(float).fillna(0.0).to_numpy()
        return np.exp(self.recent_beta(units["week"]) * units["recent"].to_numpy(float)) * (1.0 + b)

    def recent_beta(self, week) -> np.ndarray:
        """Carry-over slope for plan week(s) `week` (1-based); the last estimated week beyond."""
        week = np.asarray(week, dtype=int)
        keys = np.array(sorted(self.recent_beta_))
        vals = np.array([self.recent_beta_[k] for k in keys])
        if len(keys) == 0:
            return np.zeros(week.shape)
        return np.interp(week, keys, vals)

    def _fit_history(self, short: pd.DataFrame, full: pd.DataFrame) -> None:
        self.full_weeks_ = float(full["history_weeks"].median()) if len(full) else 52.0
        if len(short) == 0:
            self.history_ratio_ = pd.DataFrame({"weeks": [self.full_weeks_], "ratio": [1.0]})
            return
        v_full = self._total_var(short)
        ratio = (short["e"] ** 2 / v_full).groupby(short["history_weeks"].round().astype(int)).mean()
        ratio = ratio.sort_index()
        # Non-increasing in history length, never below 1.
        vals = np.maximum.accumulate(np.maximum(ratio.to_numpy()[::-1], 1.0))[::-1]
        self.history_ratio_ = pd.DataFrame({"weeks": ratio.index.to_numpy(dtype=float), "ratio": vals})

    def size_bin(self, units: pd.DataFrame) -> np.ndarray:
        """Size class 0..3 of units from their ``size`` (log10 expected impressions; 0 if absent)."""
        if "size" not in units or len(self.size_edges_) == 0:
            return np.zeros(len(units), dtype=int)
        size = units["size"].to_numpy(float)
        size = np.where(np.isfinite(size), size, np.median(self.size_edges_))
        return np.searchsorted(self.size_edges_, size)

    def _cell_vars(self, units: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
        dp = units["daypart"].astype(str).to_numpy()
        sb = self.size_bin(units)
        genre = units["genre"].astype(str).to_numpy()
        cells = self.var_cells_.reindex(pd.MultiIndex.from_arrays([dp, sb, genre]))
        mid = self.var_mid_.reindex(pd.MultiIndex.from_arrays([dp, sb]))
        fb_f = pd.Series(dp).map(self.var_flight_daypart_).to_numpy(float)
        fb_w = pd.Series(dp).map(self.var_week_daypart_).to_numpy(float)
        allf = float(self.var_flight_daypart_.mean())
        allw = float(self.var_week_daypart_.mean())

        def pick(*cands):
            out = cands[-1]
            for c in reversed(cands[:-1]):
                out = np.where(np.isfinite(c), c, out)
            return out

        vf = pick(cells["flight"].to_numpy(float), mid["flight"].to_numpy(float), fb_f, np.full(len(dp), allf))
        vw = pick(cells["week"].to_numpy(float), mid["week"].to_numpy(float), fb_w, np.full(len(dp), allw))
        return vf, vw

    def _total_var(self, units: pd.DataFrame) -> np.ndarray:
        vf, vw = self._cell_vars(units)
        return self.var_common_heldout_ + self.var_network_ + self.var_network_week_ + vf + vw

    def history_factor(self, history_weeks) -> np.ndarray:
        """Error-variance multiplier (>= 1) for series with `history_weeks` weeks of history.

        Interpolated in log(1 + weeks) between the measured buckets and 1 at the full-history
        length of the folds; beyond it, 1.
        """
        h = np.asarray(history_weeks, dtype=float)
        weeks = self.history_ratio_["weeks"].to_numpy(float)
        ratio = self.history_ratio_["ratio"].to_numpy(float)
        if weeks[-1] < self.full_weeks_:
            weeks = np.r_[weeks, self.full_weeks_]
            ratio = np.r_[ratio, 1.0]
        return np.maximum(np.interp(np.log1p(np.maximum(h, 0.0)), np.log1p(weeks), ratio), 1.0)

    def predict(self, units: pd.DataFrame) -> pd.DataFrame:
        """Relative sds of the five level factors for forecast units.

        Parameters
        ----------
        units : ``daypart, genre, history_weeks`` and ``size`` (log10 expected impressions).

        Returns
        -------
        DataFrame ``bias, rel_sd_common, rel_sd_network, rel_sd_network_week, rel_sd_flight,
        rel_sd_week`` (fractions of the mean), aligned with `units`; each but the common one times
        the daypart's scale (`with_daypart_scale`: the common factor stays one fraction of every
        unit's mean, as the table's contract says), the common one at least the floor
        (`with_common_floor`).
        """
        dp = units["daypart"].astype(str)
        vf, vw = self._cell_vars(units)
        total = self.var_common_heldout_ + self.var_network_ + self.var_network_week_ + vf + vw
        extra = (self.history_factor(units["history_weeks"].to_numpy(float)) - 1.0) * total
        k = dp.map(self.daypart_scale_).astype(float).fillna(1.0).to_numpy() if self.daypart_scale_ \
            else np.ones(len(units))
        return pd.DataFrame({
            "bias": dp.map(self.bias_).astype(float).fillna(0.0).to_numpy(),
            "rel_sd_common": np.full(len(units), np.sqrt(max(self.var_common_, self.common_floor_var_))),
            "rel_sd_network": k * np.sqrt(self.var_network_),
            "rel_sd_network_week": k * np.sqrt(self.var_network_week_),
            "rel_sd_flight": k * np.sqrt(vf + extra),
            "rel_sd_week": k * np.sqrt(vw),
        }, index=units.index)

    def summary(self) -> dict:
        """Plain figures for meta.json."""
        return {
            "rel_sd_common": float(np.sqrt(max(self.var_common_, self.common_floor_var_))),
            "rel_sd_network": float(np.sqrt(self.var_network_)),
            "rel_sd_network_week": float(np.sqrt(self.var_network_week_)),
            "rel_sd_flight_by_daypart": {k: float(np.sqrt(v)) for k, v in self.var_flight_daypart_.items()},
            "rel_sd_week_by_daypart": {k: float(np.sqrt(v)) for k, v in self.var_week_daypart_.items()},
            "bias_by_daypart": {k: float(v) for k, v in self.bias_.items()},
            "recent_carry_over_by_week": {str(k): float(v) for k, v in self.recent_beta_.items()},
            "history_ratio": {str(int(w)): float(r) for w, r in zip(self.history_ratio_["weeks"],
                                                                    self.history_ratio_["ratio"])},
            "heldout_unit_weeks": int(self.n_rows_),
            "quantile_scale": float(self.scale_),
            "common_widened_by_sd": float(np.sqrt(self.widened_common_var_)),
            "common_floor_sd": float(np.sqrt(self.common_floor_var_)),
            "sd_scale_by_daypart": dict(self.daypart_scale_),
        }


def airing_cv(sums: np.ndarray, sumsq: np.ndarray, counts: np.ndarray, group: np.ndarray,
              prior_weeks: float = 4.0) -> np.ndarray:
    """Coefficient of variation of one airing around its unit-week level (fraction).

    Parameters
    ----------
    sums, sumsq, counts : (n_series, n_dayparts, n_weeks) of the quarter-hour-day cells of each
        daypart week (see `forecasting.dayparts.daypart_week_sums`).
    group : (n_series,) integer pool of each series (e.g. network x demo) for shrinkage.
    prior_weeks : shrinkage weight, in weeks, toward the pool.

    Returns
    -------
    cv : (n_series, n_dayparts), ``sqrt(sum_w var_w / sum_w mean_w^2)`` shrunk toward the pool,
        floored at FLOOR_SD["airing"].
    """
    ok = counts >= 4
    n = np.where(ok, counts, 1.0)
    mean = np.where(ok, sums / n, 0.0)
    var = np.where(ok, np.maximum(sumsq - sums**2 / n, 0.0) / np.maximum(n - 1.0, 1.0), 0.0)
    num = var.sum(axis=2)
    den = (mean**2).sum(axis=2)
    weeks = ok.sum(axis=2).astype(float)
    S, P = num.shape
    gnum = np.zeros((group.max() + 1, P))
    gden = np.zeros((group.max() + 1, P))
    np.add.at(gnum, group, num)
    np.add.at(gden, group, den)
    tot = num.sum(axis=0) / np.maximum(den.sum(axis=0), 1e-300)
    pool = np.where(gden > 0, gnum / np.maximum(gden, 1e-300), tot[None, :])[group]
    own = np.where(den > 0, num / np.maximum(den, 1e-300), pool)
    cv2 = (weeks * own + prior_weeks * pool) / (weeks + prior_weeks)
    return np.maximum(np.sqrt(cv2), FLOOR_SD["airing"])
