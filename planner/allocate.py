"""The allocator: whole spots per unit at least cost, within avails and mix rules, with a risk margin.

Decision: x_i whole 30-second spots in candidate unit i (zone x network x daypart x week of the
deal's flight, in the deal's demo), 0 <= x_i <= ub_i (avails less holds, capped by
`max_spots_per_unit`). With m_i = (1 - p_i) mu_i the expected impressions of one bought spot and
T = sum_i m_i x_i the plan's total expected impressions:

- minimise   sum_i rate_i (1 - p_i) x_i, the expected billed cost: a preempted spot is not billed
  (common practice), so each bought spot costs its rate with probability 1 - p_i (its sd,
  sqrt(sum_i x_i rate_i^2 p_i (1 - p_i)), is `AllocationProblem.cost_sd`)
- network n: sum_{i in n} m_i x_i <= max_network_share * T
- daypart d: daypart_min_share[d] * T <= sum_{i in d} m_i x_i <= daypart_max_share[d] * T
- week w:    (1 - tol) T / W <= sum_{i in w} m_i x_i <= (1 + tol) T / W   ("even pacing" is the
  plan's own total expected impressions over the W flight weeks, so the rule only shapes the
  plan and never asks for extra delivery)
- risk, one of
  - pad:        T >= (1 + pad) G
  - confidence: P(D >= G) >= c with D normal:  T - z_c sqrt(q(x) + l(x)) >= G, q the quadratic
    variance of the shared level errors and l the linear variance (airing noise, preemption).

The chance constraint is met by Kelley cutting planes on the LP relaxation: the linear part is
frozen at l0 = l(x) of the current plan, tangent cuts of the convex sqrt(q(x) + l0) are added
until the condition holds at the LP solution, l0 is updated, and the loop repeats until both
settle; the integer plan is then checked against the exact condition (with l at the integer plan)
and a cut added and the MIP re-solved when it is not met.

The LP relaxation and its cut loop (and the duals used to explain binding rules) run in HiGHS
through its array API; the integer plan is solved by CBC (the binary shipped with pulp, fed an MPS
file written from the same arrays, the default) or by HiGHS (`solver="highs"`). Impressions are
scaled to thousands inside the model for conditioning.

References
----------
Charnes & Cooper (1959), Chance-constrained programming, Management Science 6(1).
Kelley (1960), The cutting-plane method for solving convex programs, J. SIAM 8(4).
Lobo, Vandenberghe, Boyd & Lebret (1998), Applications of second-order cone programming,
Linear Algebra Appl. 284.
"""
from __future__ import annotations

import ctypes
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field, replace
from typing import Sequence

import highspy
import numpy as np
import pandas as pd
import pulp
import scipy.sparse as sp
from pulp.apis import coin_api
from scipy.special import ndtri

from planner.delivery import DeliveryModel
from planner.errors import InputError
from planner.rules import EXCLUSIONS, RISK, SPOT_CAP, PlanView, Rules, Scope, explainer, row_blocks
from planner.rules import relaxations as _rule_relaxations

SCALE = 1e-3  # impressions -> thousands inside the model
INF = highspy.kHighsInf
DEFAULT_GAP = 0.005
DEFAULT_TIME_LIMIT = 60.0
LP_TIME_LIMIT_FACTOR = 10.0  # LP relaxation solves: this many times the MIP time limit ...
LP_TIME_LIMIT_FLOOR = 600.0  # ... and at least this many seconds
UNDECIDED = "undecided"  # status prefix: the solver stopped before proving either way
SOLVERS = ("cbc", "highs")


def _new_highs() -> highspy.Highs:
    """A silent HiGHS instance (its one-time banner is discarded, keeping stdout for --json)."""
    if _BANNER_DONE:
        h = highspy.Highs()
    else:
        sys.stdout.flush()
        saved = os.dup(1)
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, 1)
            os.close(devnull)
            h = highspy.Highs()
            h.setOptionValue("output_flag", False)
            try:
                ctypes.CDLL(None).fflush(None)
            except OSError:
                pass
        finally:
            os.dup2(saved, 1)
            os.close(saved)
        _BANNER_DONE.append(True)
    h.setOptionValue("output_flag", False)
    return h


_BANNER_DONE: list = []


def z_value(confidence: float) -> float:
    """Standard normal quantile z_c = Phi^-1(c) (dimensionless).

    References
    ----------
    Standard normal table, NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.1.
    """
    return float(ndtri(confidence))


@dataclass
class AllocationProblem:
    """One allocation instance, as arrays (one entry per candidate unit).

    units: DataFrame of candidate units (zone, network, daypart, week, rate, ub, capped, forecast
    columns), index 0..n-1; model: their DeliveryModel; guarantee in impressions; weeks: the flight
    weeks; scope: every in-scope unit (also those with nothing left to buy) with `ub`.
    """

    units: pd.DataFrame
    model: DeliveryModel
    guarantee: float
    rules: Rules
    weeks: tuple
    scope: pd.DataFrame | None = None

    @property
    def n(self) -> int:
        return len(self.units)

    @property
    def ub(self) -> np.ndarray:
        return self.units["ub"].to_numpy(float)

    @property
    def rate(self) -> np.ndarray:
        """Rate card price of one spot (currency, (n,))."""
        return self.units["rate"].to_numpy(float)

    @property
    def billed(self) -> np.ndarray:
        """Expected billed cost of one bought spot (currency, (n,)): rate x (1 - preempt_rate), a
        preempted spot being not billed (common practice). The allocator minimises `billed @ x`."""
        return self.rate * (1.0 - self.model.p)

    def cost_sd(self, x: np.ndarray) -> float:
        """Sd of the billed cost of spots `x` (currency): each spot airs (and is billed) or is
        preempted independently, Bernoulli(1 - p_i), so var = sum_i x_i rate_i^2 p_i (1 - p_i)."""
        p = self.model.p
        return float(np.sqrt(np.sum(np.asarray(x, float) * self.rate ** 2 * p * (1.0 - p))))


def candidate_units(units: pd.DataFrame, *, weeks, exclude_networks=(), exclude_zones=(),
                    max_spots_per_unit=None, held: pd.DataFrame | None = None) -> pd.DataFrame:
    """In-scope units of one deal with `ub` (spots that may be bought) and `capped`.

    `units`: forecast rows of the deal's demo joined with inventory (`avails`, `rate`,
    `preempt_rate`). `held`: spots held by committed deals, `zone,network,daypart,week,spots`.
    Returns all in-scope rows (ub may be 0), index reset.
    """
    scope = Scope(tuple(exclude_networks), tuple(exclude_zones), max_spots_per_unit)
    u = units[units["week"].isin(list(weeks)).to_numpy() & EXCLUSIONS.keep(scope, units)].copy()
    avail = u["avails"].to_numpy(float)
    if held is not None and len(held):
        h = held.groupby(["zone", "network", "daypart", "week"], as_index=False)["spots"].sum()
        u = u.merge(h, on=["zone", "network", "daypart", "week"], how="left")
        avail = avail - u["spots"].fillna(0).to_numpy(float)
        u = u.drop(columns="spots")
    avail = np.maximum(np.floor(avail + 1e-9), 0.0)
    ub, capped = SPOT_CAP.cap(scope, avail)
    u["ub"] = ub
    u["capped"] = capped
    return u.reset_index(drop=True)


