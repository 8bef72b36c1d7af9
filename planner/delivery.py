"""Uncertainty model of a plan's delivered impressions (mean, variance, probability, Monte Carlo).

One bought 30-second spot of unit i (zone x network x daypart x week) delivers

    spot_i = A * (mu_i + a_com_i Z_com + a_net_i Z_net[network] + a_nw_i Z_nw[network, week]
                  + a_flt_i Z_flt[zone, network, daypart] + a_wk_i Z_wk[i] + airing_sd_i eps),
    A ~ Bernoulli(1 - p_i)

with the Z's and eps iid standard normal (DEVELOPERS.md, "Forecast table"). For whole spots
x (one count per unit) the delivered total D has

    E[D]   = sum_i x_i (1 - p_i) mu_i
    Var[D] = ||A x||^2 + sum_i x_i [(1 - p_i) airing_sd_i^2 + p_i (1 - p_i)(mu_i^2 + level_sd_i^2)]

where A stacks the five level factors (loadings times 1 - p_i); Z_com is one factor shared by
every unit. The network-week and common loadings (`level_sd_network_week`, `level_sd_common`)
are optional: a forecast table without them has none. The first part is quadratic
in x (shared level errors do not average out), the second linear (per-spot noise and
preemption do). Everything here works on arrays, one entry per unit row.

References
----------
Law of total variance (conditioning on the level factors); normal approximation of a sum of
many independent and factor-correlated terms; chance constraints in the form
mu'x - z sqrt(x'Sx) >= G: Charnes & Cooper (1959), Management Science 6(1).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import ndtr

from forecasting.factors import LEVEL_FACTORS

UNIT_KEY = ["zone", "network", "daypart", "week"]
FLIGHT_KEY = ["zone", "network", "daypart"]
#: level-sd columns every forecast table has (`forecasting.factors.LEVEL_FACTORS`, not optional)
REQUIRED_LEVEL_COLS = [f.table_column for f in LEVEL_FACTORS if not f.optional]
REQUIRED = UNIT_KEY + ["mean_impressions", "airing_sd", *REQUIRED_LEVEL_COLS, "preempt_rate"]


#: level-sd columns a forecast table may lack (written before they existed): read as zeros
OPTIONAL_LEVEL_COLS = [f.table_column for f in LEVEL_FACTORS if f.optional]


def optional_sd(units: pd.DataFrame, column: str) -> np.ndarray:
    """Column `column` (one of OPTIONAL_LEVEL_COLS) of unit rows, impressions per spot; zeros
    when the forecast table was written before it existed."""
    if column in units:
        return units[column].to_numpy(float)
    return np.zeros(len(units))


def network_week_sd(units: pd.DataFrame) -> np.ndarray:
    """`level_sd_network_week` of unit rows (impressions per spot); zeros if absent."""
    return optional_sd(units, "level_sd_network_week")


def common_sd(units: pd.DataFrame) -> np.ndarray:
    """`level_sd_common` of unit rows (impressions per spot); zeros if absent."""
    return optional_sd(units, "level_sd_common")


@dataclass
class FactorLoadings:
    """A plan's delivery as a linear function of the shared level factors.

    D = mean + sum_f loading_f Z_f + (independent rest with variance `linear_variance`).
    `network` is indexed by network, `network_week` by (network, week), `flight` by (zone,
    network, daypart), `week` by (zone, network, daypart, week); loadings in impressions per
    unit standard-normal factor. Only factors with a non-zero loading are listed; `common` is
    the loading on the one factor shared by every unit.
    """

    mean: float
    network: pd.Series
    flight: pd.Series
    week: pd.Series
    linear_variance: float
    network_week: pd.Series | None = None
    common: float = 0.0

    @property
    def quadratic_variance(self) -> float:
        """Variance from the level factors, impressions^2."""
        nw = 0.0 if self.network_week is None else float((self.network_week ** 2).sum())
        return (float((self.network ** 2).sum() + (self.flight ** 2).sum() + (self.week ** 2).sum()) + nw
                + self.common ** 2)


class DeliveryModel:
    """Mean and variance of delivered impressions for spot counts `x` (shape (n,)).

    Build with `DeliveryModel.from_units(units)`; `units` has one row per unit with the
    forecast columns (`mean_impressions`, `airing_sd`, `level_sd_network`, `level_sd_flight`,
    `level_sd_week`, optionally `level_sd_network_week` and `level_sd_common`, impressions per
    spot) and
    `preempt_rate` (fraction).
    """

    def __init__(self, mu, airing_sd, w_net, w_flight, w_week, preempt, net_code, flight_code,
                 networks=None, flights=None, keys=None, w_nw=None, nw_code=None, network_weeks=None,
                 w_common=None):
        self.mu = np.asarray(mu, dtype=float)
        self.airing_sd = np.asarray(airing_sd, dtype=float)
        self.p = np.asarray(preempt, dtype=float)
        self.w_net_raw = np.asarray(w_net, dtype=float)
        self.w_flight_raw = np.asarray(w_flight, dtype=float)
        self.w_week_raw = np.asarray(w_week, dtype=float)
        self.net_code = np.asarray(net_code, dtype=np.int64)
        self.flight_code = np.asarray(flight_code, dtype=np.int64)
        self.n = self.mu.size
        self.n_net = int(self.net_code.max()) + 1 if self.n else 0
        self.n_flight = int(self.flight_code.max()) + 1 if self.n else 0
        self.w_nw_raw = np.zeros(self.n) if w_nw is None else np.asarray(w_nw, dtype=float)
        self.nw_code = self.net_code.copy() if nw_code is None else np.asarray(nw_code, dtype=np.int64)
        self.n_nw = int(self.nw_code.max()) + 1 if self.n else 0
        self.w_common_raw = np.zeros(self.n) if w_common is None else np.asarray(w_common, dtype=float)
        keep = 1.0 - self.p
        # Loadings of one bought spot on each factor, already times the chance it airs.
        self.a_net = self.w_net_raw * keep
        self.a_flight = self.w_flight_raw * keep
        self.a_week = self.w_week_raw * keep
        self.a_nw = self.w_nw_raw * keep
        self.a_common = self.w_common_raw * keep
        self.m = keep * self.mu  # expected impressions of one bought spot
        #: (name, loading of one bought spot, factor code per unit or None for one factor per
        #: unit, number of factors): every level factor, in one place
        self.factors = [("network", self.a_net, self.net_code, self.n_net),
                        ("flight", self.a_flight, self.flight_code, self.n_flight),
                        ("week", self.a_week, None, self.n),
                        ("network_week", self.a_nw, self.nw_code, self.n_nw),
                        ("common", self.a_common, np.zeros(self.n, dtype=np.int64), 1)]
        #: level variance of one aired spot (sum of its squared raw loadings), impressions^2
        self.level_var = (self.w_common_raw ** 2 + self.w_net_raw ** 2 + self.w_nw_raw ** 2
                          + self.w_flight_raw ** 2 + self.w_week_raw ** 2)
        # Per-spot variance that is linear in x: airing noise plus preemption.
        self.v_lin = keep * self.airing_sd ** 2 + self.p * keep * (self.mu ** 2 + self.level_var)
        # Per-spot variance if every error were independent per spot (for comparison only).
        self.v_indep = keep * (self.level_var + self.airing_sd ** 2) + self.p * keep * self.mu ** 2
        self.networks = networks
        self.flights = flights
        self.keys = keys
        self.network_weeks = network_weeks

    @classmethod
    def from_units(cls, units: pd.DataFrame) -> "DeliveryModel":
        """Build from unit rows (forecast joined with inventory); see the class docstring."""
        missing = [c for c in REQUIRED if c not in units.columns]
        if missing:
            raise KeyError(f"units lack columns {missing}")
        net_code, networks = pd.factorize(units["network"], sort=True)
        zc, zu = pd.factorize(units["zone"], sort=True)
        dc, du = pd.factorize(units["daypart"], sort=True)
        nn, nd = max(len(networks), 1), max(len(du), 1)
        combo = (zc.astype(np.int64) * nn + net_code) * nd + dc  # one integer per zone x network x daypart
        uniq, flight_code = np.unique(combo, return_inverse=True)
        flights = pd.MultiIndex.from_arrays(
            [np.asarray(zu)[uniq // (nn * nd)], np.asarray(networks)[(uniq // nd) % nn], np.asarray(du)[uniq % nd]],
            names=FLIGHT_KEY)
        keys = pd.MultiIndex.from_frame(units[UNIT_KEY])
        wc, wu = pd.factorize(units["week"], sort=True)
        nw_ = max(len(wu), 1)
        uniq_nw, nw_code = np.unique(net_code.astype(np.int64) * nw_ + wc, return_inverse=True)
        network_weeks = pd.MultiIndex.from_arrays(
            [np.asarray(networks)[uniq_nw // nw_], np.asarray(wu)[uniq_nw % nw_]], names=["network", "week"])
        return cls(
            units["mean_impressions"].to_numpy(float), units["airing_sd"].to_numpy(float),
            units["level_sd_network"].to_numpy(float), units["level_sd_flight"].to_numpy(float),
            units["level_sd_week"].to_numpy(float), units["preempt_rate"].to_numpy(float),
            net_code, flight_code, networks=pd.Index(networks, name="network"),
            flights=flights if len(flights) else None,
            keys=keys, w_nw=network_week_sd(units), nw_code=nw_code, network_weeks=network_weeks,
            w_common=common_sd(units),
        )

    # -- moments ---------------------------------------------------------------------------
    def mean(self, x) -> float:
        """Expected delivered impressions of spot counts x."""
        return float(np.dot(self.m, x))

    def factor_sums(self, x):
        """(A x) split by level: network (n_net,), flight (n_flight,), week (n,), network-week
        (n_nw,), common (1,) impressions."""
        x = np.asarray(x, dtype=float)
        return tuple(a * x if code is None else np.bincount(code, a * x, minlength=n)
                     for _, a, code, n in self.factors)

    def quadratic_variance(self, x) -> float:
        """||A x||^2: variance from the shared level errors, impressions^2."""
        return float(sum(s @ s for s in self.factor_sums(x)))

    def linear_variance(self, x) -> float:
        """Variance from per-spot airing noise and preemption (linear in x), impressions^2."""
        return float(np.dot(self.v_lin, x))

    def variance(self, x) -> float:
        """Total variance of delivered impressions, impressions^2."""
        return self.quadratic_variance(x) + self.linear_variance(x)

    def sd(self, x) -> float:
        """Standard deviation of delivered impressions."""
        return float(np.sqrt(self.variance(x)))

    def independent_variance(self, x) -> float:
        """Variance if every error (level too) were independent per spot: understates risk."""
        return float(np.dot(self.v_indep, x))

    def quadratic_gradient(self, x) -> np.ndarray:
        """A'A x (shape (n,)): half the gradient of ||A x||^2, impressions^2 per spot."""
        return sum(a * (s if code is None else s[code])
                   for (_, a, code, _), s in zip(self.factors, self.factor_sums(x)))

    def sd_gradient(self, x, linear_fixed: float | None = None) -> np.ndarray:
        """Gradient of sqrt(||A x||^2 + l0) in x, impressions per spot.

        `l0` is the linear variance frozen at `linear_fixed` (default: its value at x).
        """
        l0 = self.linear_variance(x) if linear_fixed is None else float(linear_fixed)
        s = np.sqrt(self.quadratic_variance(x) + l0)
        if s <= 0:
            return np.zeros(self.n)
        return self.quadratic_gradient(x) / s

    def probability(self, x, guarantee: float) -> float:
        """Normal approximation of P(D >= guarantee) = Phi((mean - G) / sd)."""
        mu, sd = self.mean(x), self.sd(x)
        if sd <= 0:
            return float(mu >= guarantee)
        return float(ndtr((mu - guarantee) / sd))

    def factor_loadings(self, x) -> FactorLoadings:
        """Per-factor aggregated loadings of the plan x (for joint draws across deals)."""
        s_net, s_flt, s_wk, s_nw, s_com = self.factor_sums(x)
        net_index = self.networks if self.networks is not None else pd.RangeIndex(self.n_net)
        nw_index = self.network_weeks if self.network_weeks is not None else pd.RangeIndex(self.n_nw)
        nw = pd.Series(s_nw, index=nw_index, name="loading")
        flt_index = self.flights if self.flights is not None else pd.RangeIndex(self.n_flight)
        wk_index = self.keys if self.keys is not None else pd.RangeIndex(self.n)
        net = pd.Series(s_net, index=net_index, name="loading")
        flt = pd.Series(s_flt, index=flt_index, name="loading")
        wk = pd.Series(s_wk, index=wk_index, name="loading")
        return FactorLoadings(self.mean(x), net[net != 0], flt[flt != 0], wk[wk != 0],
                              self.linear_variance(x), nw[nw != 0], float(s_com[0]))

    # -- Monte Carlo -----------------------------------------------------------------------
    def sample(self, x, draws: int, rng: np.random.Generator, exact: bool = False,
               chunk_cells: int = 4_000_000) -> np.ndarray:
        """Monte Carlo draws of delivered impressions, shape (draws,).

        The level factors are drawn as standard normals. `exact=False`: given the levels,
        the per-spot part is drawn as one normal with its conditional mean and variance.
        `exact=True`: each unit's aired spots K_i ~ Binomial(x_i, 1 - p_i) (a Bernoulli per
        spot) and the airing noise of the K_i airings drawn per spot (a sum of K_i iid
        normals, drawn as sqrt(K_i) airing_sd_i N(0, 1) per unit, the same distribution).
        """
        x = np.asarray(x, dtype=float)
        act = np.flatnonzero(x > 0)
        out = np.zeros(draws)
        if act.size == 0:
            return out
        xa = x[act]
        mu, p, sd_air = self.mu[act], self.p[act], self.airing_sd[act]
        wn, wf, ww = self.w_net_raw[act], self.w_flight_raw[act], self.w_week_raw[act]
        wg, wc = self.w_nw_raw[act], self.w_common_raw[act]
        net_u, net_c = np.unique(self.net_code[act], return_inverse=True)
        nw_u, nw_c = np.unique(self.nw_code[act], return_inverse=True)
        flt_u, flt_c = np.unique(self.flight_code[act], return_inverse=True)
        xi = np.rint(xa).astype(np.int64)
        step = max(1, int(chunk_cells // act.size))
        for start in range(0, draws, step):
            k = min(step, draws - start)
            z_net = rng.standard_normal((k, net_u.size))
            z_flt = rng.standard_normal((k, flt_u.size))
            z_wk = rng.standard_normal((k, act.size))
            level = mu + wn * z_net[:, net_c] + wf * z_flt[:, flt_c] + ww * z_wk  # (k, n_act)
            if wg.any():
                level += wg * rng.standard_normal((k, nw_u.size))[:, nw_c]
            if wc.any():
                level += wc * rng.standard_normal((k, 1))
            if exact:
                aired = rng.binomial(xi, 1.0 - p, size=(k, act.size))
                total = (aired * level).sum(axis=1)
                noise_var = (aired * sd_air ** 2).sum(axis=1)
            else:
                total = level @ (xa * (1.0 - p))
                noise_var = (level ** 2) @ (xa * p * (1.0 - p)) + np.dot(xa * (1.0 - p), sd_air ** 2)
            out[start:start + k] = total + np.sqrt(noise_var) * rng.standard_normal(k)
        return out
