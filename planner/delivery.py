"""Uncertainty model of a plan's delivered impressions (mean, variance, probability, Monte Carlo).

One bought 30-second spot of unit i (zone x network x daypart x week) delivers

    spot_i = A * (mu_i + a_com_i Z_com + a_net_i Z_net[network] + a_nw_i Z_nw[network, week]
                  + a_flt_i Z_flt[zone, network, daypart] + a_wk_i Z_wk[i] + airing_sd_i eps),
    A ~ Bernoulli(1 - p_i)

with the Z's and eps iid standard normal (DEVELOPERS.md, "Forecast table"). For whole spots
x (one count per unit) the delivered total D has

    E[D]   = sum_i x_i (1 - p_i) mu_i
    Var[D] = ||A x||^2 + sum_i x_i [(1 - p_i) airing_sd_i^2 + p_i (1 - p_i)(mu_i^2 + level_sd_i^2)]

where A stacks the level factors (loadings times 1 - p_i); Z_com is one factor shared by
every unit. The factors, their columns and grouping keys come from
`forecasting.factors.LEVEL_FACTORS` (drawn in `DRAW_ORDER`): the five above are today's. The network-week and common loadings (`level_sd_network_week`, `level_sd_common`)
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
from typing import Sequence

import numpy as np
import pandas as pd
from scipy.special import ndtr

from forecasting.factors import DRAWN, LEVEL_FACTORS, LevelFactor

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


def loading(units: pd.DataFrame, factor: LevelFactor) -> np.ndarray:
    """The level loading (`factor.table_column`) of unit rows, impressions per spot; zeros for an
    optional factor the table lacks."""
    return optional_sd(units, factor.table_column)


def group_keys(factor: LevelFactor) -> list[str]:
    """The unit columns whose rows share one draw of `factor` in the planner: its keys without the
    demo (`LevelFactor.unit_keys`), the unit key for the unit-week's own factor."""
    keys = factor.unit_keys
    return list(UNIT_KEY) if keys is None else list(keys)


def factor_groups(units: pd.DataFrame, keys: Sequence[str]) -> tuple[np.ndarray, pd.Index]:
    """(code (n,) int64, labels): the group of each unit row under `keys`, groups numbered in the
    sorted order of the keys' values (mixed-radix combination of sorted codes); `labels` an
    Index (one key) or MultiIndex of the groups. No keys: one group for every row."""
    n = len(units)
    if not keys:
        return np.zeros(n, dtype=np.int64), pd.RangeIndex(1)
    codes, uniques = zip(*(pd.factorize(units[k], sort=True) for k in keys))
    combo = np.zeros(n, dtype=np.int64)
    sizes = [max(len(u), 1) for u in uniques]
    for c, size in zip(codes, sizes):
        combo = combo * size + c
    uniq, code = np.unique(combo, return_inverse=True)
    parts, rest = [], uniq
    for u, size in zip(reversed(uniques), reversed(sizes)):
        parts.append(np.asarray(u)[rest % size] if len(u) else np.asarray(u))
        rest = rest // size
    parts.reverse()
    if len(keys) == 1:
        return code.astype(np.int64), pd.Index(parts[0], name=keys[0])
    return code.astype(np.int64), pd.MultiIndex.from_arrays(parts, names=list(keys))


def draw_levels(mu: np.ndarray, blocks: Sequence[tuple], k: int, rng: np.random.Generator
                ) -> tuple[np.ndarray, dict]:
    """k draws of the level of each unit row, (k, n) impressions per spot, and the standard-normal
    draws of each factor drawn, {name: (k, groups)}.

    `blocks`: per level factor in draw order (`forecasting.factors.DRAWN`) ``(factor, loading
    (n,), code (n,) or None, groups)``; None: each row its own draw. A factor every table has is
    always drawn; an optional one only where some loading is not zero, so a seeded draw of a
    table without it is what it was before the factor existed.
    """
    level = mu
    z_of = {}
    for f, w, code, n in blocks:
        if f.optional and not w.any():
            continue
        z = rng.standard_normal((k, n))
        z_of[f.name] = z
        level = level + w * (z if code is None else z[:, code])
    return level, z_of


@dataclass
class FactorLoadings:
    """A plan's delivery as a linear function of the shared level factors.

    D = mean + sum_f loading_f Z_f + (independent rest with variance `linear_variance`).
    `loadings` maps each level factor's name (draw order) to its loadings in impressions per unit
    standard-normal factor, indexed by the factor's groups (`network` by network, `network_week`
    by (network, week), `flight` by (zone, network, daypart), `week` by (zone, network, daypart,
    week)); only non-zero loadings are listed. Attribute access by name (`fl.network`); a factor
    shared by every unit (`common`) reads as its one loading, a float.
    """

    mean: float
    loadings: dict
    linear_variance: float

    def __getattr__(self, name: str):
        loadings = self.__dict__.get("loadings") or {}
        if name not in loadings:
            raise AttributeError(name)
        s = loadings[name]
        if any(f.name == name and f.shared_by_all for f in LEVEL_FACTORS):
            return float(s.sum()) if len(s) else 0.0
        return s

    @property
    def quadratic_variance(self) -> float:
        """Variance from the level factors, impressions^2."""
        total = 0.0
        for s in self.loadings.values():
            total = total + (s ** 2).sum()
        return float(total)


