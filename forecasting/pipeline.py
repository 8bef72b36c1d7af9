"""The daypart forecaster: quarter-hour model + rolling-origin uncertainty -> forecast table.

`DaypartForecaster.fit` does, on a history cube and a plan calendar:

1. K rolling-origin refits of `ProfileForecaster` at the SAME lead time as the real forecast
   (origin = plan start - gap - k x horizon; each scores the horizon after the same gap), with a
   share of series truncated on purpose to measure how short histories degrade. Held-out errors
   of unit-week daypart means feed `LevelErrorModel`; the baselines' errors in the same folds
   give their own spreads.
2. The final `ProfileForecaster` on the whole history, predicted for the plan weeks.
3. Airing noise from the recent history's within-week dispersion (`airing_cv`).

`forecast_table` turns this into the contract table of DEVELOPERS.md ("Forecast table").

References
----------
Tashman (2000), rolling-origin evaluation; Gneiting & Raftery (2007), calibration and CRPS.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from typing import Callable, Sequence

import numpy as np
import pandas as pd
from scipy.stats import chi2, norm

from .baselines import last_year, spread_by_daypart, trailing_mean
from .candidates import SIMPLE_CANDIDATES, simple_candidates
from .dayparts import DaypartSpec, as_specs, daypart_week_means, daypart_week_sums
from .factors import LEVEL_FACTORS, TABLE_COLUMNS
from .models import ProfileForecaster
from .profiles import ProfileCube
from .scoring import coverage, total_bias_sd
from .stacking import StackedCombiner
from .uncertainty import COMPONENT_KEYS, LevelErrorModel, airing_cv, factor_components

Progress = Callable[[str, float], None]

#: the profile model's name among the candidates
PROFILE = "profile"
CANDIDATES = (PROFILE,) + SIMPLE_CANDIDATES
#: the stacking weights' prior: the two candidates that carry the season (the profile model's
#: calendar, last year's same weeks); at a horizon of months the season matters more than the
#: recent level, so the others get weight only as far as the held-out weeks earn it
SEASONAL_PRIOR = {PROFILE: 0.5, "last_year_scaled": 0.5}
YEAR_DAYS = 364
Z90 = norm.ppf(0.90)  # 1.2816 (NIST/SEMATECH table: z(0.90) = 1.2816)


def with_level_bands(table: pd.DataFrame) -> pd.DataFrame:
    """`table` (forecast-table columns) with ``level_sd`` = sqrt(sum of the level loadings squared,
    `forecasting.factors.TABLE_COLUMNS` that `table` has, summed in that order) and the 10% / 90%
    quantiles of one spot, ``mean -+ z(0.90) sqrt(level_sd^2 + airing_sd^2)`` (the 10% one
    floored at 0), all in impressions; columns set in place."""
    level_cols = [c for c in TABLE_COLUMNS if c in table]
    table["level_sd"] = np.sqrt(sum(table[c] ** 2 for c in level_cols))
    spot_sd = np.sqrt(table["level_sd"] ** 2 + table["airing_sd"] ** 2)
    mu = table["mean_impressions"]
    table["q10_impressions"] = np.maximum(mu - Z90 * spot_sd, 0.0)
    table["q90_impressions"] = mu + Z90 * spot_sd
    return table


def _daypart_sum_count(values: np.ndarray, mask) -> np.ndarray:
    """(P, 2): per daypart (axis 1 of (S, P, W) `values`), the sum and the count of the finite
    values where `mask` holds."""
    use = mask & np.isfinite(values)
    return np.stack([np.where(use, values, 0.0).sum(axis=(0, 2)), use.sum(axis=(0, 2))], axis=1)


def _noop(message: str, fraction: float) -> None:
    return None


@dataclass
class FoldResult:
    """Held-out daypart-week means of one rolling-origin refit."""

    origin: int
    actual: np.ndarray      # (S, P, W) mean rating over observed cells
    counts: np.ndarray      # (S, P, W) observed cells
    forecast: np.ndarray    # (S, P, W) model mean over the same cells
    baselines: dict = field(default_factory=dict)  # name -> (S, P, W)
    truncated: np.ndarray | None = None  # (S,) bool
    history_weeks: np.ndarray | None = None  # (S,)
    recent: np.ndarray | None = None  # (S, P) log(actual / fitted) over the last weeks before the origin
    candidates: dict = field(default_factory=dict)  # name -> (S, P, W) other candidates' means
    combined: np.ndarray | None = None  # (S, P, W) the stacked combination (set after the stacking fit)
    disagreement: float = 0.0  # variance (fraction^2) of the candidates' totals around the combination's
    mixture_var: np.ndarray | None = None  # (P, 2) sum and count of the mixture's relative variance over law rows

    def all_candidates(self) -> dict:
        """{candidate: (S, P, W) mean ratings}, the profile model's first."""
        return {PROFILE: self.forecast, **self.candidates}


