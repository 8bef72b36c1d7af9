"""Make-good terms of a deal (how a shortfall is settled) and the expected make-good under them.

Terms (deal file `[terms]`, defaults from scenario.toml `[terms]`, else `Terms()`):

- `settlement`: "units" (audience-deficiency units, ADUs: make-good spots aired after the flight
  at no charge, in the deal's demo), "cash" (money back at the deal's CPM) or "both" (the buyer
  may ask for either; valued at the dearer of the two for the seller);
- `threshold`: fraction of the guarantee (0 < t <= 1) below which anything is owed;
- `window_weeks`: weeks after the flight in which ADUs must air (whole number, 1..52);
- `cap`: the most owed, a fraction of the guarantee (0 < c <= 1).

Reading of the contract (a model, not legal advice; the contract decides): with guarantee G and
delivered impressions D, nothing is owed when D >= t G (delivery exactly at the threshold owes
nothing); below it the whole shortfall is owed, G - D, not only the part below the threshold, up
to the cap: owed(D) = min(G - D, c G) if D < t G, else 0.

Expected owed impressions when D is normal (mean mu, sd s), in closed form with the standard
normal loss function L(z) = phi(z) - z (1 - Phi(z)) (E[(x - D)^+] = s L((mu - x) / s)): with
a = min((1 - c) G, t G) (below a the cap binds) and b = t G,

    E[owed] = c G Phi((a - mu) / s) + (G - mu) [Phi(zb) - Phi(za)] + s [phi(zb) - phi(za)],

za, zb = (a - mu) / s, (b - mu) / s; with t = c = 1 this is s L((mu - G) / s) - s L(mu / s), the
second term (a negative delivery) negligible for any real plan.

References
----------
Silver, Pyke & Thomas (2017), Inventory and Production Management in Supply Chains, 4th ed.,
CRC Press: the standard normal loss function G_u(k) and its table.
"""
from __future__ import annotations

import difflib
from dataclasses import asdict, dataclass, replace
from typing import Any, Callable

import numpy as np
from scipy.special import ndtr

from planner.plain import is_int, is_num

SETTLEMENTS = ("units", "cash", "both")
#: the keys of a [terms] table (deal file or scenario.toml); anything else is refused
TERMS_KEYS = ("settlement", "threshold", "window_weeks", "cap")
_SQRT_2PI = float(np.sqrt(2.0 * np.pi))


@dataclass(frozen=True)
class Terms:
    """How a deal's shortfall is settled (fractions of the guarantee; weeks).

    The defaults (any shortfall owed, in ADUs within 4 weeks, no cap below the guarantee) are the
    seller's most cautious reading when neither the deal file nor scenario.toml says otherwise."""

    settlement: str = "units"
    threshold: float = 1.0
    window_weeks: int = 4
    cap: float = 1.0

    def as_dict(self) -> dict:
        return asdict(self)


def _check_value(key: str, v: Any) -> str | None:
    """What is wrong with value `v` of key `key`, or None."""
    if key == "settlement":
        return None if v in SETTLEMENTS else f"must be one of {', '.join(SETTLEMENTS)}, got {v!r}"
    if key == "threshold":
        return None if is_num(v) and 0 < v <= 1 else f"must be a fraction of the guarantee, 0 < t <= 1, got {v!r}"
    if key == "window_weeks":
        ok = is_int(v) and 1 <= v <= 52
        return None if ok else f"must be a whole number of weeks 1..52, got {v!r}"
    return None if is_num(v) and 0 < v <= 1 else f"must be a fraction of the guarantee, 0 < c <= 1, got {v!r}"


def parse_terms(raw: Any, where: str, base: Terms, problem: Callable[[str], None]) -> Terms:
    """A `[terms]` table read and checked: `where` names the file (``deals/x.toml``), `base` gives
    the keys it leaves out, `problem(text)` receives each problem (unknown key with the closest
    known one as a hint, a value out of range). Returns `base` with the valid keys applied."""
    if raw is None:
        return base
    if not isinstance(raw, dict):
        problem(f"{where}: [terms] must be a table")
        return base
    ok = {}
    for k, v in raw.items():
        if k not in TERMS_KEYS:
            near = difflib.get_close_matches(str(k), TERMS_KEYS, n=1, cutoff=0.6)
            hint = f"did you mean {near[0]!r}? " if near else ""
            problem(f"{where}: [terms] unknown key {k!r} ({hint}known: {', '.join(TERMS_KEYS)})")
            continue
        why = _check_value(k, v)
        if why:
            problem(f"{where}: [terms] {k} {why}")
        else:
            ok[k] = float(v) if k in ("threshold", "cap") else v
    return replace(base, **ok)