class DeliveryModel:
    """Mean and variance of delivered impressions for spot counts `x` (shape (n,)).

    Build with `DeliveryModel.from_units(units)`; `units` has one row per unit with the
    forecast columns (`mean_impressions`, `airing_sd`, the level loadings `level_sd_<name>` of
    `forecasting.factors.LEVEL_FACTORS`, the optional ones read as zeros when absent,
    impressions per spot) and `preempt_rate` (fraction).

    `factors`: per level factor in draw order, ``(name, loading of one bought spot (n,), group
    code (n,) or None for one factor per unit, number of groups)``; `raw[name]` the loading of
    one aired spot and `labels[name]` the groups' labels.
    """

    def __init__(self, mu, airing_sd, preempt, blocks: Sequence[tuple], keys=None):
        self.mu = np.asarray(mu, dtype=float)
        self.airing_sd = np.asarray(airing_sd, dtype=float)
        self.p = np.asarray(preempt, dtype=float)
        self.n = self.mu.size
        keep = 1.0 - self.p
        self.spec = tuple(f for f, *_ in blocks)
        self.raw = {f.name: np.asarray(w, dtype=float) for f, w, _, _, _ in blocks}
        self.labels = {f.name: lab for f, _, _, _, lab in blocks}
        # Loadings of one bought spot on each factor, already times the chance it airs.
        self.factors = [(f.name, self.raw[f.name] * keep, code, n) for f, _, code, n, _ in blocks]
        self.m = keep * self.mu  # expected impressions of one bought spot
        #: level variance of one aired spot (sum of its squared raw loadings, contract order), impressions^2
        self.level_var = np.zeros(self.n)
        for f in LEVEL_FACTORS:
            if f.name in self.raw:
                self.level_var = self.level_var + self.raw[f.name] ** 2
        # Per-spot variance that is linear in x: airing noise plus preemption.
        self.v_lin = keep * self.airing_sd ** 2 + self.p * keep * (self.mu ** 2 + self.level_var)
        # Per-spot variance if every error were independent per spot (for comparison only).
        self.v_indep = keep * (self.level_var + self.airing_sd ** 2) + self.p * keep * self.mu ** 2
        self.keys = keys

    def factor(self, name: str) -> tuple:
        """(name, loading of one bought spot, code or None, groups) of the factor called `name`."""
        return next(b for b in self.factors if b[0] == name)

    @property
    def a_net(self) -> np.ndarray:
        """Loadings of one bought spot on its network factor (n,), impressions."""
        return self.factor("network")[1]

    @property
    def net_code(self) -> np.ndarray:
        """The network factor of each unit (n,), an index of `networks`."""
        return self.factor("network")[2]

    @property
    def networks(self) -> pd.Index:
        """The networks, in the order of the network factors."""
        return self.labels["network"]

    @classmethod
    def from_units(cls, units: pd.DataFrame, factors: Sequence[LevelFactor] = DRAWN) -> "DeliveryModel":
        """Build from unit rows (forecast joined with inventory); see the class docstring.
        `factors`: the level factors, in draw order (default `forecasting.factors.DRAWN`)."""
        missing = [c for c in REQUIRED if c not in units.columns]
        missing += [f.table_column for f in factors if not f.optional and f.table_column not in units.columns
                    and f.table_column not in missing]
        if missing:
            raise KeyError(f"units lack columns {missing}")
        keys = pd.MultiIndex.from_frame(units[UNIT_KEY])
        blocks = []
        for f in factors:
            if f.keys is None:  # the unit-week's own: one draw per row
                blocks.append((f, loading(units, f), None, len(units), keys))
            else:
                code, labels = factor_groups(units, group_keys(f))
                blocks.append((f, loading(units, f), code, len(labels), labels))
        return cls(units["mean_impressions"].to_numpy(float), units["airing_sd"].to_numpy(float),
                   units["preempt_rate"].to_numpy(float), blocks, keys=keys)

    # -- moments ---------------------------------------------------------------------------
    def mean(self, x) -> float:
        """Expected delivered impressions of spot counts x."""
        return float(np.dot(self.m, x))

    def factor_sums(self, x):
        """(A x) split by level factor, in draw order (`factors`): one array per factor, (groups,)
        impressions (a factor of each unit's own: (n,))."""
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
        out = {}
        for (name, _, code, n), s in zip(self.factors, self.factor_sums(x)):
            index = self.labels[name] if self.labels[name] is not None else pd.RangeIndex(n)
            ser = pd.Series(s, index=index, name="loading")
            out[name] = ser[ser != 0]
        return FactorLoadings(self.mean(x), out, self.linear_variance(x))

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
        blocks = []
        for f, (_, _, code, _) in zip(self.spec, self.factors):
            if code is None:
                blocks.append((f, self.raw[f.name][act], None, act.size))
            else:
                u, c = np.unique(code[act], return_inverse=True)
                blocks.append((f, self.raw[f.name][act], c, u.size))
        xi = np.rint(xa).astype(np.int64)
        step = max(1, int(chunk_cells // act.size))
        for start in range(0, draws, step):
            k = min(step, draws - start)
            level, _ = draw_levels(mu, blocks, k, rng)  # (k, n_act)
            if exact:
                aired = rng.binomial(xi, 1.0 - p, size=(k, act.size))
                total = (aired * level).sum(axis=1)
                noise_var = (aired * sd_air ** 2).sum(axis=1)
            else:
                total = level @ (xa * (1.0 - p))
                noise_var = (level ** 2) @ (xa * p * (1.0 - p)) + np.dot(xa * (1.0 - p), sd_air ** 2)
            out[start:start + k] = total + np.sqrt(noise_var) * rng.standard_normal(k)
        return out
