"""The level factors of the forecast's error law: the one list every other module derives from.

A unit-week's level error (DEVELOPERS.md, "Forecast table") is a sum of independent normal
factors, each shared by the unit-weeks that agree on its grouping keys. `LEVEL_FACTORS` lists them
in contract order; the level model's relative-sd columns (``rel_sd_*``, fractions of the mean),
the forecast table's loadings (``level_sd_*``, impressions per spot), the backtest's factor list
and scores, the printed labels, and in `planner/` the delivery model, the stress samplers and the
posterior update from posted actuals all come from it (their order of draws: `DRAW_ORDER`). Adding a factor: DEVELOPERS.md, "Add a level factor".
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class LevelFactor:
    """One level factor of the error law.

    name : short name (``network_week``), the key of the backtest's ``factor_sd``.
    keys : unit columns whose rows share one draw of the factor within one refit; ``()`` one draw
        for all rows, None each unit-week its own draw.
    label : the name printed for people.
    optional : True when a forecast table may lack the column (written before the factor existed):
        readers take it as zeros.
    measured : True when a backtest block measures its sd (`forecasting.scoring.measured_factor_sds`);
        the common factor has one draw per block, so it is not.
    """

    name: str
    keys: tuple[str, ...] | None
    label: str
    optional: bool = False
    measured: bool = True

    @property
    def rel_column(self) -> str:
        """Column of the level model's relative sd (fraction of the mean), ``rel_sd_<name>``."""
        return f"rel_sd_{self.name}"

    @property
    def table_column(self) -> str:
        """Column of the forecast table's loading (impressions per spot), ``level_sd_<name>``."""
        return f"level_sd_{self.name}"

    @property
    def shared(self) -> bool:
        """True when several unit-weeks share one draw (every factor but the unit-week's own)."""
        return self.keys is not None

    @property
    def shared_by_all(self) -> bool:
        """True for a factor with one draw for every unit (``keys == ()``): it moves a total as
        much as any unit, and refit totals measure it (the common factor)."""
        return self.keys == ()

    @property
    def weekly(self) -> bool:
        """True when each week draws the factor afresh (``week`` among its keys, or the unit-week's
        own): past weeks' errors say nothing of it in later weeks."""
        return self.keys is None or "week" in self.keys

    @property
    def unit_keys(self) -> tuple[str, ...] | None:
        """The keys without the demo (None for the unit-week's own factor): the planner draws one
        standard normal per group of units, shared by every demo of the group (a deal's
        delivery is in one demo; deals in different demos holding the same units share it)."""
        return None if self.keys is None else tuple(k for k in self.keys if k != "demo")


#: the level factors in contract order (the order of the table's ``level_sd_*`` columns)
LEVEL_FACTORS: tuple[LevelFactor, ...] = (
    LevelFactor("common", (), "shared by all units", optional=True, measured=False),
    LevelFactor("network", ("network",), "network"),
    LevelFactor("network_week", ("network", "week"), "network-week", optional=True),
    LevelFactor("flight", ("zone", "network", "daypart", "demo"), "flight"),
    LevelFactor("week", None, "own unit-week"),
)

#: the order the samplers draw the factors in and sum their variances (`planner.delivery`,
#: `planner.stress`, `planner.posterior`): the factors a table always had, then the others in
#: the order they were added. A factor not named here is drawn after these (`in_draw_order`), so
#: a seeded draw of a table without a new factor (its loadings zero: nothing drawn) is the same
#: as before it existed; a new factor needs no entry.
DRAW_ORDER: tuple[str, ...] = ("network", "flight", "week", "network_week", "common")

#: the forecast table's level loading columns (impressions per spot), contract order
TABLE_COLUMNS: tuple[str, ...] = tuple(f.table_column for f in LEVEL_FACTORS)
#: the level model's relative-sd columns (fractions of the mean), contract order
REL_COLUMNS: tuple[str, ...] = tuple(f.rel_column for f in LEVEL_FACTORS)


def factor_named(name: str, factors: tuple[LevelFactor, ...] = LEVEL_FACTORS) -> LevelFactor:
    """The level factor called `name` among `factors` (KeyError if none is)."""
    for f in factors:
        if f.name == name:
            return f
    raise KeyError(name)


def in_draw_order(factors: tuple[LevelFactor, ...] = LEVEL_FACTORS) -> tuple[LevelFactor, ...]:
    """`factors` in `DRAW_ORDER`, any factor it does not name after them in contract order."""
    named = [f for n in DRAW_ORDER for f in factors if f.name == n]
    return tuple(named) + tuple(f for f in factors if f.name not in DRAW_ORDER)


#: the level factors in draw order
DRAWN: tuple[LevelFactor, ...] = in_draw_order()