def make_problem(scope: pd.DataFrame, guarantee: float, rules: Rules, weeks) -> AllocationProblem:
    """Problem over the units of `scope` (from `candidate_units`) that can still be bought."""
    live = scope[(scope["ub"] > 0) & (scope["mean_impressions"] > 0)].reset_index(drop=True)
    return AllocationProblem(live, DeliveryModel.from_units(live), float(guarantee), rules,
                             tuple(int(w) for w in weeks), scope)


# ---------------------------------------------------------------------------------------------
# The LP in HiGHS, built from arrays
# ---------------------------------------------------------------------------------------------
SIFT_COLUMNS = 40_000  # above this many candidate units the LP starts from a column subset
SIFT_PER_GROUP = 3  # cheapest columns kept per network x daypart x week in the first subset
SIFT_CAPACITY = 1.5  # first subset carries this multiple of the needed expected impressions
# Cold LP solves with at least this many columns (cost mode) run HiGHS's interior point method with
# crossover and no presolve. Measured on the 708,000-unit national deal (bench/RESULTS.md): its
# first 83,721-column LP took 41.6 s with the defaults (presolve 18 s, then a dual simplex whose
# bound-flipping iterations over many boxed columns take seconds each), 6.1 s by dual simplex
# without presolve and 1.4 s by interior point. Warm re-solves after a cut stay on the dual simplex
# (0.05-0.1 s each there).
IPM_COLUMNS = 20_000


