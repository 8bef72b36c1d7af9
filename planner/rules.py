"""The allocator's rules as data: one object per rule family.

A family reads its settings from `Rules` (the deal's mix and risk margin; shares are fractions of
the plan's total expected impressions T = sum_i m_i x_i) and knows everything about itself:

- `check(rules, where)`: problems with its settings, in words (`planner.deals.validate_deal`);
- `blocks(rules, units, weeks)`: its linear rows, each ``sum_{i in group k} m_i x_i + t_k T`` within
  ``[lower_k, upper_k]`` (`RowBlock`), built the same way by the allocator's HiGHS model, the pulp
  reference model, the benchmark's pulp build and the demo builder's sizing LP;
- `explain(kind, key, rules, plan)`: a binding row (non-zero dual) in seller words (`plan`, a
  `PlanView`, gives the plan's shares);
- `relaxations(rules, ok, steps)`: itself removed (the change to `Rules`) and, in words, the
  loosest setting that meets the guarantee (`ok(**changes)` says whether a changed problem
  does), for "what limits it".

The scope families (`Exclusions`, `SpotCap`) decide which spots may be bought rather than adding
rows (`planner.allocate.candidate_units`); the risk margin (`RiskMargin`) is the base row
T >= (1 + pad) G or the chance constraint's cuts, built by the allocator. A rule of one's own is
one object with these methods, passed in `Rules(extra=(rule, ...))`: its rows come after the
families' (before the risk row), its binding rows are explained and it is relaxed like theirs.

References
----------
Charnes & Cooper (1959), Chance-constrained programming, Management Science 6(1).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from planner.plain import is_int, is_num

INF = float("inf")


@dataclass
class Rules:
    """Mix rules and the risk margin of one deal (shares are fractions of expected impressions);
    `extra`: further rule objects (any object with the `RuleFamily` methods)."""

    max_network_share: float | None = None
    daypart_min_share: dict = field(default_factory=dict)
    daypart_max_share: dict = field(default_factory=dict)
    weekly_tolerance: float | None = None
    confidence: float | None = None
    pad: float | None = None
    extra: tuple = ()
    #: deal-file settings of families without a field above, by [mix] key (`Mix.extra`)
    settings: dict = field(default_factory=dict)

    @property
    def risk_rule(self) -> str:
        return "pad" if self.pad is not None else "confidence"


@dataclass
class RowBlock:
    """k rows ``sum_{i: group_i = j} m_i x_i + t_coef_j T`` in ``[lower_j, upper_j]``, j = 0..k-1.

    `group` (n,) int: the row of each candidate unit (-1: in none); `keys` name the rows (a
    network, a daypart, a week); `kind` names the block (the row labels are (kind, key))."""

    kind: str
    group: np.ndarray
    t_coef: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    keys: list

    @property
    def labels(self) -> list[tuple]:
        return [(self.kind, k) for k in self.keys]


class PlanView:
    """A plan seen by the explanations: `units` (candidate units), `x` (spots), `mean(x)` (expected
    impressions of spots x); `share(column, key)` the share of the plan's expected impressions in
    the units whose `column` equals `key`."""

    def __init__(self, units: pd.DataFrame, x: np.ndarray, mean: Callable[[np.ndarray], float]):
        self.units, self.x, self.mean = units, x, mean
        self.total = mean(x)

    def share(self, column: str, key) -> float:
        if self.total <= 0:
            return 0.0
        return self.mean(self.x * (self.units[column] == key).to_numpy()) / self.total


def pct(v: float) -> str:
    """A share in words: 0.3 -> '30%', 0.125 -> '12.5%'."""
    return f"{100 * v:.0f}%" if abs(100 * v - round(100 * v)) < 0.05 else f"{100 * v:.1f}%"


def bisect(lo: float, hi: float, ok_at: Callable[[float], bool], steps: int = 5) -> float:
    """The feasible end of [lo, hi] closest to the infeasible end (lo feasible, hi not)."""
    for _ in range(steps):
        mid = 0.5 * (lo + hi)
        if ok_at(mid):
            lo = mid
        else:
            hi = mid
    return lo


def share_block(kind: str, column: pd.Series, shares: dict, *, cap: bool) -> RowBlock:
    """Rows y_d - s_d T <= 0 (`cap`) or >= 0 over the groups `column == d` of each d in `shares`."""
    names = list(shares)
    pos = {d: j for j, d in enumerate(names)}
    code = column.map(pos).fillna(-1).to_numpy(np.int64)
    k = len(names)
    sh = np.array([shares[d] for d in names], float)
    lower, upper = (np.full(k, -INF), np.zeros(k)) if cap else (np.zeros(k), np.full(k, INF))
    return RowBlock(kind, code, -sh, lower, upper, names)


def one_value(raw: dict, key: str, valid: Callable[[Any], bool], need: str, cast: Callable, deal,
              problem: Callable[[str], None]) -> dict:
    """A deal file's [mix] value `key` as ``{key: cast(v)}`` when `valid`, {} when absent; else
    `problem` says "<file> <key> must be <need>, got <v>" and {} is returned."""
    v = raw.get(key)
    if v is None:
        return {}
    if not valid(v):
        problem(f"{deal.at} {key} must be {need}, got {v!r}")
        return {}
    return {key: cast(v)}


@dataclass(frozen=True)
class DealFile:
    """A deal file's [mix] table being read (`RuleFamily.parse_mix`): `where` names the file
    (``deals/NAME.toml``); the scenario's names a setting may refer to."""

    where: str
    zones: Sequence[str] = ()
    networks: Sequence[str] = ()
    dayparts: Sequence[str] = ()

    @property
    def at(self) -> str:
        """The prefix of a problem with a [mix] key: ``deals/NAME.toml: [mix]``."""
        return f"{self.where}: [mix]"

    def known(self, what: str) -> tuple[Sequence[str], str]:
        """(names, the file that lists them) of `what` ("zone", "network" or "daypart")."""
        return {"zone": (self.zones, "zones.csv"), "network": (self.networks, "networks.csv"),
                "daypart": (self.dayparts, "the dayparts of scenario.toml")}[what]


