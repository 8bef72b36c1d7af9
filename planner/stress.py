"""Monte Carlo stress test of the whole book of sold deals (finance).

Every committed deal is drawn at once from the allocator's own uncertainty model
(`planner.delivery.DeliveryModel`, the forecast table's error model): the network level factor
is shared by every deal buying that network, the common factor by every deal, the flight and
unit-week level factors by every deal holding the same units, and airing noise and preemption
are per spot. Deals sharing networks therefore fall short together, and all deals a little
together.

Fast sampler (the default). Conditional on the level factors, a deal's delivery is a sum of
many independent per-spot terms (preemption Bernoulli, airing noise), drawn as one normal with
the model's linear variance (central limit theorem; the linear variance is the conditional
variance averaged over the factors, so the total variance is exactly the allocator's, by the law
of total variance, and only the factors' second-order effect on the per-spot spread is dropped). The network factors
(few) are drawn explicitly, so the tail can be attributed to networks; the flight and unit-week
factors touch deals only through the units they hold (and the network-week and common factors
through the deals' summed loadings), so their joint contribution to the D deals, together with
the per-spot part, is a D-variate normal with covariance `B_f B_f' + B_w B_w' + B_g B_g' + b_c
b_c' + diag(linear)` drawn through a square-root factor. The cost per draw is
O(networks + deals), independent of the number of spots.

Exact sampler (`method="exact"`, validation and benchmark): every factor drawn explicitly, then
per hold row the aired spots K ~ Binomial(x, 1 - p) and the airing noise sqrt(K) sd N(0, 1), or
with `method="per_spot"` one Bernoulli and one noise draw per bought spot (the naive sampler).

Mid-flight deals. A deal rebalanced with `--commit` counts its posted impressions as delivered
and draws only its remaining holds, valued on the forecast updated from the postings the book
stored with the rebalance (the same posterior update as `planner.rebalance`; `fold_rebalanced`).

Liability per deal: `refund` = shortfall x price CPM / 1000; `makegood` = shortfall x the plan's
cost per expected impression. Book risk: expected liability, VaR and CVaR at 95%.

References
----------
Rockafellar, R. T. & Uryasev, S. (2000). Optimization of conditional value-at-risk. Journal of
Risk 2(3), 21-41 (CVaR_a = VaR_a + E[(L - VaR_a)+] / (1 - a); tail contributions
E[L_d | L >= VaR]). Glasserman, P. (2004). Monte Carlo Methods in Financial Engineering
(conditional sampling, batch-means standard errors).
"""
from __future__ import annotations

import os
import re
from dataclasses import asdict, dataclass, field
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.special import ndtr

from forecasting.factors import DRAWN, LEVEL_FACTORS
from planner.book import over_avails_warning
from planner.delivery import OPTIONAL_LEVEL_COLS, UNIT_KEY, DeliveryModel, draw_levels, group_keys, loading
from planner.errors import InputError
from planner.posterior import fold_actuals

ALPHA = 0.95
#: Monte Carlo draws of every stress of the book unless asked otherwise (pledge stress, report,
#: demo): one book, one answer. At 100,000 draws the demo book's VaR95 is USD 18,443 +- 704 and
#: its CVaR95 USD 87,340 +- 1,365 (Monte Carlo standard errors, README).
DEFAULT_DRAWS = 100_000
LIABILITY_BASES = ("refund", "makegood")
_CHUNK = 100_000
_FORECAST_COLS = ["mean_impressions", "airing_sd", *(f.table_column for f in LEVEL_FACTORS)]
#: the level factor drawn explicitly by the samplers (`BookModel.net_loadings`), to attribute the
#: book's tail to its groups; every other factor's part is drawn jointly (`BookModel.other_cov`)
EXPLICIT = "network"


# --------------------------------------------------------------------------- shocks

@dataclass(frozen=True)
class Shock:
    """A scenario shock: ratings of the matching units change by `change` (-0.15 = 15% lower).

    `kind` is "network", "daypart", "zone" or "all"; `name` the matched value (None for all).
    The whole per-spot distribution of matching units is scaled by 1 + change (mean and every sd).
    """

    kind: str
    name: str | None
    change: float

    def label(self) -> str:
        target = "all units" if self.kind == "all" else f"{self.kind} {self.name}"
        return f"{target} {self.change:+.1%}"


_SHOCK_RE = re.compile(r"^\s*(?:(network|daypart|zone)\s*=\s*([^:]+?)|(all))\s*:\s*([-+]?[0-9]*\.?[0-9]+(?:[eE][-+]?\d+)?)\s*$")


def parse_shock(text: str, *, networks: Sequence[str] | None = None, dayparts: Sequence[str] | None = None,
                zones: Sequence[str] | None = None) -> Shock:
    """Parse `network=NAME:-0.15`, `daypart=prime:-0.10`, `zone=Z:+0.05` or `all:-0.05`.

    Unknown names (when the known lists are given) and changes <= -1 raise InputError.
    """
    m = _SHOCK_RE.match(text or "")
    if not m:
        raise InputError(f"--shock {text!r}: expected network=NAME:CHANGE, daypart=NAME:CHANGE, "
                         f"zone=NAME:CHANGE or all:CHANGE with CHANGE a fraction such as -0.15")
    kind = m.group(1) or "all"
    name = m.group(2).strip() if m.group(2) else None
    change = float(m.group(4))
    if not change > -1.0:
        raise InputError(f"--shock {text!r}: change {change} would make ratings negative (must be > -1)")
    known = {"network": networks, "daypart": dayparts, "zone": zones}.get(kind)
    if name is not None and known is not None and name not in set(known):
        raise InputError(f"--shock {text!r}: unknown {kind} {name!r} (known: {', '.join(sorted(map(str, known)))})")
    return Shock(kind, name, change)