class _Model:
    """The LP relaxation of one problem in HiGHS; `mode` 'cost' (min cost) or 'max' (max G).

    Solutions are handled in a canonical layout [x (n,), T, (G)] whatever the HiGHS column order
    (HiGHS holds T, G first and then only the `active` x columns). For large problems the LP starts
    from a subset of columns and prices the rest from the duals (column generation / sifting).
    """

    def __init__(self, prob: AllocationProblem, mode: str = "cost", time_limit: float = DEFAULT_TIME_LIMIT,
                 columns: np.ndarray | None = None):
        t0 = time.perf_counter()
        self.prob, self.mode = prob, mode
        r = prob.rules
        n = prob.n
        u = prob.units
        m = prob.model.m * SCALE
        self.m = m
        self.iT = n
        self.iG = n + 1 if mode == "max" else None
        self.off = 1 + (mode == "max")  # HiGHS columns: T, (G), then active x
        rows, cols, vals, lo, hi, labels = [], [], [], [], [], []
        t_rows, t_vals = [], []
        nrow = 0

        def block(row_of_x, k, coef_T, lower, upper, names):
            # rows nrow..nrow+k-1: sum m_i x_i over the group of i  + coef_T[j] * T
            nonlocal nrow
            sel = row_of_x >= 0
            rows.append(nrow + row_of_x[sel]); cols.append(np.flatnonzero(sel)); vals.append(m[sel])
            t_rows.append(nrow + np.arange(k)); t_vals.append(np.asarray(coef_T, float))
            lo.append(np.asarray(lower, float)); hi.append(np.asarray(upper, float))
            labels.extend(names)
            nrow += k

        # T definition: sum m x - T = 0
        block(np.zeros(n, dtype=np.int64), 1, [-1.0], [0.0], [0.0], [("total", None)])
        for b in row_blocks(r, u, prob.weeks):  # every rule's rows (planner.rules), in rule order
            block(b.group, len(b.keys), b.t_coef, b.lower, b.upper, b.labels)
        # Risk base row on T (and G in max mode).
        G = prob.guarantee * SCALE
        factor, risk_label = RISK.base_row(r)
        t_rows.append(np.array([nrow])); t_vals.append(np.array([1.0]))
        g_entry = None
        if mode == "cost":
            lo.append(np.array([factor * G]))
        else:
            lo.append(np.array([0.0]))
            g_entry = (nrow, -factor)
        hi.append(np.array([INF]))
        labels.append((risk_label, None))
        nrow += 1
        self.A = sp.csc_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(nrow, n))
        self.A.sum_duplicates()
        self.A_T = self.A.T.tocsr()  # for pricing: A^T y
        self.cost_x = prob.billed if mode == "cost" else np.zeros(n)
        self.labels = labels
        self.n_struct = nrow
        self.row_lo, self.row_hi = np.concatenate(lo), np.concatenate(hi)
        self.cuts: list[tuple[np.ndarray, np.ndarray, float]] = []  # (nz, x[nz], l0) per cut row
        self.cut_points = self.cuts
        self.n_cuts_total = 0
        self.time_limit = time_limit
        # LP relaxations get a longer limit than one MIP solve: a verdict rests on them.
        self.lp_time_limit = max(LP_TIME_LIMIT_FACTOR * float(time_limit), LP_TIME_LIMIT_FLOOR)
        self.stopped = False
        self.last_status = ""
        if columns is None:
            columns = np.arange(n) if n <= SIFT_COLUMNS else self._first_columns()
        self.active = np.asarray(columns, dtype=np.int64)
        self.pos = np.full(n, -1, dtype=np.int64)
        self.pos[self.active] = np.arange(self.active.size)
        self._pass_model(t_rows, t_vals, g_entry, nrow, time_limit)
        self.build_seconds = time.perf_counter() - t0

    def _pass_model(self, t_rows: list, t_vals: list, g_entry, nrow: int, time_limit: float) -> None:
        """Hand the LP to HiGHS: the T (and G) columns, then the active x columns, column-wise."""
        prob, mode = self.prob, self.mode
        tcol = sp.csc_matrix((np.concatenate(t_vals), (np.concatenate(t_rows), np.zeros(sum(map(len, t_rows)), int))),
                             shape=(nrow, 1))
        blocks = [tcol]
        if mode == "max":
            blocks.append(sp.csc_matrix(([g_entry[1]], ([g_entry[0]], [0])), shape=(nrow, 1)))
        blocks.append(self.A[:, self.active])
        M = sp.hstack(blocks, format="csc")
        ncol = M.shape[1]
        cost = np.zeros(ncol)
        upper = np.full(ncol, INF)
        upper[self.off:] = prob.ub[self.active]
        cost[self.off:] = self.cost_x[self.active]
        if mode == "max":
            cost[1] = -1.0
        lp = highspy.HighsLp()
        lp.num_col_, lp.num_row_ = ncol, nrow
        lp.col_cost_, lp.col_lower_, lp.col_upper_ = cost, np.zeros(ncol), upper
        lp.row_lower_, lp.row_upper_ = self.row_lo, self.row_hi
        lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
        lp.a_matrix_.start_, lp.a_matrix_.index_, lp.a_matrix_.value_ = M.indptr, M.indices, M.data
        lp.a_matrix_.num_col_, lp.a_matrix_.num_row_ = ncol, nrow
        self.h = _new_highs()
        self.h.setOptionValue("time_limit", float(time_limit))
        self.h.passModel(lp)
        self.ncol = ncol
        self.warm = False  # a basis from the last optimal solve is still a good start

    # -- columns -------------------------------------------------------------------------------
    @property
    def complete(self) -> bool:
        return self.active.size == self.prob.n

    def _first_columns(self, capacity: float | None = None) -> np.ndarray:
        """The first column subset: in every network x daypart x week group the cheapest columns
        (cost per expected impression) up to a common rank, the rank chosen so the subset carries
        `capacity` (default SIFT_CAPACITY) times the expected impressions the deal needs; at least
        SIFT_PER_GROUP per group. Within a group the rows are the same, so the LP fills the
        cheapest first (exactly so for a pad, nearly so with cuts; pricing restores the rest)."""
        prob = self.prob
        dm = prob.model
        u = prob.units
        capacity = SIFT_CAPACITY if capacity is None else capacity
        cpi = np.where(dm.m > 0, prob.billed / np.maximum(dm.m, 1e-12), np.inf)
        g = pd.factorize(pd.MultiIndex.from_frame(u[["network", "daypart", "week"]]))[0]
        order = np.lexsort((cpi, g))
        gs = g[order]
        start = np.r_[0, np.flatnonzero(np.diff(gs)) + 1]
        rank = np.arange(gs.size) - np.repeat(start, np.diff(np.r_[start, gs.size]))
        cap = (dm.m * prob.ub)[order]
        by_rank = np.bincount(rank, cap)
        need = capacity * (1 + (prob.rules.pad or 0.0)) * prob.guarantee
        r = int(np.searchsorted(np.cumsum(by_rank), need)) + 1
        r = max(r, SIFT_PER_GROUP)
        return np.sort(order[rank < r])

    def _cut_coef(self, nz, v, l0, idx=None) -> tuple[np.ndarray, float]:
        """Coefficients of one cut on x (all n, or `idx`) and its right-hand side (model units)."""
        dm, z = self.prob.model, z_value(self.prob.rules.confidence)
        x = np.zeros(self.prob.n)
        x[nz] = v
        s = math.sqrt(max(dm.quadratic_variance(x) + l0, 1e-300))
        g = dm.quadratic_gradient(x) / s
        coef = (dm.m - z * g) * SCALE
        rhs = z * l0 / s * SCALE
        return (coef if idx is None else coef[idx]), rhs

    def add_columns(self, new: np.ndarray) -> None:
        """Bring columns `new` (global indices) into the HiGHS model with their cut entries."""
        new = np.asarray(new, dtype=np.int64)
        if new.size == 0:
            return
        sub = self.A[:, new].tocoo()
        r_idx, c_idx, vals = [sub.row], [sub.col], [sub.data]
        for k, (nz, v, l0) in enumerate(self.cuts):
            coef, _ = self._cut_coef(nz, v, l0, new)
            keep = np.flatnonzero(coef != 0)
            r_idx.append(np.full(keep.size, self.n_struct + k)); c_idx.append(keep); vals.append(coef[keep])
        M = sp.csc_matrix((np.concatenate(vals), (np.concatenate(r_idx), np.concatenate(c_idx))),
                          shape=(self.h.getNumRow(), new.size))
        self.h.addCols(new.size, self.cost_x[new], np.zeros(new.size), self.prob.ub[new], M.nnz,
                       M.indptr[:-1].astype(np.int32), M.indices.astype(np.int32), M.data)
        self.pos[new] = self.active.size + np.arange(new.size)
        self.active = np.concatenate([self.active, new])
        self.ncol = self.h.getNumCol()
        self.warm = False  # new columns priced in with negative reduced costs: start afresh

    def reduced_costs(self) -> np.ndarray:
        """Reduced cost c - A^T y of every x column (n,) from the current duals (model units)."""
        y = np.asarray(self.h.getSolution().row_dual)
        rc = self.cost_x - self.A_T @ y[: self.n_struct]
        for k, (nz, v, l0) in enumerate(self.cuts):
            yk = y[self.n_struct + k]
            if yk != 0:
                coef, _ = self._cut_coef(nz, v, l0)
                rc = rc - yk * coef
        return rc

    def price(self, max_add: int | None = None) -> int:
        """Add the inactive columns with negative reduced cost (most negative first); return count."""
        if self.complete:
            return 0
        rc = self.reduced_costs()
        scale = max(float(np.max(np.abs(self.cost_x))) if self.mode == "cost" else 1.0, 1e-12)
        cand = np.flatnonzero((self.pos < 0) & (rc < -1e-9 * scale))
        if cand.size == 0:
            return 0
        k = max_add or max(5_000, self.active.size // 2)
        if cand.size > k:
            cand = cand[np.argpartition(rc[cand], k - 1)[:k]]
        self.add_columns(np.sort(cand))
        return int(cand.size)

    def add_all_columns(self) -> None:
        self.add_columns(np.flatnonzero(self.pos < 0))

    def canonical(self, hcol) -> np.ndarray:
        """HiGHS column values -> [x (n,), T, (G)]."""
        hcol = np.asarray(hcol)
        out = np.zeros(self.prob.n + self.off)
        out[self.active] = hcol[self.off: self.off + self.active.size]
        out[self.prob.n] = hcol[0]
        if self.mode == "max":
            out[self.prob.n + 1] = hcol[1]
        return out

    # -- LP solves ---------------------------------------------------------------------------
    def solve(self):
        """Solve the current LP; return (ok, canonical solution, objective).

        A solve the solver stopped before an answer (time or iteration limit) is remembered in
        `stopped`, so that it is never reported as infeasibility.
        """
        self.h.setOptionValue("time_limit", float(self.lp_time_limit))
        cold_large = not self.warm and self.mode == "cost" and self.ncol >= IPM_COLUMNS
        self.h.setOptionValue("solver", "ipm" if cold_large else "simplex")
        self.h.setOptionValue("presolve", "off" if cold_large else "choose")
        self.h.run()
        st = self.h.getModelStatus()
        self.last_status = self.h.modelStatusToString(st)
        self.warm = st == highspy.HighsModelStatus.kOptimal
        if st != highspy.HighsModelStatus.kOptimal:
            if st not in (highspy.HighsModelStatus.kInfeasible, highspy.HighsModelStatus.kUnboundedOrInfeasible):
                self.stopped = True
            return False, None, None
        return True, self.canonical(self.h.getSolution().col_value), self.h.getInfo().objective_function_value

    def add_cut(self, x: np.ndarray, l0: float, store: bool = True) -> None:
        """Tangent cut of T - z sqrt(q + l0) >= G (or >= G_var) at spots x (canonical or (n,))."""
        x = np.asarray(x, float)[: self.prob.n]
        nz = np.flatnonzero(x > 1e-12)
        coef, rhs = self._cut_coef(nz, x[nz], l0, self.active)
        idx = (self.off + np.flatnonzero(coef != 0)).astype(np.int32)
        val = coef[coef != 0]
        if self.mode == "cost":
            lower = self.prob.guarantee * SCALE + rhs
        else:
            idx = np.append(idx, np.int32(1))
            val = np.append(val, -1.0)
            lower = rhs
        self.h.addRow(float(lower), INF, len(idx), idx, val)
        self.n_cuts_total += 1
        if store:
            self.cuts.append((nz, x[nz].copy(), float(l0)))

    def reset_cuts(self, l0: float) -> None:
        """Re-derive every stored cut with a new frozen linear variance l0."""
        k = self.h.getNumRow() - self.n_struct
        if k > 0:
            self.h.deleteRows(k, np.arange(self.n_struct, self.n_struct + k, dtype=np.int32))
        old, self.cuts = self.cuts, []
        self.cut_points = self.cuts
        self.warm = False  # rows deleted: the basis is no longer a good start
        for nz, v, _ in old:
            x = np.zeros(self.prob.n)
            x[nz] = v
            self.add_cut(x, l0)

    def row_duals(self) -> np.ndarray:
        return np.asarray(self.h.getSolution().row_dual)

    def row_values(self) -> np.ndarray:
        return np.asarray(self.h.getSolution().row_value)

    def x_columns(self) -> np.ndarray:
        """HiGHS indices of the active x columns (int32)."""
        return (self.off + np.arange(self.active.size)).astype(np.int32)


def _slack(prob: AllocationProblem, x: np.ndarray, l0: float | None, target: float) -> float:
    """T - z sqrt(q + l) - target in impressions (l frozen at l0, or exact when None)."""
    dm = prob.model
    l = dm.linear_variance(x) if l0 is None else l0
    return dm.mean(x) - z_value(prob.rules.confidence) * math.sqrt(dm.quadratic_variance(x) + l) - target


@dataclass
class LPResult:
    """LP relaxation (with its cuts) of one problem."""

    ok: bool
    x: np.ndarray | None
    objective: float | None  # cost (cost mode) or guarantee in impressions (max mode)
    linear_variance: float
    cuts: int
    iterations: int
    build_seconds: float
    solve_seconds: float


def solve_relaxation(model: _Model, tol: float = 1e-5, max_iter: int = 200, max_resets: int = 6) -> LPResult:
    """Kelley loop on the LP relaxation until the chance constraint holds at the LP solution;
    for a column subset, columns with negative reduced cost are then added and the loop repeats.

    tol: relative tolerance of the condition (fraction of the guarantee, or of the max guarantee).
    """
    t0 = time.perf_counter()
    its, grow = 0, SIFT_CAPACITY
    while True:
        res = _kelley(model, tol, max_iter, max_resets)
        its += res.iterations
        if not res.ok and not model.complete:
            # the subset may just lack capacity: widen it (twice the capacity), at last every column
            grow *= 2.0
            more = model._first_columns(grow) if grow < 64 else np.arange(model.prob.n)
            model.add_columns(np.setdiff1d(more, model.active))
            continue
        if not res.ok or model.price() == 0:
            return replace(res, iterations=its, cuts=model.n_cuts_total, solve_seconds=time.perf_counter() - t0)


def _kelley(model: _Model, tol: float, max_iter: int, max_resets: int) -> LPResult:
    t0 = time.perf_counter()
    prob = model.prob
    n = prob.n

    def failed(l0: float) -> LPResult:  # a solve ended without an optimum
        return LPResult(False, None, None, l0, model.n_cuts_total, it, model.build_seconds,
                        time.perf_counter() - t0)

    ok, col, obj = model.solve()
    it = 1
    if not ok:
        return LPResult(False, None, None, 0.0, 0, it, model.build_seconds, time.perf_counter() - t0)
    x = col[:n]
    l0 = prob.model.linear_variance(x)
    if prob.rules.confidence is not None and any(abs(c[2] - l0) > 1e-12 * max(l0, 1.0) for c in model.cuts):
        model.reset_cuts(l0)  # cuts from an earlier round carry another frozen l0: re-derive them
        ok, col, obj = model.solve()
        it += 1
        if not ok:
            return failed(l0)
        x = col[:n]
    if prob.rules.confidence is not None:
        z = z_value(prob.rules.confidence)
        resets = 0
        while it < max_iter:
            target = prob.guarantee if model.mode == "cost" else col[model.iG] / SCALE
            scale = max(target, prob.guarantee * 1e-3, 1.0)
            if _slack(prob, x, l0, target) >= -tol * scale:
                l_true = prob.model.linear_variance(x)
                q = prob.model.quadratic_variance(x)
                # stop when freezing l at l0 instead of l(x) moves the condition by less than tol
                if z * abs(math.sqrt(q + l0) - math.sqrt(q + l_true)) <= tol * scale:
                    break
                if l_true > l0:  # old cuts stay valid (the frozen function only grew)
                    l0 = l_true
                    continue
                if resets >= max_resets:  # conservative plan (l0 above the plan's own): accept
                    break
                l0 = l_true
                resets += 1
                model.reset_cuts(l0)
                ok, col, obj = model.solve()  # the model changed: re-solve before going on
                it += 1
                if not ok:
                    return failed(l0)
                x = col[:n]
                continue
            model.add_cut(col, l0)
            ok, col, obj = model.solve()
            it += 1
            if not ok:
                return failed(l0)
            x = col[:n]
    value = obj if model.mode == "cost" else col[model.iG] / SCALE
    return LPResult(True, col, value, l0, model.n_cuts_total, it, model.build_seconds, time.perf_counter() - t0)


# ---------------------------------------------------------------------------------------------
# Integer solves
# ---------------------------------------------------------------------------------------------
@dataclass
class MIPResult:
    ok: bool
    x: np.ndarray | None
    objective: float | None
    bound: float | None
    status: str
    seconds: float


def _set_integer(model: _Model, on: bool = True) -> None:
    idx = model.x_columns()
    kind = highspy.HighsVarType.kInteger if on else highspy.HighsVarType.kContinuous
    model.h.changeColsIntegrality(idx.size, idx, np.full(idx.size, kind))


def _solve_mip_highs(model: _Model, gap: float, time_limit: float) -> MIPResult:
    t0 = time.perf_counter()
    h = model.h
    h.setOptionValue("solver", "choose")
    h.setOptionValue("presolve", "choose")
    h.setOptionValue("mip_rel_gap", float(gap))
    h.setOptionValue("time_limit", float(time_limit))
    h.run()
    st = h.getModelStatus()
    info = h.getInfo()
    name = h.modelStatusToString(st)
    if info.primal_solution_status != 2 and st != highspy.HighsModelStatus.kOptimal:
        return MIPResult(False, None, None, None, name, time.perf_counter() - t0)
    col = model.canonical(h.getSolution().col_value)
    return MIPResult(True, col, info.objective_function_value, info.mip_dual_bound, name,
                     time.perf_counter() - t0)


_CBC_NUM = r"([-+]?[0-9.]+(?:[eE][-+]?[0-9]+)?)"


def cbc_path() -> str:
    """Path of a CBC binary: `cbc` on the PATH (as `pip install 'pulp[cbc]'` or a system package
    installs it for pulp's `COIN_CMD`), else the binary pulp < 4 ships (`pulp.apis.coin_api.
    pulp_cbc_path`). Uses none of pulp's deprecated classes (`PULP_CBC_CMD` goes in pulp 4)."""
    found = shutil.which("cbc")
    if found:
        return found
    bundled = getattr(coin_api, "pulp_cbc_path", None)
    if bundled and os.access(bundled, os.X_OK):
        return os.path.normpath(bundled)
    raise InputError("--solver cbc: no CBC binary found (install it with pip install 'pulp[cbc]', or use "
                     "--solver highs)")


def _solve_mip_cbc(model: _Model, gap: float, time_limit: float) -> MIPResult:
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="pledge-cbc-") as tmp:
        mps, sol = os.path.join(tmp, "model.mps"), os.path.join(tmp, "model.sol")
        model.h.writeModel(mps)
        cmd = [cbc_path(), mps, "-ratioGap", str(gap), "-seconds", str(float(time_limit)),
               "-threads", "1", "-solve", "-solution", sol]
        run = subprocess.run(cmd, capture_output=True, text=True)
        out = run.stdout
        status = "unknown"
        mres = re.search(r"Result - (.*)", out)
        if mres:
            status = mres.group(1).strip()
        if not os.path.exists(sol):
            return MIPResult(False, None, None, None, status, time.perf_counter() - t0)
        with open(sol) as fh:
            first = fh.readline()
            lines = fh.read().splitlines()
        low = (first + " " + status + " " + out).lower()
        if "infeasible" in first.lower() or "no feasible" in low or "no integer" in low or "infeasible" in status.lower():
            return MIPResult(False, None, None, None, status, time.perf_counter() - t0)
        col = np.zeros(model.ncol)
        if lines:
            parts = [ln.replace("**", " ").split() for ln in lines if ln.strip()]
            idx = np.array([int(p[0]) for p in parts])
            val = np.array([float(p[2]) for p in parts])
            col[idx] = val
        col = model.canonical(col)
        if not np.any(col[: model.prob.n] > 0.5) and model.prob.guarantee > 0:  # stopped with no plan
            return MIPResult(False, None, None, None, status, time.perf_counter() - t0)
        mobj = re.search(r"objective value\s+" + _CBC_NUM, first)
        obj = float(mobj.group(1)) if mobj else float(np.dot(model.prob.billed, col[: model.prob.n]))
        mlb = re.search(r"Lower bound:\s+" + _CBC_NUM, out)
        bound = float(mlb.group(1)) if mlb else obj
    return MIPResult(True, col, obj, bound, status, time.perf_counter() - t0)