class RuleFamily:
    """One family of rules; the base class does nothing (every method has a neutral default)."""

    #: row kinds this family's blocks carry (`RowBlock.kind`)
    kinds: tuple[str, ...] = ()
    #: the deal file's [mix] keys this family reads (the loader, `planner.scenario`, asks every
    #: family of `FAMILIES` for its keys; any other key is refused)
    mix_keys: tuple[str, ...] = ()

    def parse_mix(self, raw: dict, deal: DealFile, problem: Callable[[str], None]) -> dict:
        """The settings of this family's keys present in the [mix] table `raw`, checked: {key: value}
        (a key with a bad value left out); each problem in words naming the file and the key
        (``deals/NAME.toml: [mix] KEY ...``), passed to `problem`."""
        return {}

    def check(self, rules: Rules, where: str) -> list[str]:
        return []

    def blocks(self, rules: Rules, units: pd.DataFrame, weeks: Sequence[int]) -> list[RowBlock]:
        return []

    def explain(self, kind: str, key, rules: Rules, plan: PlanView) -> str | None:
        return None

    def relaxations(self, rules: Rules, ok: Callable[..., bool], steps: int) -> list[tuple]:
        return []


class NetworkShareCap(RuleFamily):
    """`max_network_share`: no network carries more than this share of the plan."""

    kinds = ("network",)
    mix_keys = ("max_network_share",)

    def parse_mix(self, raw, deal, problem):
        return one_value(raw, "max_network_share", lambda v: is_num(v) and 0 < v <= 1, "a share in (0, 1]",
                         float, deal, problem)

    def check(self, rules, where):
        v = rules.max_network_share
        return [] if v is None or 0 <= v <= 1 else [f"{where}: [mix] max_network_share must be a share in [0, 1], got {v!r}"]

    def blocks(self, rules, units, weeks):
        if rules.max_network_share is None:
            return []
        code, nets = pd.factorize(units["network"], sort=True)
        k = len(nets)
        return [RowBlock("network", code, np.full(k, -rules.max_network_share), np.full(k, -INF), np.zeros(k),
                         [str(v) for v in nets])]

    def explain(self, kind, key, rules, plan):
        return (f"network {key} share: at the {pct(rules.max_network_share)} cap "
                f"(plan {pct(plan.share('network', key))})")

    def relaxations(self, rules, ok, steps):
        s = rules.max_network_share
        if s is None:
            return []
        return [(f"max_network_share {pct(s)}", dict(max_network_share=None),
                 lambda: f"network share: capped at {pct(s)}, needs "
                         f"{pct(1.0 - bisect(0.0, 1.0 - s, lambda t: ok(max_network_share=1.0 - t), steps))}")]