def fold_origins(n_days: int, gap: int, horizon: int, n_folds: int, min_train: int) -> list[int]:
    """Origins of the rolling-origin refits (training ends just before the origin).

    Fold k trains on days [0, o_k) and is scored on [o_k + gap, o_k + gap + horizon), inside the
    history of `n_days` days. Origins step back by one horizon (windows do not overlap) when the
    history allows `n_folds` of them, else by less (at least 4 weeks) so that more folds fit.
    Returns up to `n_folds` origins, latest first; empty when not even one fits.
    """
    latest = n_days - gap - horizon
    if latest < min_train:
        return []
    room = latest - min_train
    step = horizon if n_folds <= 1 or room >= horizon * (n_folds - 1) else max(room // (n_folds - 1), 28)
    return [latest - k * step for k in range(n_folds) if latest - k * step >= min_train]


def seasonal_origin(plan_start: int, gap: int, horizon: int, min_train: int, origins: Sequence[int],
                    n_days: int) -> int | None:
    """Origin of a refit whose held-out weeks are the plan weeks one year (364 days) earlier, at the
    same lead, or None when the history cannot hold it (training shorter than `min_train`, held-out
    weeks past the history) or an origin of `origins` already sits within 28 days of it."""
    o = plan_start - YEAR_DAYS - gap
    if o < min_train or o + gap + horizon > n_days or any(abs(o - x) < 28 for x in origins):
        return None
    return o


def season_weight(origin: int, gap: int, horizon: int, plan_start: int, scale_days: float = 91.0) -> float:
    """How much a refit's held-out weeks resemble the plan weeks in season: ``exp(-(d / 91)^2)``, d
    the distance (days, on the 364-day circle) between the middles of the two windows; 1 for the
    same weeks of another year, 0.37 a quarter apart, about 0 half a year apart."""
    d = abs((origin + gap) - plan_start) % YEAR_DAYS
    d = min(d, YEAR_DAYS - d)
    return float(np.exp(-(d / scale_days) ** 2))


class DaypartForecaster:
    """Probabilistic daypart forecasts for every series of a history cube.

    Parameters
    ----------
    n_folds : rolling-origin refits for the uncertainty (at most; fewer if history is short).
    truncate_share : share of zone x network series whose history is cut short in each fold.
    truncate_weeks : history lengths (weeks) given to those series (0 = never seen).
    airing_weeks : recent weeks used for the airing-noise dispersion.
    min_train_days : a fold needs at least this many days of training history.
    min_cells : a held-out unit-week counts only with this share of its cells observed.
    recent_weeks : weeks before the origin whose residual feeds the level correction.
    model_params : keyword arguments of `ProfileForecaster`.
    seasonal_fold : add a refit whose held-out weeks are the plan weeks a year earlier, when the
        history holds it (`seasonal_origin`): the refit most like the plan weeks.
    random_state : seed of everything.

    Attributes
    ----------
    model_ : final `ProfileForecaster`; level_ : `LevelErrorModel`; folds_ : list of origins;
    plan_mean_ : (S, P, W) bias-corrected mean ratings of the plan weeks; airing_cv_ : (S, P);
    history_weeks_ : (S,); baseline_spread_ : {baseline: {daypart: rel_sd}};
    calibration_ : leave-one-fold-out coverage of the level bands; timings_ : seconds by step.
    """

    def __init__(self, n_folds: int = 3, truncate_share: float = 0.3,
                 truncate_weeks: Sequence[int] = (0, 4, 13, 26), airing_weeks: int = 52,
                 min_train_days: int = 182, min_cells: float = 0.5, recent_weeks: int = 8,
                 model_params: dict | None = None, seasonal_fold: bool = True, random_state: int = 0):
        self.n_folds = n_folds
        self.truncate_share = truncate_share
        self.truncate_weeks = tuple(truncate_weeks)
        self.airing_weeks = airing_weeks
        self.min_train_days = min_train_days
        self.min_cells = min_cells
        self.recent_weeks = recent_weeks
        self.model_params = model_params
        self.seasonal_fold = seasonal_fold
        self.random_state = random_state

    # ------------------------------------------------------------------ helpers
    def _new_model(self, seed_offset: int) -> ProfileForecaster:
        params = dict(self.model_params or {})
        params["random_state"] = self.random_state + seed_offset
        return ProfileForecaster(**params)

    def _expected_cells(self, dayparts: Sequence[DaypartSpec]) -> np.ndarray:
        return np.array([len(dp.quarter_hours) * len(dp.days) for dp in dayparts], dtype=float)

    def _recent_residual(self, model: ProfileForecaster, values: np.ndarray, day0: pd.Timestamp,
                         origin: int, dayparts) -> np.ndarray:
        """log(actual / model) of each series x daypart over the `recent_weeks` before `origin`.

        0 where the series has no observed cells there. Shape (S, P).
        """
        start = max(origin - 7 * self.recent_weeks, 0)
        days = np.arange(start, origin)
        pred = model.predict(days)
        actual = values[:, start:origin]
        wd = (day0.day_of_week + start) % 7
        starts = np.arange(0, max(origin - start - 6, 1), 7)
        a_sum, a_cnt = daypart_week_sums(actual, wd, starts, dayparts)
        p_sum, _ = daypart_week_sums(np.where(np.isfinite(actual), pred, np.nan), wd, starts, dayparts)
        a, pm, c = a_sum.sum(axis=2), p_sum.sum(axis=2), a_cnt.sum(axis=2)
        need = 0.25 * self._expected_cells(dayparts)[None, :] * len(starts)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.log(a / pm)
        return np.where((c >= need) & np.isfinite(r), r, 0.0)

    def naturally_short(self, history_weeks: np.ndarray, truncated: np.ndarray) -> np.ndarray:
        """(S,) bool: series not truncated on purpose whose history at a refit's origin is as short
        as the truncated ones' (under the longest `truncate_weeks`) and under half the refit's
        typical length: a network launched after the refit's origin, a series that started late.
        Their held-out errors join the truncated ones' (how short histories degrade, by
        ``history_weeks``) instead of the full-history units' factors, which a few unit-weeks of
        a network the refit never saw, missing by 5-10x, would otherwise inflate for every unit."""
        rest = history_weeks[~truncated]
        typical = float(np.median(rest)) if rest.size else 0.0
        return ~truncated & (history_weeks < min(float(max(self.truncate_weeks, default=0)), 0.5 * typical))

    def _run_fold(self, cube: ProfileCube, info: pd.DataFrame, dayparts, origin: int, gap: int,
                  weeks: int, k: int) -> FoldResult:
        rng = np.random.default_rng([self.random_state, 101, k])
        S = cube.n_series
        train = cube.values[:, :origin].copy()
        # Truncate a share of zone x network pairs (all their demos together).
        pair = pd.factorize(info["zone"].astype(str) + "\x1f" + info["network"].astype(str))[0]
        n_pairs = pair.max() + 1
        chosen = rng.random(n_pairs) < self.truncate_share
        lengths = rng.choice(np.asarray(self.truncate_weeks), size=n_pairs)
        truncated = chosen[pair]
        for s in np.nonzero(truncated)[0]:
            keep_from = max(origin - 7 * int(lengths[pair[s]]), 0)
            train[s, :keep_from] = np.nan
        history_weeks = np.isfinite(train).any(axis=2).sum(axis=1) / 7.0
        truncated = truncated | self.naturally_short(history_weeks, truncated)
        model = self._new_model(1000 * (k + 1)).fit(train, info, cube.day0)
        start = origin + gap
        horizon = 7 * weeks
        days = np.arange(start, start + horizon + 1)
        pred = model.predict(days).astype(np.float32)
        actual = cube.values[:, start:min(start + horizon + 1, cube.n_days)]
        if actual.shape[1] < pred.shape[1]:
            pad = np.full((S, pred.shape[1] - actual.shape[1], 96), np.nan, dtype=np.float32)
            actual = np.concatenate([actual, pad], axis=1)
        wd = (cube.day0.day_of_week + start) % 7
        starts = 7 * np.arange(weeks)
        a_mean, counts = daypart_week_means(actual, wd, starts, dayparts)
        f_mean, _ = daypart_week_means(np.where(np.isfinite(actual), pred, np.nan), wd, starts, dayparts)
        # Baselines at the same origin, from the training history only (nothing truncated).
        base = {
            "last_year": last_year(cube.values[:, :origin], cube.day0.day_of_week, start + starts, dayparts),
            "trailing_8w": trailing_mean(cube.values, cube.day0.day_of_week, origin, dayparts, weeks),
        }
        recent = self._recent_residual(model, train, cube.day0, origin, dayparts)
        cands = simple_candidates(train, cube.day0.day_of_week, origin, gap, weeks, dayparts, info,
                                  recent_weeks=self.recent_weeks, random_state=self.random_state + k)
        return FoldResult(origin, a_mean, counts, f_mean, base, truncated, history_weeks, recent, cands)

    def _errors_frame(self, folds: list[FoldResult], info: pd.DataFrame, dayparts) -> tuple[pd.DataFrame, pd.DataFrame]:
        need = self.min_cells * self._expected_cells(dayparts)[None, :, None]
        model_rows, base_rows = [], []
        names = np.array([dp.name for dp in dayparts])
        for j, f in enumerate(folds):
            fc = f.forecast if f.combined is None else f.combined
            ok = (f.counts >= need) & (fc > 0) & np.isfinite(f.actual)
            s, p, w = np.nonzero(ok)
            rel = f.actual[s, p, w] / fc[s, p, w] - 1.0
            model_rows.append(pd.DataFrame({
                "fold": j, "season_weight": self.season_weights_[j],
                "zone": info["zone"].to_numpy()[s], "network": info["network"].to_numpy()[s],
                "genre": info["genre"].to_numpy()[s], "demo": info["demo"].to_numpy()[s],
                "daypart": names[p], "week": w + 1, "rel_error": rel,
                "truncated": f.truncated[s], "history_weeks": f.history_weeks[s],
                "recent": f.recent[s, p],
                "size": np.log10(np.maximum(fc[s, p, w] * self.universe_s_[s], 1e-9))}))
            for name, fb in f.baselines.items():
                okb = (f.counts >= need) & np.isfinite(f.actual) & np.isfinite(fb) & (fb > 0) & ~f.truncated[:, None, None]
                s, p, w = np.nonzero(okb)
                base_rows.append(pd.DataFrame({"baseline": name, "daypart": names[p],
                                               "rel_error": f.actual[s, p, w] / fb[s, p, w] - 1.0}))
        errors = pd.concat(model_rows, ignore_index=True)
        base = pd.concat(base_rows, ignore_index=True) if base_rows else pd.DataFrame(
            columns=["baseline", "daypart", "rel_error"])
        return errors, base

    def _fit_combiner(self, folds: list[FoldResult], dayparts) -> StackedCombiner:
        """Stack the candidates on the refits' held-out unit-weeks of full-history series (every
        candidate finite and > 0, enough cells observed), in impressions; set each fold's
        ``combined`` from a combination weighed on the OTHER refits (cross-fitting), so the error
        law learns from errors the combination did not see, as the plan weeks' will be."""
        need = self.min_cells * self._expected_cells(dayparts)[None, :, None]
        names = np.array([dp.name for dp in dayparts])
        frames = []
        for j, f in enumerate(folds):
            cands = f.all_candidates()
            ok = (f.counts >= need) & np.isfinite(f.actual) & ~f.truncated[:, None, None]
            ok &= np.isfinite(cands[PROFILE]) & (cands[PROFILE] > 0)
            s, p, w = np.nonzero(ok)
            u = self.universe_s_[s]
            valid = {c: np.where(cands[c][s, p, w] > 0, cands[c][s, p, w] * u, np.nan) for c in CANDIDATES}
            frames.append(pd.DataFrame({"fold": j, "season_weight": self.season_weights_[j], "daypart": names[p],
                                        "actual": f.actual[s, p, w] * u, **valid}))
        rows = pd.concat(frames, ignore_index=True)
        if len(rows) < 50:
            raise ValueError("too few held-out unit-weeks to weigh the candidate forecasts")
        comb = self._new_combiner().fit(rows)
        for j, f in enumerate(folds):  # cross-fitted: refit j's combination weighed on the other refits
            others = rows[rows["fold"] != j]
            comb_j = self._new_combiner().fit(others) if len(others) >= 50 and len(folds) > 1 else comb
            f.combined = comb_j.combine(f.all_candidates(), list(names))
            f.disagreement = comb_j.disagreement(f.all_candidates(), list(names), self.universe_s_)
            mv = comb.mixture_variance(f.all_candidates(), list(names))  # one set of spreads for every refit and the plan
            f.mixture_var = _daypart_sum_count(mv, (f.counts >= need) & np.isfinite(f.actual) & ~f.truncated[:, None, None])
        return comb

    def _new_combiner(self) -> StackedCombiner:
        return StackedCombiner(CANDIDATES, prior_weights=SEASONAL_PRIOR, random_state=self.random_state)

    def combine_plan(self, profile_mean: np.ndarray) -> np.ndarray:
        """The stacked plan-week means (S, P, W) with `profile_mean` as the profile model's part
        (e.g. its daypart means over observed cells only) and the other candidates as fitted."""
        names = [dp.name for dp in self.dayparts_]
        return self.combiner_.combine({PROFILE: profile_mean, **self.plan_candidates_}, names)

    def _calibration(self, errors: pd.DataFrame, results: Sequence[FoldResult] | None = None) -> dict:
        """Leave-one-refit-out checks of the error law on the full-history units of each refit.

        For each refit j the level model is fitted on the other refits' errors, then on refit j:
        the coverage of the unit-week level bands, and the miss of the refit's total against the
        sd the law gives it (`_total_miss`, summed up by `_total_check`); with the refits' results
        (`results`) the law is carried to refit j's candidates as the shipped one is to the plan's
        (`law_scale`, the common factor at least refit j's candidate disagreement).
        """
        out = {}
        folds = sorted(errors["fold"].unique())
        if len(folds) < 2:
            return out
        cover = {lv: [] for lv in (0.5, 0.8, 0.95)}
        totals = {}
        for j in folds:
            try:
                lm = LevelErrorModel().fit(errors[errors["fold"] != j])
            except ValueError:
                continue
            if results is not None:
                r = results[int(j)]
                lm = self._carried(lm, r.mixture_var, r.disagreement, [i for i in folds if i != j], results)
            held = errors[(errors["fold"] == j) & ~errors["truncated"]]
            sd = lm.predict(held)
            tot = np.sqrt(sum(sd[col] ** 2 for col, _ in COMPONENT_KEYS))
            # actual over the corrected forecast (carry-over of the recent residual, bias)
            factor = lm.mean_factor(held)
            ratio = (1.0 + held["rel_error"]) / factor
            for lv in cover:
                cover[lv].append((coverage(ratio, 1.0, tot, lv), len(held)))
            totals[self._fold_date(j)] = self._total_miss(held, sd, factor, len(folds))
        for lv, vals in cover.items():
            if vals:
                w = np.array([n for _, n in vals], dtype=float)
                out[str(lv)] = float(np.sum([c for c, _ in vals] * w) / w.sum())
        full = errors[~errors["truncated"]]
        rms = full.groupby("fold")["rel_error"].apply(lambda x: float(np.sqrt(np.mean(x**2))))
        return {"leave_one_fold_out_coverage": out,
                "rms_relative_error_by_fold": {self._fold_date(j): v for j, v in rms.items()},
                "leave_one_fold_out_total": totals, **self._total_check(totals, len(folds))}

    @staticmethod
    def _total_miss(held: pd.DataFrame, sd: pd.DataFrame, factor: np.ndarray, n_refits: int) -> dict:
        """A held-out refit's total miss and the sd its error law gives it.

        ``bias`` = sum actual / sum corrected forecast - 1 over the refit's unit-weeks (forecast
        impressions as weights, `factor` the mean correction of the level model fitted on the
        other refits); ``bias_sd`` the exact sd of that total under the law
        (`forecasting.scoring.total_bias_sd`, each factor shared as the model says), its part
        from the factors other than the common one times sqrt(1 + 1 / (n_refits - 1)), for the
        bias correction estimated from the other refits (approximately: equal laws by refit; the
        common factor's sd already holds that part, see `forecasting.uncertainty`); ``z`` =
        bias / bias_sd (fractions).
        """
        raw = np.power(10.0, held["size"].to_numpy(float))  # the refit's forecast impressions
        weight = raw * factor
        actual = raw * (1.0 + held["rel_error"].to_numpy(float))
        comps = factor_components(held.assign(**{col: sd[col] for col, _ in COMPONENT_KEYS}))
        bias = float(actual.sum() / weight.sum() - 1.0)
        every = [f.shared_by_all for f in LEVEL_FACTORS]  # COMPONENT_KEYS follow LEVEL_FACTORS
        common = total_bias_sd(weight, [c for c, a in zip(comps, every) if a])  # the common factor
        rest2 = total_bias_sd(weight, [c for c, a in zip(comps, every) if not a]) ** 2
        law = float(np.sqrt(common ** 2 + rest2 * (1.0 + 1.0 / (n_refits - 1))))
        return {"bias": bias, "bias_sd": law, "z": bias / law if law > 0 else float("nan")}

    @staticmethod
    def _total_check(totals: dict, n_refits: int) -> dict:
        """Summary of the refits' total misses (`_total_miss` by refit).

        ``total_z_rms``; ``total_z_p``: chi-square test of sum z^2 (about independent N(0, 1)
        under the law, one degree of freedom per refit); ``total_excess_sd``: the sd of a shift
        shared by every unit of a refit, by the method of moments, E[bias^2] = bias_sd^2 +
        var_shift (1 + 1 / (n_refits - 1)) (the shift less the other refits' mean, as the bias
        correction takes it); NaN without refits.

        References
        ----------
        Pearson's chi-square test of a sum of squared standard normal deviates.
        """
        if not totals:
            return {"total_z_rms": float("nan"), "total_z_p": float("nan"), "total_excess_sd": float("nan")}
        z = np.array([t["z"] for t in totals.values()], dtype=float)
        excess = np.mean([t["bias"] ** 2 - t["bias_sd"] ** 2 for t in totals.values()]) / (1.0 + 1.0 / (n_refits - 1))
        return {"total_z_rms": float(np.sqrt(np.mean(z ** 2))),
                "total_z_p": float(chi2.sf(np.sum(z ** 2), z.size)),
                "total_excess_sd": float(np.sqrt(max(excess, 0.0)))}

    @staticmethod
    def shift_to_cover(totals: dict, n_refits: int) -> float:
        """Variance (fraction^2) of a shift shared by every unit that, added to the law, brings the
        refits' total misses to ``mean z^2 = 1`` (0 when they are already within the law).

        With ``z_j^2 = bias_j^2 / (bias_sd_j^2 + v (1 + 1 / (J - 1)))`` (the shift less the other
        refits' mean, as the bias correction takes it), ``mean_j z_j^2`` falls as v grows; v is
        found by bisection. The refits' totals are what a deal spread over every unit is exposed to:
        when they miss by more than the law allows, the law widens rather than only saying so.
        """
        if n_refits < 2 or not totals:
            return 0.0
        b2 = np.array([t["bias"] ** 2 for t in totals.values()], dtype=float)
        s2 = np.array([t["bias_sd"] ** 2 for t in totals.values()], dtype=float)
        c = 1.0 + 1.0 / (n_refits - 1)
        msz = lambda v: float(np.mean(b2 / np.maximum(s2 + c * v, 1e-300)))  # noqa: E731
        if not np.all(np.isfinite(b2)) or msz(0.0) <= 1.0:
            return 0.0
        lo, hi = 0.0, float(b2.max())
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if msz(mid) > 1.0 else (lo, mid)
        return hi

    def fold_scored_days(self) -> list[list[str]]:
        """First and last held-out day (YYYY-MM-DD) of each refit, latest first: the weeks whose
        errors the level error law was estimated on."""
        day = lambda i: str((self.day0_ + pd.Timedelta(days=int(i))).date())  # noqa: E731
        return [[day(o + self.gap_days_), day(o + self.gap_days_ + 7 * self.weeks_ - 1)] for o in self.folds_]

    def _fold_date(self, j) -> str:
        """Origin date (YYYY-MM-DD) of refit `j`."""
        return str(self.day0_ + pd.Timedelta(days=self.folds_[int(j)]))[:10]

    # ------------------------------------------------------------------ fit
    def fit(self, cube: ProfileCube, info: pd.DataFrame, dayparts, plan_start, weeks: int,
            progress: Progress | None = None, universes: pd.DataFrame | None = None) -> "DaypartForecaster":
        """Fit everything for plan weeks starting on `plan_start` (a date; weeks of 7 days).

        Parameters
        ----------
        cube : the history (`ProfileCube`), day index 0 = ``cube.day0``.
        info : ``zone, network, demo, genre`` aligned with ``cube.series``.
        dayparts : objects with ``name, days, quarter_hours``.
        plan_start : first day of plan week 1.
        weeks : number of plan weeks.
        progress : callback ``(message, fraction_done)``.
        universes : optional ``zone, demo, universe``; the level-error pools then use each unit's
            expected impressions as its size (else its expected rating).
        """
        progress = progress or _noop
        dayparts = as_specs(dayparts)
        self.dayparts_ = dayparts
        self.info_ = info.reset_index(drop=True)
        self.universe_s_ = self._series_universe(universes)
        self.weeks_ = int(weeks)
        self.day0_ = cube.day0
        T = cube.n_days
        p0 = cube.day_index(plan_start)
        self.plan_start_index_ = p0
        self.gap_days_ = max(p0 - T, 0)
        horizon = 7 * self.weeks_
        origins = fold_origins(T, self.gap_days_, horizon, self.n_folds, self.min_train_days)
        extra = seasonal_origin(p0, self.gap_days_, horizon, self.min_train_days, origins, T) \
            if self.seasonal_fold and origins else None
        origins = origins + ([extra] if extra is not None else [])
        self.season_weights_ = [season_weight(o, self.gap_days_, horizon, p0) for o in origins]
        if not origins:
            need = self.min_train_days + self.gap_days_ + horizon
            raise ValueError(f"history too short to estimate forecast uncertainty: {T} days, need at least "
                             f"{need} (training {self.min_train_days} + lead gap {self.gap_days_} + "
                             f"{self.weeks_} held-out weeks)")
        self.folds_ = origins
        timings = {}
        steps = len(origins) + 2
        folds = []
        for k, o in enumerate(origins):
            progress(f"rolling-origin refit {k + 1}/{len(origins)}", k / steps)
            t0 = time.perf_counter()
            folds.append(self._run_fold(cube, self.info_, dayparts, o, self.gap_days_, self.weeks_, k))
            timings[f"fold_{k + 1}"] = time.perf_counter() - t0
        self.combiner_ = self._fit_combiner(folds, dayparts)
        errors, base_errors = self._errors_frame(folds, self.info_, dayparts)
        self.heldout_errors_ = errors
        # what a hindcast needs of each refit (heldout_table), without the bulky candidate arrays
        self.fold_results_ = [replace(f, baselines={}, candidates={}) for f in folds]
        self.level_ = LevelErrorModel().fit(errors)
        self.calibration_ = self._calibration(errors, folds)
        shift = self.shift_to_cover(self.calibration_.get("leave_one_fold_out_total") or {}, len(origins))
        if shift > 0:
            self.level_.widen_common(shift, len(origins))
        self.baseline_spread_ = spread_by_daypart(base_errors)

        progress("final fit on the whole history", len(origins) / steps)
        t0 = time.perf_counter()
        self.model_ = self._new_model(0).fit(cube.values, self.info_, cube.day0)
        timings["final_fit"] = time.perf_counter() - t0
        progress("plan-week forecasts", (len(origins) + 1) / steps)
        t0 = time.perf_counter()
        self._predict_plan_weeks(cube, dayparts, p0)
        timings["predict"] = time.perf_counter() - t0
        self.timings_ = timings
        progress("done", 1.0)
        return self

    def _predict_plan_weeks(self, cube: ProfileCube, dayparts, p0: int) -> None:
        """The plan weeks' stacked means (``plan_mean_`` and its parts), airing noise and history
        lengths, from the final model and the candidates at the end of the history (day index p0
        starts plan week 1)."""
        T = cube.n_days
        pred = self.model_.predict(np.arange(p0, p0 + 7 * self.weeks_ + 1)).astype(np.float32)
        self.plan_pred_ = pred  # (S, 7 W + 1, 96) expected quarter-hour ratings, before bias correction
        wd = (cube.day0.day_of_week + p0) % 7
        raw_mean, _ = daypart_week_means(pred, wd, 7 * np.arange(self.weeks_), dayparts)
        self.plan_recent_ = self._recent_residual(self.model_, cube.values, cube.day0, T, dayparts)
        self.plan_candidates_ = simple_candidates(cube.values, cube.day0.day_of_week, T, self.gap_days_, self.weeks_,
                                                  dayparts, self.info_, recent_weeks=self.recent_weeks,
                                                  random_state=self.random_state)
        self.plan_raw_mean_ = raw_mean
        self.plan_combined_ = self.combine_plan(raw_mean)
        names = [dp.name for dp in dayparts]
        plan_cands = {PROFILE: raw_mean, **self.plan_candidates_}
        self.plan_disagreement_var_ = self.combiner_.disagreement(plan_cands, names, self.universe_s_)
        self.plan_mixture_var_ = _daypart_sum_count(self.combiner_.mixture_variance(plan_cands, names), True)
        self.plan_mean_ = self.plan_combined_ * self.level_factor(self.plan_recent_)
        # Airing noise: dispersion of cells within daypart weeks of the recent history.
        a_start = max(T - 7 * self.airing_weeks, 0)
        starts = np.arange(a_start, T - 6, 7) - a_start
        sums, sq, cnt = daypart_week_sums(cube.values[:, a_start:], (cube.day0.day_of_week + a_start) % 7,
                                          starts, dayparts, squares=True)
        pool = pd.factorize(self.info_["network"].astype(str) + "\x1f" + self.info_["demo"].astype(str))[0]
        self.airing_cv_ = airing_cv(sums, sq, cnt, pool)
        self.history_weeks_ = cube.history_days() / 7.0

    def _series_universe(self, universes: pd.DataFrame | None) -> np.ndarray:
        """Universe of each series (people); 1 where unknown (sizes are then ratings)."""
        if universes is None:
            return np.ones(len(self.info_))
        uni = universes[["zone", "demo", "universe"]].astype({"zone": str, "demo": str})
        u = self.info_[["zone", "demo"]].astype(str).merge(uni, on=["zone", "demo"], how="left")["universe"]
        u = u.to_numpy(float)
        return np.where(np.isfinite(u) & (u > 0), u, 1.0)

    def level_factor(self, recent: np.ndarray, law: LevelErrorModel | None = None) -> np.ndarray:
        """Multiplier (S, P, W) of the raw daypart means: recent-residual carry-over x bias (of
        `law`, default the fitted `level_`)."""
        law = self.level_ if law is None else law
        names = [dp.name for dp in self.dayparts_]
        beta = law.recent_beta(np.arange(1, self.weeks_ + 1))  # (W,)
        bias = np.array([law.bias_.get(n, 0.0) for n in names])
        return np.exp(recent[:, :, None] * beta[None, None, :]) * (1.0 + bias)[None, :, None]

    # ------------------------------------------------------------------ outputs
    def heldout_table(self, j: int, universes: pd.DataFrame, units: pd.DataFrame | None = None,
                      min_cells: float | None = None) -> pd.DataFrame:
        """The forecast table refit `j` would have shipped for its held-out weeks, with what they
        delivered: the contract table (`forecast_table`) of the stacked forecast made at that origin
        at the real lead, its mean correction and error law fitted on the OTHER refits' errors (and
        widened as the shipped law was), plus ``actual_impressions`` (the unit-week's observed mean
        rating x universe, per spot). Weeks are numbered 1..W from the first held-out week. Rows of
        series whose history the refit truncated on purpose, or with fewer than `min_cells` (share)
        of the daypart's cells observed, are left out. For replaying deals (a hindcast).

        The combination is the cross-fitted one (weighed on the other refits).
        """
        f = self.fold_results_[int(j)]
        J = len(self.fold_results_)
        law = LevelErrorModel().fit(self.heldout_errors_[self.heldout_errors_["fold"] != j])
        if self.level_.widened_common_var_ > 0:
            law.widen_common(self.level_.widened_common_var_, J - 1)
        law = self._carried(law, f.mixture_var, f.disagreement, [i for i in range(J) if i != int(j)])
        mean = f.combined * self.level_factor(f.recent, law)
        need = (self.min_cells if min_cells is None else min_cells) * self._expected_cells(self.dayparts_)
        ok = (f.counts >= need[None, :, None]) & np.isfinite(f.actual) & np.isfinite(mean) & (mean > 0)
        ok &= ~f.truncated[:, None, None]
        t = self._table(mean, f.history_weeks, universes, units, law)
        names = {dp.name: i for i, dp in enumerate(self.dayparts_)}
        s = t["series"].to_numpy()
        p = t["daypart"].map(names).to_numpy()
        w = t["week"].to_numpy() - 1
        t["actual_impressions"] = f.actual[s, p, w] * t["universe"].to_numpy(float)
        return t[ok[s, p, w]].drop(columns="series").reset_index(drop=True)

    def forecast_table(self, universes: pd.DataFrame, units: pd.DataFrame | None = None) -> pd.DataFrame:
        """The forecast table (DEVELOPERS.md, "Forecast table"), impressions per 30-second spot.

        Parameters
        ----------
        universes : ``zone, demo, universe`` (people or homes).
        units : optional ``zone, network, daypart, week`` to keep (e.g. the inventory rows);
            default every series x daypart x plan week.

        Returns
        -------
        DataFrame with ``zone, network, daypart, week, demo, universe, mean_rating,
        mean_impressions, airing_sd, level_sd``, the level loadings ``level_sd_*`` in the order of
        `forecasting.factors.LEVEL_FACTORS`, ``q10_impressions, q90_impressions, history_weeks``.
        """
        t = self._table(self.plan_mean_, self.history_weeks_, universes, units, self.plan_law())
        return t.drop(columns="series")

    def plan_law(self) -> LevelErrorModel:
        """The error law of the plan weeks: the fitted (and widened) law, scaled by daypart to the
        plan's candidates (`law_scale`), its common factor at least the candidates' disagreement
        about the plan weeks' total (`StackedCombiner.disagreement`)."""
        return self._carried(self.level_, self.plan_mixture_var_, self.plan_disagreement_var_,
                             range(len(self.fold_results_)))

    def _carried(self, law: LevelErrorModel, mixture_var: np.ndarray, disagreement: float, folds,
                 results=None) -> LevelErrorModel:
        """`law` (learned on refits `folds`) carried to a forecast (a refit, or the plan weeks) whose
        mixture variance is `mixture_var` ((P, 2) sum and count): sds scaled by daypart
        (`law_scale`), the common factor at least its candidate `disagreement` (fraction^2)."""
        return law.with_daypart_scale(self.law_scale(mixture_var, folds, results)).with_common_floor(disagreement)

    def law_scale(self, target: np.ndarray, folds, results: Sequence[FoldResult] | None = None) -> dict:
        """{daypart: sd multiplier} carrying a law learned on refits `folds` to a forecast whose
        mixture has relative variance `target` ((P, 2) sum and count, `StackedCombiner.mixture_variance`):
        ``sqrt(target mean / the refits' mean)``, within [1/2, 2]; 1 where either is unknown.

        The law is learned from the errors of the refits' combinations. Where a candidate could not
        forecast in the refits (last year's weeks before the history began) their combinations
        leaned on the others and erred more than the shipped one will, or less where the plan
        lacks one; the candidates' own held-out spreads say by how much."""
        results = self.fold_results_ if results is None else results
        pooled = np.sum([results[int(i)].mixture_var for i in folds], axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = (target[:, 0] / target[:, 1]) / (pooled[:, 0] / pooled[:, 1])
        k = np.where(np.isfinite(ratio) & (ratio > 0), np.sqrt(np.clip(ratio, 0.25, 4.0)), 1.0)
        return {dp.name: float(v) for dp, v in zip(self.dayparts_, k)}

    def _table(self, mean: np.ndarray, history_weeks: np.ndarray, universes: pd.DataFrame,
               units: pd.DataFrame | None, law: LevelErrorModel) -> pd.DataFrame:
        """Contract table of (S, P, W) mean ratings under error law `law`, with the series index
        (``series``) kept for callers that join arrays back."""
        info = self.info_
        S, P, W = mean.shape
        s, p, w = np.meshgrid(np.arange(S), np.arange(P), np.arange(W), indexing="ij")
        s, p, w = s.ravel(), p.ravel(), w.ravel()
        names = np.array([dp.name for dp in self.dayparts_])
        t = pd.DataFrame({
            "zone": info["zone"].to_numpy()[s], "network": info["network"].to_numpy()[s],
            "daypart": names[p], "week": (w + 1).astype(np.int64), "demo": info["demo"].to_numpy()[s],
            "genre": info["genre"].to_numpy()[s], "series": s,
            "mean_rating": mean[s, p, w], "history_weeks": np.round(history_weeks[s], 1),
            "cv": self.airing_cv_[s, p],
        })
        uni = universes[["zone", "demo", "universe"]].copy()
        uni["zone"] = uni["zone"].astype(str)
        uni["demo"] = uni["demo"].astype(str)
        t = t.merge(uni, on=["zone", "demo"], how="left")
        t["universe"] = t["universe"].astype(float)
        mu = t["mean_rating"].to_numpy(float) * t["universe"].to_numpy(float)
        # Size as in the folds (the fit's universes, else ratings): log10 expected impressions.
        t["size"] = np.log10(np.maximum(mean[s, p, w] * self.universe_s_[s], 1e-9))
        sd = law.predict(t)
        t["mean_impressions"] = mu
        t["airing_sd"] = t["cv"].to_numpy() * mu
        for f in LEVEL_FACTORS:
            t[f.table_column] = sd[f.rel_column].to_numpy() * mu
        t = with_level_bands(t)
        if units is not None:
            keys = units[["zone", "network", "daypart", "week"]].drop_duplicates().copy()
            keys["week"] = keys["week"].astype(np.int64)
            for c in ("zone", "network", "daypart"):
                keys[c] = keys[c].astype(str)
            t = t.merge(keys, on=["zone", "network", "daypart", "week"], how="inner")
        cols = ["zone", "network", "daypart", "week", "demo", "universe", "mean_rating", "mean_impressions",
                "airing_sd", "level_sd", *TABLE_COLUMNS, "q10_impressions", "q90_impressions", "history_weeks",
                "series"]
        return t[cols].sort_values(["zone", "network", "daypart", "week", "demo"]).reset_index(drop=True)

    def summary(self) -> dict:
        """Figures for meta.json: folds, lead gap, components, calibration, baselines' spreads."""
        return {
            "folds": len(self.folds_), "fold_origins": [str((self.day0_ + pd.Timedelta(days=o)).date())
                                                        for o in self.folds_],
            "fold_scored_days": self.fold_scored_days(),
            "lead_gap_days": int(self.gap_days_),
            "pca_components": int(self.model_.pca_.components_.shape[0]),
            "pca_explained": float(self.model_.pca_.explained_variance_ratio_.sum()),
            "level_error": self.plan_law().summary(),
            "candidates": {**self.combiner_.summary(),
                           "disagreement_sd": float(np.sqrt(self.plan_disagreement_var_)),
                           "disagreement_sd_by_refit": {self._fold_date(j): float(np.sqrt(f.disagreement))
                                                        for j, f in enumerate(self.fold_results_)}},
            "calibration": self.calibration_,
            "baseline_spread": self.baseline_spread_,
            "timings_seconds": {k: round(v, 2) for k, v in self.timings_.items()},
        }