def solve_mip(model: _Model, solver: str, gap: float, time_limit: float) -> MIPResult:
    """Solve the model (already marked integer) with `solver` ('cbc' or 'highs')."""
    if solver == "highs":
        return _solve_mip_highs(model, gap, time_limit)
    if solver == "cbc":
        return _solve_mip_cbc(model, gap, time_limit)
    raise ValueError(f"unknown solver {solver!r}")


# ---------------------------------------------------------------------------------------------
# Public API
# ---------------------------------------------------------------------------------------------
@dataclass
class Allocation:
    """Result of one min-cost allocation.

    x: whole spots per candidate unit (shape (n,)); cost: expected billed cost in currency
    (`AllocationProblem.billed`, preempted spots not billed); lp_bound: the LP
    relaxation's cost (a lower bound); mip_bound: the integer solver's dual bound; gap:
    (cost - best bound) / cost; cuts: Kelley cuts added; iterations: LP solves.
    """

    feasible: bool
    x: np.ndarray | None
    cost: float | None
    lp_bound: float | None
    mip_bound: float | None
    gap: float | None
    cuts: int
    iterations: int
    mip_rounds: int
    status: str
    solver: str
    build_seconds: float
    solve_seconds: float
    lp_x: np.ndarray | None = None
    row_labels: list = field(default_factory=list)
    row_duals: np.ndarray | None = None
    row_values: np.ndarray | None = None
    requested_gap: float = DEFAULT_GAP
    integer: bool = True
    lp_gap: float | None = None  # (cost - lp_bound) / cost