class DaypartShares(RuleFamily):
    """`daypart_min_share` / `daypart_max_share`: a daypart's share of the plan at least / at most."""

    kinds = ("daypart_min", "daypart_max")
    mix_keys = ("daypart_min_share", "daypart_max_share")

    def parse_mix(self, raw, deal, problem):
        out: dict[str, dict[str, float]] = {}
        for key in self.mix_keys:
            v = raw.get(key)
            if v is None:
                continue
            if not isinstance(v, dict):
                problem(f"{deal.at} {key} must be a table of daypart = share")
                continue
            shares: dict[str, float] = {}
            for dp, s in v.items():
                if dp not in deal.dayparts:
                    problem(f"{deal.at} {key}: unknown daypart {dp!r} (dayparts: {', '.join(deal.dayparts)})")
                elif not is_num(s) or not 0 <= s <= 1:
                    problem(f"{deal.at} {key}.{dp} must be a share in [0, 1], got {s!r}")
                else:
                    shares[dp] = float(s)
            out[key] = shares
        mins, maxs = out.get("daypart_min_share", {}), out.get("daypart_max_share", {})
        total = sum(mins.values())
        if total > 1 + 1e-9:
            problem(f"{deal.at} daypart_min_share shares sum to {total:.3g}, more than 1")
        for dp, lo in mins.items():
            hi = maxs.get(dp)
            if hi is not None and lo > hi:
                problem(f"{deal.at} daypart {dp!r}: min share {lo} is above max share {hi}")
        return out

    def check(self, rules, where):
        out = [f"{where}: [mix] {kind}.{k} must be a share in [0, 1], got {v!r}"
               for kind, shares in (("daypart_min_share", rules.daypart_min_share),
                                    ("daypart_max_share", rules.daypart_max_share))
               for k, v in shares.items() if v is not None and not 0 <= v <= 1]
        if sum(rules.daypart_min_share.values()) > 1 + 1e-9:
            out.append(f"{where}: [mix] daypart_min_share shares sum past 1")
        return out

    def blocks(self, rules, units, weeks):
        dps = sorted(set(rules.daypart_min_share) | set(rules.daypart_max_share))
        out = []
        for kind, shares, cap in (("daypart_min", rules.daypart_min_share, False),
                                  ("daypart_max", rules.daypart_max_share, True)):
            named = {d: shares[d] for d in dps if d in shares and shares[d] is not None}
            if named:
                out.append(share_block(kind, units["daypart"], named, cap=cap))
        return out

    def explain(self, kind, key, rules, plan):
        lim = (rules.daypart_min_share if kind == "daypart_min" else rules.daypart_max_share)[key]
        word = "minimum" if kind == "daypart_min" else "maximum"
        return f"{key} share: held at the {pct(lim)} {word} (plan {pct(plan.share('daypart', key))})"

    def relaxations(self, rules, ok, steps):
        out = []
        mins, maxs = rules.daypart_min_share, rules.daypart_max_share
        for d, s in mins.items():
            if s:
                out.append((f"daypart_min_share {d} {pct(s)}", dict(daypart_min_share={k: v for k, v in mins.items() if k != d}),
                            lambda d=d, s=s: f"{d} share: needs {pct(s)}, can reach "
                            f"{pct(bisect(0.0, s, lambda t: ok(daypart_min_share={**mins, d: t}), steps))}"))
        for d, s in maxs.items():
            if s < 1:
                out.append((f"daypart_max_share {d} {pct(s)}", dict(daypart_max_share={k: v for k, v in maxs.items() if k != d}),
                            lambda d=d, s=s: f"{d} share: capped at {pct(s)}, needs "
                            f"{pct(1.0 - bisect(0.0, 1.0 - s, lambda t: ok(daypart_max_share={**maxs, d: 1.0 - t}), steps))}"))
        return out