def apply_shocks(units: pd.DataFrame, shocks: Sequence[Shock] = (), preempt_multiplier: float = 1.0) -> pd.DataFrame:
    """Scale matching units' impressions and sds by (1 + change) (shocks compound) and the
    preemption rate by `preempt_multiplier` (capped at 1). Returns a new DataFrame."""
    out = units.copy()
    factor = np.ones(len(out))
    for s in shocks:
        mask = np.ones(len(out), bool) if s.kind == "all" else (out[s.kind].astype(str) == s.name).to_numpy()
        factor = np.where(mask, factor * (1.0 + s.change), factor)
    for c in _FORECAST_COLS:
        if c in out:
            out[c] = out[c].to_numpy(float) * factor
    if preempt_multiplier != 1.0:
        if preempt_multiplier < 0:
            raise InputError(f"--preempt-multiplier {preempt_multiplier:g}: must be >= 0")
        p = out["preempt_rate"].to_numpy(float)
        top = float(p.max()) if len(p) else 0.0
        if top * preempt_multiplier >= 1.0:
            raise InputError(f"--preempt-multiplier {preempt_multiplier:g}: would make preemption "
                             f"{top * preempt_multiplier:.0%} where it is {top:.0%} now; preemption must stay below "
                             f"100%, so the multiplier must be below {1 / top:.1f} for this book")
        out["preempt_rate"] = p * preempt_multiplier
    return out


# --------------------------------------------------------------------------- the book model

@dataclass
class BookModel:
    """The joint delivery model of D committed deals (impressions; money in the scenario currency).

    delivery = mean + net_loadings @ Z_net + other_factor @ Z_other, Z's iid standard normal;
    `net_loadings` (D, N) impressions per network factor; `other_cov` (D, D) the covariance of the
    flight and unit-week factors plus the per-spot (linear) variance. `rows` holds one row per
    (deal, held unit) with the per-spot parameters for the exact samplers.
    """

    deals: list[str]
    guarantee: np.ndarray
    price_cpm: np.ndarray
    cost: np.ndarray
    mean: np.ndarray
    net_loadings: np.ndarray
    networks: list[str]
    other_cov: np.ndarray
    cost_per_impression: np.ndarray
    rows: pd.DataFrame | None = None
    fixed: np.ndarray | None = None  # impressions already delivered and posted (rebalanced deals)
    warnings: list[str] = field(default_factory=list)  # cautions about this book's figures

    @property
    def revenue(self) -> np.ndarray:
        """Guarantee x CPM / 1000 per deal (currency)."""
        return self.guarantee * self.price_cpm / 1000.0

    @property
    def variance(self) -> np.ndarray:
        """Marginal variance of each deal's delivery, impressions^2."""
        return (self.net_loadings ** 2).sum(axis=1) + np.diag(self.other_cov)

    @property
    def covariance(self) -> np.ndarray:
        """Joint covariance of the deals' deliveries (D, D), impressions^2."""
        return self.net_loadings @ self.net_loadings.T + self.other_cov

    def probability_of_shortfall_normal(self) -> np.ndarray:
        """Normal approximation P(D_d < G_d) per deal (the allocator's own figure)."""
        sd = np.sqrt(self.variance)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(sd > 0, ndtr((self.guarantee - self.mean) / np.where(sd > 0, sd, 1)),
                            (self.mean < self.guarantee).astype(float))


def _row_lookup(table: pd.DataFrame, rows: pd.DataFrame, keys: Sequence[str]) -> np.ndarray:
    """Position in `table` of each row of `rows` on the columns `keys` (-1 where absent).

    Keys of `table` are unique. Text columns are coded on one shared vocabulary and combined
    into a single int64 key, which is much faster than a multi-column merge on text (a national
    book: 1.1 M holds against a 1.5 M-row forecast)."""
    combined_t = np.zeros(len(table), dtype=np.int64)
    combined_r = np.zeros(len(rows), dtype=np.int64)
    for k in keys:
        ca, uniq = pd.factorize(table[k])
        cr, uniq_r = pd.factorize(rows[k])  # code both sides, then match the (few) distinct values
        cb = np.append(pd.Index(uniq).get_indexer(uniq_r), -1)[cr]
        size = len(uniq) + 1
        cb = np.where(cb < 0, size - 1, cb)  # a value the table lacks: a code no table row has
        combined_t = combined_t * size + ca
        combined_r = combined_r * size + cb
    return pd.Index(combined_t).get_indexer(combined_r)