def _search_all(model: _Model, prob: AllocationProblem, lp_x: np.ndarray, x: np.ndarray, mip: MIPResult,
                cost: float, solver: str, gap: float, time_limit: float) -> tuple[np.ndarray, MIPResult]:
    """Search every column after a neighbourhood plan (`x`, `mip`, cost `cost`) missed the stated
    gap against the LP bound; keep the cheaper plan that meets the chance constraint."""
    best = (x, mip)
    _fix_outside(model, np.ones(prob.n, bool), lp_x)
    full = solve_mip(model, solver, gap, time_limit)
    if full.ok:
        xf = np.rint(full.x[: prob.n])
        ok_f = prob.rules.confidence is None or _slack(prob, xf, None, prob.guarantee) >= -1e-9 * prob.guarantee
        if ok_f and float(np.dot(prob.billed, xf)) < cost:
            return xf, full
    return best


def _integer_plan(model: _Model, prob: AllocationProblem, lp: LPResult, lp_x: np.ndarray, *, solver: str,
                  gap: float, time_limit: float, restricted: bool):
    """Whole-spot plan from the MIP (in the LP neighbourhood when `restricted`), a cut added and
    the MIP re-solved while the plan misses the exact chance constraint. Returns (x or None, the
    last MIPResult, rounds, restricted)."""
    rounds, mip, x = 0, None, None
    l0 = lp.linear_variance
    while rounds < 10:
        rounds += 1
        mip = solve_mip(model, solver, gap, time_limit)
        if not mip.ok:
            if restricted:  # the neighbourhood holds no integer plan: search every column
                _fix_outside(model, np.ones(prob.n, bool), lp_x)
                restricted = False
                continue
            break
        x = np.rint(mip.x[: prob.n])
        if prob.rules.confidence is not None and _slack(prob, x, None, prob.guarantee) < -1e-9 * prob.guarantee:
            l0 = max(l0, prob.model.linear_variance(x))
            model.add_cut(np.concatenate([x, mip.x[prob.n:]]), l0)
            x = None
            continue
        cost = float(np.dot(prob.billed, x))
        if restricted and cost > 0 and (cost - lp.objective) / cost > gap:
            # the neighbourhood plan misses the stated gap against the LP bound: search every column
            x, mip = _search_all(model, prob, lp_x, x, mip, cost, solver, gap, time_limit)
            restricted = False
            rounds += 1
        break
    return x, mip, rounds, restricted