class WeeklyPacing(RuleFamily):
    """`weekly_tolerance`: each flight week within +-tol of even pacing (T / W, W flight weeks)."""

    kinds = ("pacing_max", "pacing_min")
    mix_keys = ("weekly_tolerance",)

    def parse_mix(self, raw, deal, problem):
        return one_value(raw, "weekly_tolerance", lambda v: is_num(v) and v >= 0, "a number >= 0", float, deal, problem)

    def check(self, rules, where):
        v = rules.weekly_tolerance
        return [] if v is None or v >= 0 else [f"{where}: [mix] weekly_tolerance must be >= 0"]

    def blocks(self, rules, units, weeks):
        tol = rules.weekly_tolerance
        if tol is None:
            return []
        W = len(weeks)
        code = units["week"].map({w: j for j, w in enumerate(weeks)}).fillna(-1).to_numpy(np.int64)
        keys = list(weeks)
        return [RowBlock("pacing_max", code, np.full(W, -(1 + tol) / W), np.full(W, -INF), np.zeros(W), keys),
                RowBlock("pacing_min", code, np.full(W, -(1 - tol) / W), np.zeros(W), np.full(W, INF), keys)]

    def explain(self, kind, key, rules, plan):
        sign = "+" if kind == "pacing_max" else "-"
        return f"week {key} pacing: at the {sign}{pct(rules.weekly_tolerance)} limit of even pacing"

    def relaxations(self, rules, ok, steps):
        tol = rules.weekly_tolerance
        if tol is None:
            return []

        def pacing() -> str:
            hi = max(1.0, tol)
            while not ok(weekly_tolerance=hi) and hi < 64:
                hi *= 2
            v = hi - bisect(0.0, hi - tol, lambda t: ok(weekly_tolerance=hi - t), steps)
            return f"weekly pacing: within +-{pct(tol)} of even pacing, needs +-{pct(v)}"

        return [(f"weekly_tolerance {pct(tol)}", dict(weekly_tolerance=None), pacing)]