def terms_from_dict(d: dict | None, base: Terms | None = None) -> Terms:
    """Terms from a stored dict (the book), keys it lacks from `base` (default `Terms()`)."""
    base = Terms() if base is None else base
    return replace(base, **{k: v for k, v in (d or {}).items() if k in TERMS_KEYS})


# ---------------------------------------------------------------------------------------------
def normal_loss(z):
    """Standard normal loss function L(z) = E[(Z - z)^+] = phi(z) - z (1 - Phi(z)) (dimensionless).

    References
    ----------
    Silver, Pyke & Thomas (2017), Inventory and Production Management in Supply Chains, table of G_u(k).
    """
    z = np.asarray(z, dtype=float)
    return np.exp(-0.5 * z * z) / _SQRT_2PI - z * (1.0 - ndtr(z))


def owed(delivered, guarantee: float, terms: Terms):
    """Impressions owed for `delivered` impressions (array or scalar) under `terms`:
    min(G - D, cap G) when D < threshold G, else 0 (delivery at the threshold owes nothing)."""
    d = np.asarray(delivered, dtype=float)
    g = float(guarantee)
    return np.where(d < terms.threshold * g, np.minimum(g - d, terms.cap * g), 0.0)


def expected_owed(mean: float, sd: float, guarantee: float, terms: Terms) -> float:
    """Expected impressions owed (the module's closed form) when delivery is normal(mean, sd);
    impressions. sd 0: `owed(mean)`."""
    g = float(guarantee)
    if not sd > 0:
        return float(owed(mean, g, terms))
    b = terms.threshold * g
    a = min((1.0 - terms.cap) * g, b)
    za, zb = (a - mean) / sd, (b - mean) / sd
    pa, pb = float(ndtr(za)), float(ndtr(zb))
    fa, fb = (float(np.exp(-0.5 * z * z) / _SQRT_2PI) for z in (za, zb))
    return max(terms.cap * g * pa + (g - mean) * (pb - pa) + sd * (fb - fa), 0.0)


def value_per_impression(terms: Terms, *, cost_per_impression: float, price_cpm: float) -> float:
    """Currency per owed impression: ADUs at `cost_per_impression` (the plan's expected cost per
    delivered impression, standing in for the least cost of the spots the ADUs need in the
    window), cash at the deal's CPM / 1000, both at the dearer of the two."""
    cash = float(price_cpm) / 1000.0
    if terms.settlement == "cash":
        return cash
    if terms.settlement == "units":
        return float(cost_per_impression)
    return max(cash, float(cost_per_impression))


def cpm_needed_net(cost: float, guarantee: float, target_margin: float, owed_impressions: float,
                   terms: Terms, cost_per_impression: float) -> float | None:
    """The price CPM at which (revenue - cost - expected make-good cost) / revenue = target_margin
    (currency per 1000 impressions); None when no price reaches it (cash owed >= (1 - target) G).

    Revenue R = G CPM / 1000. ADUs: CPM = 1000 (cost + E[owed] cpi) / (G (1 - m)); cash (the
    make-good grows with the price): CPM = 1000 cost / (G (1 - m) - E[owed]); both: the larger."""
    room = float(guarantee) * (1.0 - float(target_margin))
    units = 1000.0 * (cost + owed_impressions * cost_per_impression) / room
    cash = 1000.0 * cost / (room - owed_impressions) if room > owed_impressions else None
    if terms.settlement == "units":
        return units
    if terms.settlement == "cash":
        return cash
    return None if cash is None else max(units, cash)


def makegood_summary(*, mean: float, sd: float, guarantee: float, cost: float, revenue: float,
                     price_cpm: float, terms: Terms, target_margin: float | None = None) -> dict:
    """Expected make-good of a plan (normal delivery law: mean, sd impressions; cost, revenue in
    currency): `expected_shortfall_impressions`, `expected_makegood_cost`,
    `margin_net_of_makegoods`, `cpm_needed_net_of_makegoods` (None without a target margin),
    `makegood_value_per_impression` and `terms` (the dict)."""
    cpi = cost / mean if mean > 0 else 0.0
    e = expected_owed(mean, sd, guarantee, terms)
    mg = e * value_per_impression(terms, cost_per_impression=cpi, price_cpm=price_cpm)
    cpm = (cpm_needed_net(cost, guarantee, target_margin, e, terms, cpi) if target_margin is not None else None)
    return {"expected_shortfall_impressions": e, "expected_makegood_cost": mg,
            "margin_net_of_makegoods": revenue - cost - mg, "cpm_needed_net_of_makegoods": cpm,
            "makegood_value_per_impression": mg / e if e > 0 else
            value_per_impression(terms, cost_per_impression=cpi, price_cpm=price_cpm),
            "terms": terms.as_dict()}