def allocate(prob: AllocationProblem, *, solver: str = "cbc", gap: float = DEFAULT_GAP,
             time_limit: float = DEFAULT_TIME_LIMIT, integer: bool = True, tol: float = 1e-5) -> Allocation:
    """Minimum-cost whole-spot plan meeting the guarantee under the deal's rules and risk margin.

    gap: relative MIP optimality gap (0.005 = 0.5%); time_limit in seconds per MIP solve.
    """
    if solver not in SOLVERS:
        raise ValueError(f"unknown solver {solver!r} (choose from {', '.join(SOLVERS)})")
    t0 = time.perf_counter()
    if prob.n == 0:
        return Allocation(False, None, None, None, None, None, 0, 0, 0, "no units to buy", solver, 0.0, 0.0,
                          requested_gap=gap)
    model = _Model(prob, "cost", time_limit)
    lp = solve_relaxation(model, tol=tol)
    base = dict(cuts=lp.cuts, iterations=lp.iterations, solver=solver, build_seconds=model.build_seconds,
                row_labels=model.labels, requested_gap=gap, integer=integer)
    if not lp.ok:
        status = (f"{UNDECIDED}: the solver stopped ({model.last_status}) before proving the deal "
                  "feasible or infeasible" if model.stopped else "infeasible")
        return Allocation(False, None, None, None, None, None, mip_rounds=0, status=status,
                          solve_seconds=time.perf_counter() - t0, **base)
    duals = model.row_duals()
    values = model.row_values()
    lp_x = lp.x[: prob.n].copy()
    if not integer:
        return Allocation(True, lp_x, lp.objective, lp.objective, lp.objective, 0.0, mip_rounds=0,
                          status="lp optimal", solve_seconds=time.perf_counter() - t0, lp_x=lp_x,
                          row_duals=duals, row_values=values, **{k: v for k, v in base.items()})
    rc = model.reduced_costs()
    _set_integer(model)
    free = _neighbourhood(prob, lp_x, rc) & (model.pos >= 0)
    restricted = not bool(free[model.active].all())
    if restricted:
        _fix_outside(model, free, lp_x)
    x, mip, rounds, restricted = _integer_plan(model, prob, lp, lp_x, solver=solver, gap=gap,
                                               time_limit=time_limit, restricted=restricted)
    base["cuts"] = model.n_cuts_total
    if x is None:
        why = mip.status if mip else "no run"
        timed_out = "time" in why.lower() or "stopped" in why.lower()
        return Allocation(False, None, None, lp.objective, None, None, mip_rounds=rounds,
                          status=(f"{UNDECIDED}: " if timed_out else "") + f"integer plan not found ({why})",
                          solve_seconds=time.perf_counter() - t0, lp_x=lp_x, row_duals=duals,
                          row_values=values, **base)
    cost = float(np.dot(prob.billed, x))
    # A bound from a MIP over the LP neighbourhood is not a global bound: use the LP bound there.
    mip_bound = None if restricted else mip.bound
    bound = max(lp.objective, mip_bound if mip_bound is not None else -np.inf)
    bound = min(bound, cost)
    g = (cost - bound) / cost if cost > 0 else 0.0
    lg = max(cost - lp.objective, 0.0) / cost if cost > 0 else 0.0
    status = mip.status + (f" (in the LP neighbourhood: {int(free.sum())} of {prob.n} columns free)" if restricted else "")
    if not model.complete:
        status += f" ({model.active.size} of {prob.n} columns priced in)"
    return Allocation(True, x, cost, lp.objective, mip_bound, g, mip_rounds=rounds, status=status,
                      solve_seconds=time.perf_counter() - t0, lp_x=lp_x, row_duals=duals,
                      row_values=values, lp_gap=lg, **base)


FULL_MIP_COLUMNS = 3000  # up to this many candidate units the MIP searches every column
NEIGHBOURHOOD_EXTRA = 2000  # columns at a bound freed besides the LP's fractional/interior ones


def _neighbourhood(prob: AllocationProblem, lp_x: np.ndarray, rc: np.ndarray) -> np.ndarray:
    """Columns the MIP may move (bool (n,)): all for small problems; else the LP's fractional and
    interior columns plus the NEIGHBOURHOOD_EXTRA at a bound with the smallest |reduced cost|."""
    n = prob.n
    if n <= FULL_MIP_COLUMNS:
        return np.ones(n, bool)
    ub = prob.ub
    free = (np.abs(lp_x - np.rint(lp_x)) > 1e-6) | ((lp_x > 1e-6) & (lp_x < ub - 1e-6))
    rest = np.flatnonzero(~free)
    k = min(NEIGHBOURHOOD_EXTRA, rest.size)
    if k:
        pick = np.argpartition(np.abs(rc[rest]), k - 1)[:k] if k < rest.size else np.arange(rest.size)
        free[rest[pick]] = True
    return free


def _fix_outside(model: _Model, free: np.ndarray, lp_x: np.ndarray) -> None:
    """Fix active columns outside `free` at their (integral) LP values; free ones get 0..ub."""
    a = model.active
    lo = np.where(free[a], 0.0, np.rint(lp_x[a]))
    hi = np.where(free[a], model.prob.ub[a], np.rint(lp_x[a]))
    idx = model.x_columns()
    model.h.changeColsBounds(idx.size, idx, lo, hi)


@dataclass
class MaxGuarantee:
    """Largest guarantee (impressions) deliverable under the rules and risk margin.

    value: the LP relaxation's optimum (an upper bound; continuous spots); at_plan: the exact
    `mean - z sd` (or `mean / (1 + pad)`) of plan x, whole spots when `integer` was asked and the
    MIP found one; x: that plan (shape (n,)).
    """

    value: float
    at_plan: float
    x: np.ndarray | None
    cuts: int
    iterations: int
    integer: bool = False


def _deliverable_value(prob: AllocationProblem, x: np.ndarray) -> float:
    dm = prob.model
    if prob.rules.pad is not None:
        return dm.mean(x) / (1 + prob.rules.pad)
    return dm.mean(x) - z_value(prob.rules.confidence) * dm.sd(x)