def book_units(deals: Sequence[Any], holds: pd.DataFrame, forecast: pd.DataFrame,
               inventory: pd.DataFrame) -> pd.DataFrame:
    """One row per (deal, held unit): holds joined with the forecast row of the deal's demo and
    the inventory's preemption rate. Columns `deal, demo, zone, network, daypart, week, spots,
    mean_impressions, airing_sd`, the level loadings `level_sd_*` (`forecasting.factors.LEVEL_FACTORS`)
    and `preempt_rate` (and the holds' `rate`, currency per spot, when they carry it)."""
    demo_of = {d.name: d.demo for d in deals}
    h = holds[holds["deal"].isin(list(demo_of))]
    units = h[["deal"] + UNIT_KEY + ["spots"] + (["rate"] if "rate" in h else [])].reset_index(drop=True)
    units.insert(1, "demo", units["deal"].map(demo_of).astype(str))
    units["week"] = units["week"].astype("int64")
    absent = {c: 0.0 for c in OPTIONAL_LEVEL_COLS if c not in forecast}  # a table from before them
    if absent:
        forecast = forecast.assign(**absent)
    fc = forecast[UNIT_KEY + ["demo"] + _FORECAST_COLS]
    at = _row_lookup(fc, units, UNIT_KEY + ["demo"])
    missing = at < 0
    if missing.any():
        r = units[missing].iloc[0]
        raise InputError(f"forecast has no row for unit {r.zone}/{r.network}/{r.daypart}/week {r.week} "
                         f"demo {r.demo} held by deal {r.deal!r} ({int(missing.sum())} such holds); "
                         f"re-fit the forecast (pledge forecast fit)")
    for c in _FORECAST_COLS:
        units[c] = fc[c].to_numpy(float)[at]
    inv = inventory[UNIT_KEY + ["preempt_rate"]]
    at = _row_lookup(inv, units, UNIT_KEY)
    rate = inv["preempt_rate"].to_numpy(float)
    units["preempt_rate"] = np.where(at >= 0, rate[np.maximum(at, 0)], 0.0)
    units["preempt_rate"] = units["preempt_rate"].fillna(0.0)
    return units


def build_book_model(deals: Sequence[Any], units: pd.DataFrame) -> BookModel:
    """Assemble the joint model from the allocator's `DeliveryModel` of every held (deal, unit) row.

    `deals` are objects with `name, guarantee, price_cpm, cost` (e.g. `planner.book.BookDeal`);
    `units` as returned by `book_units` (shocks already applied). One `DeliveryModel` over all
    rows gives each row's per-spot loadings on the common, network, network-week, flight and
    unit-week factors and its
    linear variance; times the row's spots and summed per deal and factor, they give the deals'
    loadings. Flight and week factors are keyed by the unit (not the demo), so deals in
    different demos holding the same units share them.
    """
    names = [d.name for d in deals]
    D = len(names)
    units = units.reset_index(drop=True)
    deal_c = pd.Index(names).get_indexer(units["deal"]) if len(units) else np.zeros(0, np.int64)
    if len(units) and (deal_c < 0).any():
        units = units[deal_c >= 0].reset_index(drop=True)
        deal_c = deal_c[deal_c >= 0]
    if len(units) == 0:
        z = np.zeros(D)
        return BookModel(names, np.array([float(d.guarantee) for d in deals]),
                         np.array([float(d.price_cpm) for d in deals]), np.array([float(getattr(d, "cost", 0) or 0) for d in deals]),
                         z, np.zeros((D, 0)), [], np.zeros((D, D)), z.copy(), rows=units)
    dm = DeliveryModel.from_units(units)
    x = units["spots"].to_numpy(float)
    mean = np.bincount(deal_c, dm.m * x, minlength=D)
    lin = np.bincount(deal_c, dm.v_lin * x, minlength=D)
    networks = [str(n) for n in dm.labels[EXPLICIT]]
    _, a_exp, code_exp, _ = dm.factor(EXPLICIT)
    net_load = sparse.csr_matrix((a_exp * x, (deal_c, code_exp)), shape=(D, len(networks))).toarray()
    week_c = units.groupby(UNIT_KEY, sort=False, observed=True).ngroup().to_numpy()
    other = np.diag(lin)
    for name, a, code, n in dm.factors:
        if name == EXPLICIT:  # drawn explicitly (net_load)
            continue
        if code is None:  # a unit's own: keyed by the unit, shared by deals holding it (a row is a deal x unit)
            code, n = week_c, int(week_c.max()) + 1
        B = sparse.csr_matrix((a * x, (deal_c, code)), shape=(D, n))  # duplicates are summed
        other = other + (B @ B.T).toarray()
    guarantee = np.array([float(d.guarantee) for d in deals])
    price = np.array([float(d.price_cpm) for d in deals])
    cost = np.array([float(getattr(d, "cost", None) or 0.0) for d in deals])
    plan_exp = np.array([float(getattr(d, "expected_impressions", None) or 0.0) for d in deals])
    base = np.where(plan_exp > 0, plan_exp, mean)
    with np.errstate(divide="ignore", invalid="ignore"):
        cpi = np.where(base > 0, cost / np.where(base > 0, base, 1.0), 0.0)
    return BookModel(names, guarantee, price, cost, mean, net_load, networks, other, cpi, rows=units)


def _sqrt_factor(cov: np.ndarray) -> np.ndarray:
    """F with F F' = cov for a symmetric positive semi-definite cov (eigen-decomposition)."""
    if cov.size == 0:
        return cov
    w, v = np.linalg.eigh((cov + cov.T) / 2.0)
    return v * np.sqrt(np.clip(w, 0.0, None))


# --------------------------------------------------------------------------- sampling

