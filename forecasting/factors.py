"""The level factors of the forecast's error law: the one list every other module derives from.

A unit-week's level error (DEVELOPERS.md, "Forecast table") is a sum of independent normal
factors, each shared by the unit-weeks that agree on its grouping keys. `LEVEL_FACTORS` lists them
in contract order; the level model's relative-sd columns (``rel_sd_*``, fractions of the mean),
the forecast table's loadings (``level_sd_*``, impressions per spot), the backtest's factor list
and the printed labels all come from it. Adding a factor: DEVELOPERS.md, "Add a level factor".
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


#: the level factors in contract order (the order of the table's ``level_sd_*`` columns)
LEVEL_FACTORS: tuple[LevelFactor, ...] = (
    LevelFactor("common", (), "shared by all units", optional=True, measured=False),
    LevelFactor("network", ("network",), "network"),
    LevelFactor("network_week", ("network", "week"), "network-week", optional=True),
    LevelFactor("flight", ("zone", "network", "daypart", "demo"), "flight"),
    LevelFactor("week", None, "own unit-week"),
)

#: the forecast table's level loading columns (impressions per spot), contract order
TABLE_COLUMNS: tuple[str, ...] = tuple(f.table_column for f in LEVEL_FACTORS)
#: the level model's relative-sd columns (fractions of the mean), contract order
REL_COLUMNS: tuple[str, ...] = tuple(f.rel_column for f in LEVEL_FACTORS)


def factor_named(name: str) -> LevelFactor:
    """The level factor called `name` (KeyError if none is)."""
    for f in LEVEL_FACTORS:
        if f.name == name:
            return f
    raise KeyError(name)