def _max_loop(model: _Model, tol: float, max_iter: int):
    """Kelley cuts for max G with in-out stabilisation (cuts also at the midpoint between the LP
    point and the best point so far); stops when the LP bound and the best exact value are within
    `tol` (relative). Returns (ok, upper bound, best x, best value with l0 frozen, iterations)."""
    prob, n = model.prob, model.prob.n
    dm, z = prob.model, z_value(prob.rules.confidence)
    ok, col, _ = model.solve()
    if not ok:
        return False, 0.0, None, 0.0, 1
    l0 = dm.linear_variance(col[:n])
    f = lambda c: dm.mean(c[:n]) - z * math.sqrt(dm.quadratic_variance(c[:n]) + l0)  # noqa: E731
    best, fb, it, ub = col.copy(), f(col), 1, col[model.iG] / SCALE
    for _pass in range(2):
        while it < max_iter:
            ub = col[model.iG] / SCALE
            fx = f(col)
            if fx > fb:
                best, fb = col.copy(), fx
            if ub - fb <= tol * max(abs(ub), 1.0):
                break
            model.add_cut(0.5 * (col + best), l0)
            model.add_cut(col, l0)
            ok, col, _ = model.solve()
            it += 1
            if not ok:
                return False, 0.0, None, 0.0, it
        l_true = dm.linear_variance(best[:n])
        q = dm.quadratic_variance(best[:n])
        if z * abs(math.sqrt(q + l_true) - math.sqrt(q + l0)) <= tol * max(abs(ub), 1.0):
            break
        l0 = l_true  # freeze the linear part at the best plan's own value and go once more
        model.reset_cuts(l0)
        ok, col, _ = model.solve()
        it += 1
        if not ok:
            return False, 0.0, None, 0.0, it
        fb = f(best)
    return True, max(ub, fb), best[:n], fb, it


def max_guarantee(prob: AllocationProblem, *, integer: bool = False, solver: str = "highs",
                  gap: float = DEFAULT_GAP, tol: float = 1e-3, max_iter: int = 80,
                  time_limit: float = DEFAULT_TIME_LIMIT) -> MaxGuarantee:
    """Maximise the deliverable guarantee: mean - z sd (confidence) or mean / (1 + pad), impressions.

    Kelley cuts (in-out stabilised) on the LP relaxation until the LP bound and the best plan's
    value agree within `tol` (relative); with `integer`, whole spots by the MIP solver afterwards.
    `value` is the LP bound, `at_plan` the exact value at the plan returned.
    """
    if prob.n == 0:
        return MaxGuarantee(0.0, 0.0, None, 0, 0)
    model = _Model(prob, "max", time_limit)
    its = 0
    while True:  # with a column subset: price the rest in until no column improves the bound
        if prob.rules.pad is not None:
            ok, col, obj = model.solve()
            its += 1
            if ok:
                x, ub = col[: prob.n], col[model.iG] / SCALE
        else:
            ok, ub, x, _, k = _max_loop(model, tol, max_iter)
            its += k
        if not ok:
            return MaxGuarantee(0.0, 0.0, None, model.n_cuts_total, its)
        if model.price() == 0:
            break
    best = MaxGuarantee(max(float(ub), 0.0), max(_deliverable_value(prob, x), 0.0), x,
                        model.n_cuts_total, its)
    if integer:
        _set_integer(model)
        mip = solve_mip(model, solver, gap, time_limit)
        if mip.ok:
            xi = np.rint(mip.x[: prob.n])
            best = replace(best, at_plan=max(_deliverable_value(prob, xi), 0.0), x=xi, integer=True)
    return best


def with_rules(prob: AllocationProblem, **changes) -> AllocationProblem:
    """Copy of `prob` with some rules changed (the units and model are shared)."""
    return replace(prob, rules=replace(prob.rules, **changes))


def with_guarantee(prob: AllocationProblem, guarantee: float) -> AllocationProblem:
    return replace(prob, guarantee=float(guarantee))


def cpm_needed(cost: float, guarantee: float, target_margin: float) -> float:
    """Price CPM (currency per thousand impressions) giving `target_margin` (fraction of revenue).

    margin = (revenue - cost) / revenue with revenue = guarantee x CPM / 1000, so
    CPM = 1000 cost / (guarantee (1 - margin)). CPM definition: common practice.
    """
    return 1000.0 * cost / (guarantee * (1.0 - target_margin))


# ---------------------------------------------------------------------------------------------
# Explaining a plan: what binds, and what limits an undeliverable deal
# ---------------------------------------------------------------------------------------------
def exhausted_avails(prob: AllocationProblem, x: np.ndarray | None) -> list[str]:
    """Weeks in which every spot left to buy of a network is used by plan x, in words.

    A network-week counts when it had spots to buy for this deal and the plan uses them all.
    """
    scope = prob.scope if prob.scope is not None else prob.units
    left = scope[["network", "week", "ub"]].copy()
    bought = pd.DataFrame({"network": prob.units["network"], "week": prob.units["week"],
                           "x": np.zeros(prob.n) if x is None else np.asarray(x, float)})
    nw = left.groupby(["week", "network"], observed=True)["ub"].sum().rename("ub").to_frame()
    nw["x"] = bought.groupby(["week", "network"], observed=True)["x"].sum()
    nw["x"] = nw["x"].fillna(0.0)
    nw = nw[nw["ub"] > 0]
    if nw.empty:
        return []
    nw["done"] = nw["x"] >= nw["ub"] - 1e-6
    per_week = nw.groupby(level="week")["done"].agg(["sum", "size"])
    per_week = per_week[per_week["sum"] > 0]
    # consecutive weeks with the same count fold into one range ("weeks 1-4")
    runs: list[list] = []
    for w, r in per_week.iterrows():  # one row per flight week
        k = (int(r["sum"]), int(r["size"]))
        if runs and runs[-1][2] == k and runs[-1][1] == int(w) - 1:
            runs[-1][1] = int(w)
        else:
            runs.append([int(w), int(w), k])
    return [f"avails in {'week ' + str(a) if a == b else f'weeks {a}-{b}'} exhausted on {k[0]} of {k[1]} networks"
            for a, b, k in runs]