def fast_chunks(model: BookModel, draws: int, rng: np.random.Generator, *, chunk: int = _CHUNK):
    """Yield (delivery (k, D) float64 impressions, network factors (k, N) float32) chunks.

    Conditional-normal sampler (module docstring): cost O(draws x (N + D)), none per spot.
    Draws are made in float32 (deviations from the mean; ample for money at the cent level).
    """
    D, N = len(model.deals), len(model.networks)
    F = _sqrt_factor(model.other_cov).astype(np.float32)
    L = model.net_loadings.T.astype(np.float32)
    for start in range(0, draws, chunk):
        k = min(chunk, draws - start)
        z_net = rng.standard_normal((k, N), dtype=np.float32)
        z_other = rng.standard_normal((k, D), dtype=np.float32)
        dev = z_net @ L + z_other @ F.T
        yield model.mean + dev.astype(np.float64), z_net


def _row_blocks(model: BookModel, rows: pd.DataFrame) -> list[tuple]:
    """Per level factor in draw order, ``(factor, loading (R,), group code (R,), groups)`` of the
    book's hold rows for `planner.delivery.draw_levels`: the explicit factor's groups are the
    model's (`model.networks`); the others' are numbered in order of first appearance, keyed by
    the unit (`planner.delivery.group_keys`), so deals holding the same units share them."""
    out = []
    for f in DRAWN:
        if f.name == EXPLICIT:
            code, n = pd.Index(model.networks).get_indexer(rows["network"].astype(str)), len(model.networks)
        else:
            keys = group_keys(f)
            if keys:
                frame = rows[keys].astype({k: ("int64" if k == "week" else str) for k in keys})
                code, uniq = pd.factorize(pd.MultiIndex.from_frame(frame))
                n = len(uniq)
            else:
                code, n = np.zeros(len(rows), dtype=np.int64), 1
        out.append((f, loading(rows, f), code, n))
    return out