class RiskMargin(RuleFamily):
    """The risk margin, one of: `pad` (T >= (1 + pad) G) or `confidence` (P(D >= G) >= c, the
    chance constraint: a base row T >= G and tangent cuts added by the allocator)."""

    kinds = ("pad", "risk_base", "cut")

    def check(self, rules, where):
        c, p = rules.confidence, rules.pad
        if c is not None and p is not None:
            return [f"{where}: give either confidence or pad, not both"]
        if c is None and p is None:
            return [f"{where}: neither confidence nor pad is set"]
        if c is not None and not 0.5 < c < 0.999:
            return [f"{where}: confidence must be in (0.5, 0.999), got {c!r}"]
        if p is not None and p < 0:
            return [f"{where}: pad must be >= 0, got {p!r}"]
        return []

    @staticmethod
    def base_row(rules: Rules) -> tuple[float, str]:
        """(factor, label): the base row T >= factor * G and its label."""
        return (1.0 + rules.pad if rules.pad is not None else 1.0), ("pad" if rules.pad is not None else "risk_base")

    @staticmethod
    def explain_plan(rules: Rules, expected: float, guarantee: float, sd: float) -> str:
        """The binding risk margin in words (expected impressions `expected`, sd `sd` of the plan)."""
        if rules.pad is not None:
            return (f"pad: expected delivery held at {pct(1 + rules.pad)} of the guarantee "
                    f"({expected:,.0f} for {guarantee:,.0f})")
        return (f"confidence: a {pct(rules.confidence)} chance of delivery needs {expected:,.0f} expected "
                f"impressions for {guarantee:,.0f} guaranteed (sd {sd:,.0f})")

    def relaxations(self, rules, ok, steps):
        c, p = rules.confidence, rules.pad
        out = []
        if c is not None:
            out.append((f"confidence {pct(c)}", dict(confidence=0.5 + 1e-9),
                        lambda: f"confidence: needs {pct(c)}, can reach "
                                f"{pct(bisect(0.5 + 1e-9, c, lambda t: ok(confidence=t), steps))} at this guarantee"))
        if p is not None and p > 0:
            out.append((f"pad {pct(p)}", dict(pad=0.0),
                        lambda: f"pad: needs {pct(p)}, can reach "
                                f"{pct(bisect(0.0, p, lambda t: ok(pad=t), steps))} at this guarantee"))
        return out


@dataclass(frozen=True)
class Scope:
    """The deal's scope settings: `exclude_networks`, `exclude_zones`, `max_spots_per_unit`."""

    exclude_networks: tuple = ()
    exclude_zones: tuple = ()
    max_spots_per_unit: int | None = None


class Exclusions(RuleFamily):
    """`exclude_networks` / `exclude_zones`: units of these networks or zones are not bought."""

    mix_keys = ("exclude_networks", "exclude_zones")

    def parse_mix(self, raw, deal, problem):
        out = {}
        for key, what in (("exclude_networks", "network"), ("exclude_zones", "zone")):
            v = raw.get(key)
            if v is None:
                continue
            if not isinstance(v, list) or any(not isinstance(x, str) for x in v):
                problem(f"{deal.at} {key} must be a list of {what} names")
                continue
            known, source = deal.known(what)
            for x in v:
                if x not in known:
                    problem(f"{deal.at} {key}: unknown {what} {x!r} (not in {source})")
            out[key] = tuple(v)
        return out

    def keep(self, scope: Scope, units: pd.DataFrame) -> np.ndarray:
        """Boolean mask (rows of `units`) of the units the exclusions leave."""
        return (~units["network"].isin(list(scope.exclude_networks))
                & ~units["zone"].isin(list(scope.exclude_zones))).to_numpy()

    def scope_items(self, scope: Scope) -> list[tuple[str, Scope]]:
        """Each exclusion removed alone: (label as in the deal file, the scope without it)."""
        out = []
        if scope.exclude_zones:
            out.append((f"exclude_zones {', '.join(scope.exclude_zones)}",
                        Scope(scope.exclude_networks, (), scope.max_spots_per_unit)))
        if scope.exclude_networks:
            out.append((f"exclude_networks {', '.join(scope.exclude_networks)}",
                        Scope((), scope.exclude_zones, scope.max_spots_per_unit)))
        return out