def binding_constraints(prob: AllocationProblem, alloc: Allocation, *, dual_tol: float = 1e-7) -> list[str]:
    """The rules that bind at the optimum, in seller words (from the LP duals and the plan): each
    binding row as its rule explains it (`planner.rules`), the risk margin, the spot cap, the
    weeks whose avails run out."""
    out: list[str] = []
    r = prob.rules
    if alloc.row_duals is None:
        return out
    duals, labels = alloc.row_duals, alloc.row_labels
    scale_d = max(float(np.max(np.abs(duals))) if duals.size else 0.0, 1e-12)
    x = alloc.x if alloc.x is not None else alloc.lp_x
    dm = prob.model
    plan = PlanView(prob.units, x, dm.mean)
    risk_binds = False
    for k, (kind, key) in enumerate(labels):
        if k >= duals.size or abs(duals[k]) <= dual_tol * scale_d:
            continue
        rule = explainer(r, kind)
        if rule is RISK:
            risk_binds = True
        elif rule is not None:
            text = rule.explain(kind, key, r, plan)
            if text:
                out.append(text)
    if len(duals) > len(labels) and np.any(np.abs(duals[len(labels):]) > dual_tol * scale_d):
        risk_binds = True
    if risk_binds:
        out.append(RISK.explain_plan(r, plan.total, prob.guarantee, dm.sd(x)))
    capped = prob.units["capped"].to_numpy(bool) if "capped" in prob.units else np.zeros(prob.n, bool)
    at_cap = SPOT_CAP.explain_plan(int(np.sum(capped & (np.asarray(x) >= prob.ub - 1e-6))))
    if at_cap:
        out.append(at_cap)
    out.extend(exhausted_avails(prob, x))
    return out


def _feasible_at(prob: AllocationProblem) -> bool:
    """Whether a plan (continuous spots) reaches the guarantee, to 0.1%."""
    return max_guarantee(prob, tol=2e-3, max_iter=40).at_plan >= prob.guarantee * (1 - 1e-3)


def no_rules_no_margin(rules: Rules) -> Rules:
    """The same risk rule with no share or pacing rule and no margin (confidence just above 50%,
    or pad 0): the loosest rules, whose largest guarantee is what the spots can deliver at all."""
    return Rules(confidence=0.5 + 1e-9) if rules.confidence is not None else Rules(pad=0.0)


def _relaxations(prob: AllocationProblem, steps: int):
    """Each rule of the deal alone, as named in its deal file: (label, the change that removes it,
    a function giving the loosest setting of it that meets the guarantee with every other rule
    kept, in words; bisection on max-guarantee LPs). Each rule relaxes itself (`planner.rules`)."""

    def ok(**changes) -> bool:
        return _feasible_at(with_rules(prob, **changes))

    return _rule_relaxations(prob.rules, ok, steps)


def lever_text(label: str, allowed: float, current: float) -> str:
    """'RULE: without it alone the largest deliverable guarantee would be N (+gain)'."""
    return (f"{label}: without it alone the largest deliverable guarantee would be {allowed:,.0f} "
            f"(+{allowed - current:,.0f})")


def rule_levers(prob: AllocationProblem, current: float, steps: int = 5) -> list[tuple[float, str]]:
    """Each rule of the deal (share caps and minimums, pacing, risk margin) removed alone, with
    every other rule kept: (gain, text) for every rule whose removal raises the largest
    deliverable guarantee above `current` (max-guarantee LP re-solved; impressions); when
    removing it alone is enough for the guarantee, the text adds the loosest setting that is."""
    G = prob.guarantee
    out = []
    for label, change, loosest in _relaxations(prob, steps):
        mg = max_guarantee(with_rules(prob, **change), tol=2e-3, max_iter=40).value
        if mg - current > 1e-3 * max(G, 1.0):
            text = lever_text(label, mg, current)
            out.append((mg - current, text + ("; " + loosest() if mg >= G * (1 - 1e-3) else "")))
    return out


def diagnose(prob: AllocationProblem, steps: int = 5, current: float | None = None,
             levers: Sequence[tuple[float, str]] = ()) -> list[str]:
    """Why a guarantee cannot be met, in seller words, the largest lever first.

    `rule_levers` (each rule removed alone, against `current`, the largest guarantee at these
    rules; computed when not given) and any other `levers` (gain, text), largest gain first;
    then what the avails allow with no rule and no margin, with the weeks whose avails run out
    (`exhausted_avails`).
    """
    G = prob.guarantee
    current = max_guarantee(prob, tol=2e-3, max_iter=40).value if current is None else current
    found = sorted(rule_levers(prob, current, steps) + list(levers), key=lambda t: -t[0])
    out = [text for _, text in found]
    mg = max_guarantee(replace(prob, rules=no_rules_no_margin(prob.rules)))
    if mg.value < G * (1 - 1e-6):
        out.append(f"avails: even with no share or pacing rule and no risk margin the spots left that the "
                   f"deal may buy deliver at most {mg.value:,.0f} expected impressions, short of {G:,.0f}")
        out.extend(exhausted_avails(prob, mg.x))
    elif not found:
        out.append("no single rule blocks it: several rules together limit the plan")
    return out


# ---------------------------------------------------------------------------------------------
# Reference only: the same base model through pulp's one-object-per-variable modelling
# ---------------------------------------------------------------------------------------------
def pulp_variable(lp, name: str, low: float | None = None, up: float | None = None, cat: str = "Continuous"):
    """A pulp variable of model `lp`: `lp.add_variable` where pulp has it (constructing
    `LpVariable` directly is deprecated for pulp 4), `pulp.LpVariable` before."""
    add = getattr(lp, "add_variable", None)
    return add(name, low, up, cat=cat) if add is not None else pulp.LpVariable(name, low, up, cat)


def pulp_reference_model(prob: AllocationProblem, *, integer: bool = True, cuts=()):
    """The min-cost model (every rule's rows from `planner.rules`, pad or the chance constraint's
    base row plus given cuts) built one pulp variable and one expression at a time. Kept as the
    reference for the benchmark of model-building time; `allocate` builds from arrays instead.

    cuts: iterable of (coef (n,), lower) rows in impressions, `coef @ x >= lower`.
    """
    r, dm = prob.rules, prob.model
    lp = pulp.LpProblem("allocation", pulp.LpMinimize)
    cat = pulp.LpInteger if integer else pulp.LpContinuous
    x = [pulp_variable(lp, f"x{i}", 0, float(prob.ub[i]), cat) for i in range(prob.n)]
    m = dm.m * SCALE
    billed = prob.billed
    lp += pulp.lpSum(float(billed[i]) * x[i] for i in range(prob.n))
    T = pulp.lpSum(float(m[i]) * x[i] for i in range(prob.n))
    for b in row_blocks(r, prob.units, prob.weeks):
        for j in range(len(b.keys)):
            e = pulp.lpSum(float(m[i]) * x[i] for i in np.flatnonzero(b.group == j)) + float(b.t_coef[j]) * T
            if np.isfinite(b.upper[j]):
                lp += e <= float(b.upper[j])
            if np.isfinite(b.lower[j]):
                lp += e >= float(b.lower[j])
    factor, _ = RISK.base_row(r)
    lp += T >= factor * prob.guarantee * SCALE
    for coef, lower in cuts:
        lp += pulp.lpSum(float(coef[i]) * SCALE * x[i] for i in range(prob.n) if coef[i] != 0) >= lower * SCALE
    return lp