def exact_chunks(model: BookModel, draws: int, rng: np.random.Generator, *, per_spot: bool = False,
                 chunk_cells: int = 4_000_000):
    """Yield exact draws (delivery (k, D) float64, network factors (k, N) float32) in chunks.

    Every level factor is drawn explicitly. `per_spot=False`: per hold row K ~ Binomial(x, 1-p)
    aired spots and airing noise sqrt(K) sd N(0,1) (the same distribution as a spot-by-spot
    sum). `per_spot=True`: one Bernoulli and one airing-noise draw per bought spot (naive).
    """
    rows = model.rows
    D, N = len(model.deals), len(model.networks)
    if rows is None or rows.empty:
        for start in range(0, draws, _CHUNK):
            k = min(_CHUNK, draws - start)
            yield np.tile(model.mean, (k, 1)), rng.standard_normal((k, N)).astype(np.float32)
        return
    blocks = _row_blocks(model, rows)
    deal_c = pd.Index(model.deals).get_indexer(rows["deal"])
    mu = rows["mean_impressions"].to_numpy(float)
    sd = rows["airing_sd"].to_numpy(float)
    p = rows["preempt_rate"].to_numpy(float)
    x = np.rint(rows["spots"].to_numpy(float)).astype(np.int64)
    R = len(rows)
    if per_spot:
        spot_row = np.repeat(np.arange(R), x)
        order = np.argsort(deal_c[spot_row], kind="stable")
        spot_row = spot_row[order]
        spot_deal = deal_c[spot_row]
        present = np.unique(spot_deal)
        starts = np.searchsorted(spot_deal, present)
        width = max(spot_row.size, 1)
    else:
        agg = sparse.csr_matrix((np.ones(R), (np.arange(R), deal_c)), shape=(R, D))
        width = R
    # cells per draw: the rows (or spots) and the groups of the factors keyed below the network
    # (the explicit factor's groups and a factor shared by every unit are few)
    groups = sum(n for f, _, _, n in blocks if f.name != EXPLICIT and not f.shared_by_all)
    step = max(1, int(chunk_cells // (width + groups)))
    for start in range(0, draws, step):
        k = min(step, draws - start)
        level, z_of = draw_levels(mu, blocks, k, rng)  # (k, R)
        z_net = z_of.get(EXPLICIT, np.zeros((k, N)))
        if per_spot:
            lv = level[:, spot_row]
            aired = rng.random((k, spot_row.size)) >= p[spot_row]
            vals = aired * (lv + sd[spot_row] * rng.standard_normal((k, spot_row.size)))
            block = np.zeros((k, D))
            block[:, present] = np.add.reduceat(vals, starts, axis=1)
        else:
            aired = rng.binomial(x, 1.0 - p, size=(k, R))
            vals = aired * level + np.sqrt(aired) * sd * rng.standard_normal((k, R))
            block = np.asarray(vals @ agg)
        if model.fixed is not None:
            block = block + model.fixed
        yield block, z_net.astype(np.float32)


# --------------------------------------------------------------------------- risk measures

def var_cvar(losses: np.ndarray, alpha: float = ALPHA) -> tuple[float, float]:
    """VaR_alpha (the alpha-quantile) and CVaR_alpha = VaR + E[(L - VaR)+] / (1 - alpha).

    Units of `losses`. The Rockafellar-Uryasev form is exact for losses with atoms (many draws
    with no liability at all).

    References
    ----------
    Rockafellar & Uryasev (2000), J. Risk 2(3).
    """
    losses = np.asarray(losses, dtype=float)
    var = float(np.quantile(losses, alpha, method="inverted_cdf"))
    cvar = var + float(np.mean(np.maximum(losses - var, 0.0))) / (1.0 - alpha)
    return var, cvar


def _se_var(losses: np.ndarray, alpha: float, batches: int = 20) -> float:
    """Batch-means standard error of the VaR estimate (NaN for too few draws)."""
    n = losses.size // batches
    if n < 200:
        return float("nan")
    qs = [np.quantile(losses[i * n:(i + 1) * n], alpha, method="inverted_cdf") for i in range(batches)]
    return float(np.std(qs, ddof=1) / np.sqrt(batches))


def _se_cvar(losses: np.ndarray, var: float, alpha: float) -> float:
    """Standard error of the CVaR estimate from its influence function (L - VaR)+ / (1 - alpha)."""
    return float(np.std(np.maximum(losses - var, 0.0), ddof=1) / (1 - alpha) / np.sqrt(losses.size))


# --------------------------------------------------------------------------- the result

@dataclass
class DealStress:
    """Per-deal stress figures (impressions; money in the scenario currency)."""

    deal: str
    guarantee: float
    expected_delivery: float
    sd_delivery: float
    probability_of_shortfall: float
    probability_of_shortfall_se: float
    expected_shortfall: float
    expected_shortfall_se: float
    expected_liability: float
    expected_liability_se: float
    liability_p95: float
    revenue: float
    cost: float
    expected_margin: float
    tail_contribution: float
    probability_of_shortfall_normal: float
    cost_sd: float = 0.0  # sd of the billed cost (currency): each held spot billed only if it airs


@dataclass
class StressResult:
    """Monte Carlo stress of the book. Arrays: `delivery` and `liability` (draws, deals),
    `book_liability` (draws,); `deal_names` orders the columns."""

    draws: int
    seed: int
    method: str
    liability_basis: str
    alpha: float
    shocks: list[str]
    preempt_multiplier: float
    currency: str
    deals: list[DealStress]
    book: dict
    networks: list[dict]
    joint: dict
    deal_names: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)  # cautions about this book's figures
    delivery: np.ndarray | None = field(default=None, repr=False)
    liability: np.ndarray | None = field(default=None, repr=False)
    book_liability: np.ndarray | None = field(default=None, repr=False)

    def as_dict(self) -> dict:
        """JSON-ready summary (no per-draw arrays)."""

        return {
            "draws": self.draws, "seed": self.seed, "method": self.method,
            "liability_basis": self.liability_basis, "alpha": self.alpha, "shocks": self.shocks,
            "preempt_multiplier": self.preempt_multiplier, "currency": self.currency,
            "deals": [asdict(d) for d in self.deals], "book": self.book, "networks": self.networks,
            "joint": self.joint, "warnings": list(self.warnings),
            "caution": CAUTION,
        }


CAUTION = ("Figures are Monte Carlo estimates from forecasts of past audiences, not promises; "
           "what is owed on under-delivery is set by each contract's terms. Review with the people "
           "accountable for the money before acting on them.")


def _most_correlated_pair(model: BookModel) -> tuple[int, int] | None:
    if len(model.deals) < 2:
        return None
    cov = model.covariance
    sd = np.sqrt(np.diag(cov))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = cov / np.outer(sd, sd)
    corr = np.nan_to_num(corr, nan=-np.inf)
    np.fill_diagonal(corr, -np.inf)
    if not np.isfinite(corr).any():  # no two deals with any spread (e.g. every spot preempted)
        return None
    i, j = np.unravel_index(np.argmax(corr), corr.shape)
    return int(i), int(j)


@dataclass
class _Sums:
    """Draws consumed by `_consume`: kept arrays and per-deal sums (`n` draws)."""

    n: int
    dev: np.ndarray          # (draws, deals) float32 deviation of delivery from the mean
    znet: np.ndarray         # (draws, networks) float32 network factors
    book_liab: np.ndarray    # (draws,) book liability
    n_short: np.ndarray
    s_sf: np.ndarray
    s_sf2: np.ndarray
    s_dev: np.ndarray
    s_dev2: np.ndarray
    any_short: float
    deals_short: float
    both: float


def _consume(model: BookModel, chunks, draws: int, w: np.ndarray, pair, advance) -> _Sums:
    """Accumulate chunks of (delivery (k, deals), network factors (k, networks)) draws."""
    D, N = len(model.deals), len(model.networks)
    G = model.guarantee
    dev = np.empty((draws, D), dtype=np.float32)
    znet = np.empty((draws, N), dtype=np.float32)
    book_liab = np.empty(draws)
    n_short, s_sf, s_sf2, s_dev, s_dev2 = (np.zeros(D) for _ in range(5))
    any_short = deals_short = both = 0.0
    pos = 0
    for delivery, z in chunks:
        k = delivery.shape[0]
        d = delivery - model.mean
        dev[pos:pos + k] = d
        znet[pos:pos + k] = z
        sf = np.maximum(G - delivery, 0.0)
        short = delivery < G
        n_short += short.sum(axis=0)
        s_sf += sf.sum(axis=0)
        s_sf2 += (sf * sf).sum(axis=0)
        s_dev += d.sum(axis=0)
        s_dev2 += (d * d).sum(axis=0)
        cnt = short.sum(axis=1)
        any_short += float((cnt > 0).sum())
        deals_short += float(cnt.sum())
        if pair is not None:
            both += float((short[:, pair[0]] & short[:, pair[1]]).sum())
        book_liab[pos:pos + k] = sf @ w
        pos += k
        if advance:
            advance(k)
    return _Sums(pos, dev, znet, book_liab, n_short, s_sf, s_sf2, s_dev, s_dev2, any_short, deals_short, both)


def _tail(model: BookModel, sums: _Sums, var: float, alpha: float, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(each deal's contribution to CVaR, each network's liability-weighted level move in the tail)."""
    D, N = len(model.deals), len(model.networks)
    book_liab, n = sums.book_liab, sums.n
    # Rockafellar-Uryasev tail weights: draws above VaR count fully, the atom at VaR fractionally,
    # so the deals' contributions add up to CVaR exactly.
    above = np.flatnonzero(book_liab > var)
    at = np.flatnonzero(book_liab == var)
    n_tail = (1 - alpha) * n
    w_at = max(n_tail - above.size, 0.0) / at.size if at.size and var > 0 else 0.0
    idx = np.concatenate([above, at]) if w_at > 0 else above
    weights = np.concatenate([np.ones(above.size), np.full(at.size, w_at)]) if w_at > 0 else np.ones(above.size)
    tail_delivery = model.mean + sums.dev[idx].astype(np.float64)
    tail_sf = np.maximum(model.guarantee - tail_delivery, 0.0)
    contrib = (weights @ (tail_sf * w)) / n_tail if idx.size else np.zeros(D)
    # Network attribution: liability-weighted level move of each network in the tail draws.
    if N and idx.size:
        short_w = (tail_sf > 0) * w  # money per impression of each deal that is short
        net_move = (short_w @ -model.net_loadings) * sums.znet[idx].astype(np.float64)
        net_tail = (weights @ net_move) / weights.sum()
    else:
        net_tail = np.zeros(N)
    return contrib, net_tail


def _deal_figures(model: BookModel, sums: _Sums, w: np.ndarray, contrib: np.ndarray) -> list[DealStress]:
    """Each deal's stress figures with their Monte Carlo standard errors."""
    D, n, G = len(model.deals), sums.n, model.guarantee
    p_norm = model.probability_of_shortfall_normal()
    p = sums.n_short / n
    e_sf = sums.s_sf / n
    var_sf = np.maximum(sums.s_sf2 / n - e_sf ** 2, 0.0) * n / max(n - 1, 1)
    mean_dev = sums.s_dev / n
    sd_del = np.sqrt(np.maximum(sums.s_dev2 / n - mean_dev ** 2, 0.0) * n / max(n - 1, 1))
    q05 = np.quantile(sums.dev, 1 - 0.95, axis=0).astype(np.float64) if n else np.zeros(D)
    liab_p95 = w * np.maximum(G - (model.mean + q05), 0.0)  # liability falls as delivery rises
    deals = []
    csd = billed_cost_sd(model)
    for j, name in enumerate(model.deals):
        el = float(w[j] * e_sf[j])
        deals.append(DealStress(
            deal=name, guarantee=float(G[j]), expected_delivery=float(model.mean[j] + mean_dev[j]),
            sd_delivery=float(sd_del[j]), probability_of_shortfall=float(p[j]),
            probability_of_shortfall_se=float(np.sqrt(p[j] * (1 - p[j]) / n)),
            expected_shortfall=float(e_sf[j]), expected_shortfall_se=float(np.sqrt(var_sf[j] / n)),
            expected_liability=el, expected_liability_se=float(w[j] * np.sqrt(var_sf[j] / n)),
            liability_p95=float(liab_p95[j]), revenue=float(model.revenue[j]), cost=float(model.cost[j]),
            expected_margin=float(model.revenue[j] - model.cost[j] - el),
            tail_contribution=float(contrib[j]), probability_of_shortfall_normal=float(p_norm[j]),
            cost_sd=float(csd[j]),
        ))
    return deals


def billed_cost_sd(model: BookModel) -> np.ndarray:
    """Sd of each deal's billed cost (D,), currency: a held spot is billed only if it airs
    (Bernoulli(1 - p), common practice), so var = sum spots x rate^2 p (1 - p); zeros when the
    holds carry no rate."""
    rows = model.rows
    D = len(model.deals)
    if rows is None or not len(rows) or "rate" not in rows:
        return np.zeros(D)
    j = pd.Index(model.deals).get_indexer(rows["deal"])
    p = rows["preempt_rate"].to_numpy(float)
    v = rows["spots"].to_numpy(float) * rows["rate"].fillna(0.0).to_numpy(float) ** 2 * p * (1.0 - p)
    return np.sqrt(np.bincount(j[j >= 0], v[j >= 0], minlength=D))


def _book_figures(model: BookModel, sums: _Sums, var: float, cvar: float, alpha: float) -> dict:
    """The book's figures: expected liability, VaR and CVaR with standard errors, margins."""
    book_liab, n = sums.book_liab, sums.n
    el_book = float(book_liab.mean())
    return {
        "expected_liability": el_book,
        "expected_liability_se": float(book_liab.std(ddof=1) / np.sqrt(n)) if n > 1 else 0.0,
        "var95": var, "var95_se": _se_var(book_liab, alpha), "cvar95": cvar,
        "cvar95_se": _se_cvar(book_liab, var, alpha) if n > 1 else 0.0,
        "probability_any_shortfall": sums.any_short / n, "expected_deals_short": sums.deals_short / n,
        "revenue": float(model.revenue.sum()), "cost": float(model.cost.sum()),
        "cost_sd": float(np.sqrt(np.sum(billed_cost_sd(model) ** 2))),
        "expected_margin": float(model.revenue.sum() - model.cost.sum() - el_book),
        "liability_p99": float(np.quantile(book_liab, 0.99)),
    }


def _joint(model: BookModel, pair, sums: _Sums) -> dict:
    """The most correlated pair of deals: their correlation and chance of falling short together."""
    if pair is None:
        return {}
    i, j = pair
    cov = model.covariance
    p = sums.n_short / sums.n
    return {"deals": [model.deals[i], model.deals[j]],
            "correlation": float(cov[i, j] / np.sqrt(cov[i, i] * cov[j, j])) if cov[i, i] * cov[j, j] > 0 else 0.0,
            "probability_both_short": sums.both / sums.n, "product_if_independent": float(p[i] * p[j])}


def run_stress(model: BookModel, chunks, draws: int, *, seed: int, method: str, liability_basis: str = "refund",
               alpha: float = ALPHA, shocks: Sequence[Shock] = (), preempt_multiplier: float = 1.0,
               currency: str = "USD", keep_draws: bool = True,
               advance: Callable[[float], Any] | None = None) -> StressResult:
    """Consume chunks of draws (from `fast_chunks`/`exact_chunks`) into the stress figures.

    Per-deal moments are accumulated chunk by chunk; the book's liability per draw (draws,), the
    deviations of the deliveries from their means (float32) and the network factors (float32) are
    kept for the risk measures and the tail attribution.
    """
    w = (model.price_cpm / 1000.0) if liability_basis == "refund" else model.cost_per_impression
    pair = _most_correlated_pair(model)
    sums = _consume(model, chunks, draws, w, pair, advance)
    var, cvar = var_cvar(sums.book_liab, alpha)
    contrib, net_tail = _tail(model, sums, var, alpha, w)
    exposure = np.abs(model.net_loadings).sum(axis=0)
    networks = sorted(
        ({"network": net, "tail_liability": float(net_tail[i]), "exposure_sd": float(exposure[i])}
         for i, net in enumerate(model.networks)), key=lambda r: -r["tail_liability"])
    delivery = liability = None
    if keep_draws:
        delivery = model.mean + sums.dev.astype(np.float64)
        liability = np.maximum(model.guarantee - delivery, 0.0) * w
    return StressResult(
        draws=sums.n, seed=seed, method=method, liability_basis=liability_basis, alpha=alpha,
        shocks=[s.label() for s in shocks], preempt_multiplier=preempt_multiplier, currency=currency,
        deals=_deal_figures(model, sums, w, contrib), book=_book_figures(model, sums, var, cvar, alpha),
        networks=networks, joint=_joint(model, pair, sums), deal_names=list(model.deals),
        warnings=list(model.warnings), delivery=delivery, liability=liability, book_liability=sums.book_liab)


def available_memory() -> int:
    """Bytes of memory available to a new allocation (Linux MemAvailable; else free pages)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - no way to ask
        return 8 * 2 ** 30


def bytes_per_draw(model: BookModel, keep_draws: bool = True) -> int:
    """Memory one Monte Carlo draw holds until the end of `run_stress`: the deviations (float32
    per deal), network factors (float32 per network), the book's liability and its sorted copy
    (float64), and with `keep_draws` the deliveries and liabilities (float64 per deal, with a
    temporary of the same size)."""
    D, N = len(model.deals), len(model.networks)
    return 4 * D + 4 * N + 16 + (24 * D if keep_draws else 0)


def max_draws(model: BookModel, keep_draws: bool = True) -> int:
    """The most draws whose kept arrays fit in half the memory available (`available_memory`)."""
    return int(available_memory() // 2 // bytes_per_draw(model, keep_draws))


def stress_model(model: BookModel, *, draws: int = DEFAULT_DRAWS, seed: int = 0, method: str = "fast",
                 liability: str = "refund", shocks: Sequence[Shock] = (), preempt_multiplier: float = 1.0,
                 currency: str = "USD", keep_draws: bool = True,
                 advance: Callable[[float], Any] | None = None) -> StressResult:
    """Monte Carlo stress of a `BookModel` (`method` fast | exact | per_spot); see module docstring."""
    if draws < 2:
        raise InputError(f"--draws {draws}: need at least 2 draws")
    if liability not in LIABILITY_BASES:
        raise InputError(f"--liability {liability!r}: expected one of {', '.join(LIABILITY_BASES)}")
    limit = max_draws(model, keep_draws)
    if draws > limit:
        need = draws * bytes_per_draw(model, keep_draws)
        raise InputError(f"--draws {draws:,}: would need about {need / 2 ** 30:,.1f} GiB for this book "
                         f"({len(model.deals)} deals, {len(model.networks)} networks); at most {limit:,} draws fit "
                         f"in half the {available_memory() / 2 ** 30:,.1f} GiB of memory available")
    # SFC64: a fast, well-tested bit generator (O'Neill's PCG paper's test suite; numpy docs).
    rng = np.random.Generator(np.random.SFC64(seed))
    if method == "fast":
        chunks = fast_chunks(model, draws, rng)
    elif method in ("exact", "per_spot"):
        chunks = exact_chunks(model, draws, rng, per_spot=method == "per_spot")
    else:
        raise InputError(f"method {method!r}: expected fast, exact or per_spot")
    return run_stress(model, chunks, draws, seed=seed, method=method, liability_basis=liability,
                      shocks=shocks, preempt_multiplier=preempt_multiplier, currency=currency,
                      keep_draws=keep_draws, advance=advance)


def stale_rebalance_caution(deal: str, after_week: int) -> str:
    """The caution for a deal rebalanced before the book stored postings (one sentence)."""
    return (f"deal {deal!r} was rebalanced after week {after_week} by a pledge that did not store its posted "
            f"actuals: its remaining weeks are valued at the forecast before its posted actuals (the "
            f"rebalance valued them on the forecast updated from them); re-run `pledge rebalance SCENARIO "
            f"{deal} --actuals FILE --commit` to store them.")


def fold_rebalanced(deals: Sequence[Any], units: pd.DataFrame,
                    forecast: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Value rebalanced deals' holds on the forecast their rebalance used.

    `deals`: `planner.book.BookDeal`s (with `.summary`, `.demo`, `.postings`); `units`: rows as
    returned by `book_units` (one per deal x held unit, impressions per spot). For each deal whose
    summary has `rebalanced_after_week` and whose stored postings are not empty, its rows' forecast
    columns are replaced by the posterior update from those postings
    (`planner.posterior.fold_actuals`, the very step `rebalance_deal` takes: `level_posterior` on
    the postings joined with the demo's forecast rows, then `update_forecast`). Returns (units,
    cautions): a caution per rebalanced deal without stored postings (a book written before they
    were stored; its rows keep the prior forecast).

    Approximation: the posterior is applied to the rebalanced deal's own rows only. Other deals
    holding the same networks or units keep the prior forecast, so their means do not move with
    the evidence, and the covariance between a rebalanced deal and the others is built from its
    posterior loadings and their prior ones on shared standard-normal factors (the posterior
    correlation between factors, and any evidence from other deals' postings, is left out). Each
    rebalanced deal's own mean and variance are exactly its rebalance's (on the same forecast
    table, before shocks). Cost: one demo filter of `forecast` per rebalanced deal.
    """
    cautions: list[str] = []
    out = None
    for d in deals:
        summary = getattr(d, "summary", None) or {}
        after = summary.get("rebalanced_after_week")
        if after is None:
            continue
        posted = getattr(d, "postings", None)
        if posted is None or posted.empty:
            if summary.get("posted_unit_weeks", None) != 0:  # a rebalance on no postings has no evidence
                cautions.append(stale_rebalance_caution(d.name, int(after)))
            continue
        mask = (units["deal"] == d.name).to_numpy()
        if not mask.any():
            continue
        new = fold_actuals(forecast, posted, d.demo, rows=units.loc[mask]).forecast
        out = units.copy() if out is None else out
        for c in _FORECAST_COLS:
            out.loc[mask, c] = new[c].to_numpy(float)
    return (units if out is None else out), cautions


def book_model(scenario: Any, deals: Sequence[Any], holds: pd.DataFrame, forecast: pd.DataFrame, *,
               shocks: Sequence[str | Shock] = (), preempt_multiplier: float = 1.0) -> tuple[BookModel, list[Shock]]:
    """The (shocked) `BookModel` of committed `deals` and their `holds` (as `planner.book.read_book`
    returns them) on `forecast`. Returns (model, shocks parsed).

    A deal rebalanced with `--commit` counts its posted impressions as delivered (`fixed`) and
    only its holds after the last posted week as uncertain; those holds are valued on the
    forecast updated from its stored postings, as the rebalance valued them
    (`fold_rebalanced`, which says what is approximated). A rebalanced deal without stored
    postings (a book from before they were stored) keeps the prior forecast, and
    `model.warnings` says so, after the book's own warnings (units held over their avails).
    """
    if not deals:
        raise InputError(f"{getattr(scenario, 'path', scenario)}: the book has no committed deals "
                         f"(pledge book commit SCENARIO DEAL first)")
    inv = scenario.inventory
    parsed = [s if isinstance(s, Shock) else parse_shock(
        s, networks=inv["network"].astype(str).unique().tolist(),
        dayparts=[d.name for d in scenario.dayparts], zones=inv["zone"].astype(str).unique().tolist())
        for s in shocks]
    units = book_units(deals, holds, forecast, inv)
    # A deal rebalanced from posted actuals: its aired weeks are known (posted impressions), only
    # the weeks after them are uncertain.
    fixed = np.zeros(len(deals))
    for j, d in enumerate(deals):
        after = (getattr(d, "summary", None) or {}).get("rebalanced_after_week")
        if after is not None:
            units = units[~((units["deal"] == d.name) & (units["week"] <= int(after)))]
            fixed[j] = float(d.summary.get("delivered") or 0.0)
    units, cautions = fold_rebalanced(deals, units.reset_index(drop=True), forecast)
    units = apply_shocks(units, parsed, preempt_multiplier)
    model = build_book_model(deals, units)
    if fixed.any():
        model.mean = model.mean + fixed
        model.fixed = fixed
    model.warnings = over_avails_warning(holds.groupby(UNIT_KEY, as_index=False)["spots"].sum(), inv) + cautions
    return model, parsed