class SpotCap(RuleFamily):
    """`max_spots_per_unit`: at most this many spots of one unit-week."""

    mix_keys = ("max_spots_per_unit",)

    def parse_mix(self, raw, deal, problem):
        return one_value(raw, "max_spots_per_unit", lambda v: is_int(v) and v >= 1, "a whole number >= 1", int,
                         deal, problem)

    def cap(self, scope: Scope, avail: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(ub, capped): spots that may be bought of each unit (avails left, capped) and where the cap cuts."""
        if scope.max_spots_per_unit is None:
            return avail, np.zeros(len(avail), dtype=bool)
        return np.minimum(avail, float(scope.max_spots_per_unit)), avail > scope.max_spots_per_unit

    def scope_items(self, scope: Scope) -> list[tuple[str, Scope]]:
        if not scope.max_spots_per_unit:
            return []
        return [(f"max_spots_per_unit {scope.max_spots_per_unit}",
                 Scope(scope.exclude_networks, scope.exclude_zones, None))]

    @staticmethod
    def explain_plan(at_cap: int) -> str | None:
        return f"max spots per unit: {at_cap} units bought up to the cap" if at_cap else None


NETWORK_SHARE, DAYPART_SHARES, WEEKLY_PACING, RISK = NetworkShareCap(), DaypartShares(), WeeklyPacing(), RiskMargin()
EXCLUSIONS, SPOT_CAP = Exclusions(), SpotCap()
#: the mix families that add rows, in row order (the risk row comes after every other rule's)
ROW_FAMILIES: tuple[RuleFamily, ...] = (NETWORK_SHARE, DAYPART_SHARES, WEEKLY_PACING)
#: every family, in the order their problems, binding rows and relaxations are told
FAMILIES: tuple[RuleFamily, ...] = (NETWORK_SHARE, DAYPART_SHARES, WEEKLY_PACING, EXCLUSIONS, SPOT_CAP, RISK)


def mix_keys(families: Sequence[RuleFamily] | None = None) -> tuple[str, ...]:
    """The deal file's [mix] keys, every family's (`families`, default `FAMILIES`) in family order."""
    return tuple(k for f in (FAMILIES if families is None else families) for k in f.mix_keys)


def parse_mix(raw: dict, deal: DealFile, problem: Callable[[str], None],
              families: Sequence[RuleFamily] | None = None) -> dict:
    """Every family's settings read from the [mix] table `raw` ({key: value}, checked; problems
    through `problem`), in family order (`families`, default `FAMILIES`)."""
    out: dict = {}
    for f in (FAMILIES if families is None else families):
        out.update(f.parse_mix(raw, deal, problem))
    return out


def row_rules(rules: Rules) -> tuple:
    """The families and extra rules that add rows, in row order."""
    return ROW_FAMILIES + tuple(rules.extra)


def row_blocks(rules: Rules, units: pd.DataFrame, weeks: Sequence[int]) -> list[RowBlock]:
    """Every rule's rows over candidate `units` (columns network, daypart, week, zone) and flight `weeks`."""
    return [b for rule in row_rules(rules) for b in rule.blocks(rules, units, weeks)]


def explainer(rules: Rules, kind: str):
    """The family (or extra rule) whose rows carry `kind`, None for none."""
    return next((f for f in row_rules(rules) + (RISK,) if kind in getattr(f, "kinds", ())), None)


def problems(rules: Rules, where: str) -> list[str]:
    """Every family's problems with its settings (share out of [0, 1], tolerance < 0, ...)."""
    return [p for f in row_rules(rules) + (RISK,) for p in f.check(rules, where)]


def relaxations(rules: Rules, ok: Callable[..., bool], steps: int) -> list[tuple]:
    """Each rule removed alone (label, change to `Rules`, loosest setting in words), in family order."""
    return [r for f in row_rules(rules) + (RISK,) for r in f.relaxations(rules, ok, steps)]


def linear_rows(rules: Rules, units: pd.DataFrame, weeks: Sequence[int], m: np.ndarray
                ) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The rules' rows as ``A x <= b`` with T = sum m x substituted (x the spots of `units`,
    `m` (n,) expected impressions per spot): for the sizing LPs of invented deals."""
    rows = []
    for b in row_blocks(rules, units, weeks):
        for j in range(len(b.keys)):
            a = np.where(b.group == j, m, 0.0) + b.t_coef[j] * m
            if np.isfinite(b.upper[j]):
                rows.append((a, b.upper[j]))
            if np.isfinite(b.lower[j]):
                rows.append((-a, -b.lower[j]))
    if not rows:
        return None, None
    return np.array([a for a, _ in rows]), np.array([v for _, v in rows], float)
