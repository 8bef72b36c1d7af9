"""Load and validate a scenario folder (see the data contract); the only reader of scenario files.

`load_scenario(path)` reads and checks everything except the quarter-hour history rows, which can
be hundreds of millions: `validate_history(scenario)` checks those with DuckDB (vectorised, out of
core) and `load_history(scenario)` reads them. Every problem is reported as a
`planner.errors.ScenarioError` whose message names the file, the row (1-based data row, the header
not counted) or key, and what is wrong; several problems are collected where that is cheap.

Addition to the data contract: `scenario.toml` may carry a `[history_generator]` table
(`seed`, `start`, `end`, optional `short_history`, ...). The loader checks the table and accepts a
folder whose history is missing when it is present; it never generates: whoever opens a folder
for work (`planner.workflows.open_scenario`, `scenarios.families.ensure_history`) makes the
missing history first. Its optional `family` names the generator: "profile" (the default,
`scenarios.generate`) or "drift" (`scenarios.drift`, with its knobs); dispatch in
`scenarios.families`.

Addition to the data contract: the history may instead be a folder `history/` of Parquet parts
(`history/*.parquet`, searched recursively), each part holding all the history columns, for a
history too big for one file (bench/generate_large.py writes one part per zone). It is used
when neither `history.parquet` nor `history.csv` exists; `scenario.history_path` is the folder.
"""
from __future__ import annotations

import difflib
import hashlib
import re
import tomllib
from dataclasses import dataclass, field
from datetime import date, timedelta
from pathlib import Path
from typing import Any, Sequence

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from planner import rules as rl
from planner import terms as tm
from planner.errors import ScenarioError
from planner.plain import is_int as _is_int
from planner.plain import is_num as _is_num

DEFAULT_CONFIDENCE = 0.95
DAY_NAMES = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
QUARTER_HOURS = 96
_IDENT = re.compile(r"^[a-z][a-z0-9_\-]*$")
_CLOCK = re.compile(r"^(\d{1,2}):(\d{2})$")
#: the keys of a deal file (data contract, deals/NAME.toml); anything else is refused
DEAL_KEYS = ("name", "advertiser", "demo", "impressions", "first_week", "last_week", "price_cpm", "confidence",
             "pad", "mix", "terms")
#: the keys of a [terms] table (deal file, scenario.toml defaults): `planner.terms`
TERMS_KEYS = tm.TERMS_KEYS
#: the keys of a deal file's [mix] table: every rule family's (`planner.rules.FAMILIES`, `mix_keys`)
MIX_KEYS = rl.mix_keys()
HISTORY_COLUMNS = ("zone", "network", "demo", "date", "quarter_hour", "rating")
#: families of invented history a [history_generator] table may name (`family`; absent: "profile")
GENERATOR_FAMILIES = ("profile", "drift")
_GENERATOR_COMMON = ("family", "seed", "start", "end")
#: the keys of a [history_generator] table of the profile family (scenarios.generate)
PROFILE_GENERATOR_KEYS = _GENERATOR_COMMON + (
    "short_history", "short_history_days", "horizon_days", "panel_fraction", "missing_qh_rate",
    "missing_days_per_zone", "missing_days_per_series", "network_peak")


def _num_in(lo: float, hi: float, *, lo_open: bool = False, hi_open: bool = False):
    def ok(v: Any) -> bool:
        return _is_num(v) and (lo < v if lo_open else lo <= v) and (v < hi if hi_open else v <= hi)
    return ok


#: the knobs of the drift family (scenarios.drift.DriftSpec fields): key -> (what it must be, check)
DRIFT_GENERATOR_RULES: dict[str, tuple[str, Any]] = {
    "network_shock_rho": ("a number with -1 < rho < 1", _num_in(-1, 1, lo_open=True, hi_open=True)),
    "network_shock_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "zone_network_shock_rho": ("a number with -1 < rho < 1", _num_in(-1, 1, lo_open=True, hi_open=True)),
    "zone_network_shock_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "season_amplitude": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "erosion_mean": ("a yearly rate with -0.5 <= rate <= 0.5 (fraction)", _num_in(-0.5, 0.5)),
    "erosion_sd": ("a number >= 0 (fraction per year)", _num_in(0, 1)),
    "launch_network": ("the name of a network in networks.csv", lambda v: isinstance(v, str)),
    "launch_months": ("a whole number of months >= 0 (0: no launch)", lambda v: _is_int(v) and v >= 0),
    "floor": ("a rating fraction with 0 <= floor < 1", _num_in(0, 1, hi_open=True)),
    "missing_day_share": ("a share with 0 <= share < 1", _num_in(0, 1, hi_open=True)),
    "missing_qh_share": ("a share with 0 <= share < 1", _num_in(0, 1, hi_open=True)),
    "peak_jitter_hours": ("a number of hours >= 0", _num_in(0, 12)),
    "network_level_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "zone_level_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "zone_network_level_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "demo_ratio_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "day_noise_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "airing_noise_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
    "demo_noise_sd": ("a number >= 0 (log scale)", _num_in(0, 5)),
}
#: the keys of a [history_generator] table of the drift family (scenarios.drift)
DRIFT_GENERATOR_KEYS = _GENERATOR_COMMON + tuple(DRIFT_GENERATOR_RULES)
#: scenarios.drift.DriftSpec.launch_months when the table does not set it
DRIFT_DEFAULT_LAUNCH_MONTHS = 9
_MAX_LISTED = 3


@dataclass(frozen=True)
class Daypart:
    """A sellable block of clock time.

    `start`/`end` are "HH:MM" local clock (start inclusive, end exclusive); `days` weekday numbers
    0=Mon..6=Sun on which the daypart starts; `quarter_hours` indices relative to the start day
    (0..95; >= 96 means the next calendar day, for a daypart that wraps past midnight).
    """

    name: str
    start: str
    end: str
    days: tuple[int, ...]
    quarter_hours: tuple[int, ...]

    @property
    def wraps(self) -> bool:
        """True when the daypart runs past midnight into the next calendar day."""
        return self.quarter_hours[-1] >= QUARTER_HOURS

    @property
    def hours(self) -> float:
        """Length of the daypart on one day, hours."""
        return len(self.quarter_hours) / 4.0

    def slots(self) -> np.ndarray:
        """Week slots covered, ints in 0..671 (day * 96 + quarter-hour, wrapping Sunday -> Monday)."""
        d = np.asarray(self.days)[:, None] * QUARTER_HOURS + np.asarray(self.quarter_hours)[None, :]
        return (d % (7 * QUARTER_HOURS)).ravel()


@dataclass
class Mix:
    """Mix rules of a deal (every field optional). Shares are of expected impressions."""

    max_network_share: float | None = None
    daypart_min_share: dict[str, float] = field(default_factory=dict)
    daypart_max_share: dict[str, float] = field(default_factory=dict)
    exclude_networks: tuple[str, ...] = ()
    exclude_zones: tuple[str, ...] = ()
    weekly_tolerance: float | None = None
    max_spots_per_unit: int | None = None
    #: settings of rule families without a field above, by [mix] key (`planner.rules`)
    extra: dict[str, Any] = field(default_factory=dict)


@dataclass
class Deal:
    """A proposed deal. `impressions` is the guarantee in `demo`; weeks are plan weeks, inclusive.

    Exactly one of `confidence` (chance of meeting the guarantee) and `pad` (plan to deliver
    (1 + pad) x guarantee in expectation) is set; neither in the file gives DEFAULT_CONFIDENCE and
    `risk_default_used = True`.
    """

    name: str
    advertiser: str
    demo: str
    impressions: float
    first_week: int
    last_week: int
    price_cpm: float
    confidence: float | None
    pad: float | None
    mix: Mix
    path: Path
    risk_default_used: bool = False
    #: make-good terms (`planner.terms.Terms`): the deal file's [terms] over scenario.toml's
    terms: tm.Terms = field(default_factory=tm.Terms)

    @property
    def weeks(self) -> list[int]:
        """Plan weeks of the flight."""
        return list(range(self.first_week, self.last_week + 1))

    @property
    def revenue(self) -> float:
        """What the advertiser pays for the guarantee: impressions / 1000 x price_cpm, currency."""
        return self.impressions / 1000.0 * self.price_cpm


@dataclass
class Scenario:
    """A loaded scenario folder.

    `zones`: DataFrame zone, market (, time_zone); `networks`: DataFrame network, genre;
    `universes`: DataFrame zone, demo, universe (people or homes, float); `inventory`: DataFrame
    zone, network, daypart, week, avails (int), rate (float, currency per spot), preempt_rate.
    """

    path: Path
    name: str
    first_week: date
    weeks: int
    currency: str
    preempt_rate: float
    dayparts: list[Daypart]
    zones: pd.DataFrame
    universes: pd.DataFrame
    networks: pd.DataFrame
    inventory: pd.DataFrame
    deals: dict[str, Deal]
    demos: list[str]
    history_path: Path
    history_generator: dict | None = None
    #: scenario.toml's [terms]: the make-good terms of a deal file without its own
    terms: tm.Terms = field(default_factory=tm.Terms)

    def week_start(self, w: int) -> date:
        """The Monday that starts plan week `w` (1-based)."""
        return self.first_week + timedelta(days=7 * (int(w) - 1))

    def week_end(self, w: int) -> date:
        """The Sunday that ends plan week `w`."""
        return self.week_start(w) + timedelta(days=6)

    @property
    def zone_names(self) -> list[str]:
        return list(self.zones["zone"])

    @property
    def network_names(self) -> list[str]:
        return list(self.networks["network"])

    @property
    def daypart_names(self) -> list[str]:
        return [d.name for d in self.dayparts]

    def daypart(self, name: str) -> Daypart:
        for d in self.dayparts:
            if d.name == name:
                return d
        raise KeyError(name)

    def universe(self, zone: str, demo: str) -> float:
        """Universe of `demo` in `zone`, people (or homes)."""
        u = self.universes
        return float(u.loc[(u["zone"] == zone) & (u["demo"] == demo), "universe"].iloc[0])

    def genre(self, network: str) -> str:
        n = self.networks
        return str(n.loc[n["network"] == network, "genre"].iloc[0])


# ----------------------------------------------------------------------------- problem collection

class _Problems:
    def __init__(self) -> None:
        self.items: list[str] = []

    def add(self, message: str) -> None:
        self.items.append(message)

    def rows(self, file: str, mask: np.ndarray | pd.Series, what: str, values: pd.Series | None = None) -> None:
        """Add one problem for the rows where `mask` is True (1-based data rows)."""
        mask = np.asarray(mask, dtype=bool)
        if not mask.any():
            return
        idx = np.flatnonzero(mask)
        first = idx[:_MAX_LISTED]
        shown = ", ".join(str(i + 1) for i in first)
        more = f" (and {len(idx) - len(first)} more)" if len(idx) > len(first) else ""
        got = ""
        if values is not None:
            got = f", got {np.asarray(values)[first[0]]!r}"
        label = "row" if len(idx) == 1 else "rows"
        self.add(f"{file} {label} {shown}{more}: {what}{got}")

    def raise_if_any(self) -> None:
        if self.items:
            if len(self.items) == 1:
                raise ScenarioError(self.items[0])
            err = ScenarioError(f"{len(self.items)} problems:\n  " + "\n  ".join(self.items))
            err.problems = list(self.items)
            raise err


# ----------------------------------------------------------------------------- helpers

def _read_toml(path: Path, label: str) -> dict:
    if not path.is_file():
        raise ScenarioError(f"{label}: file is missing")
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{label}: not valid TOML ({exc})") from None
    except UnicodeDecodeError:
        raise ScenarioError(f"{label}: not UTF-8 text") from None


def _read_csv(folder: Path, name: str, required: Sequence[str]) -> pd.DataFrame:
    path = folder / name
    if not path.is_file():
        raise ScenarioError(f"{name}: file is missing")
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True, encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise ScenarioError(f"{name}: not UTF-8 text") from None
    except pd.errors.EmptyDataError:
        raise ScenarioError(f"{name}: file is empty (a header row is required)") from None
    except pd.errors.ParserError as exc:
        raise ScenarioError(f"{name}: cannot be parsed as CSV ({exc})") from None
    df.columns = [str(c).strip().lower() for c in df.columns]
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise ScenarioError(f"{name}: missing column(s) {', '.join(missing)} (has {', '.join(df.columns)})")
    for c in df.columns:
        df[c] = df[c].astype(str).str.strip()
    return df


def _blank(df: pd.DataFrame, name: str, cols: Sequence[str], problems: _Problems) -> np.ndarray:
    bad = np.zeros(len(df), dtype=bool)
    for c in cols:
        m = (df[c] == "").to_numpy()
        problems.rows(name, m, f"{c} is empty")
        bad |= m
    return bad


def _numeric(df: pd.DataFrame, col: str) -> pd.Series:
    return pd.to_numeric(df[col], errors="coerce").astype(float)


def _duplicates(df: pd.DataFrame, name: str, key: Sequence[str], problems: _Problems) -> None:
    dup = df.duplicated(list(key), keep="first").to_numpy()
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        first = int(np.flatnonzero((df[list(key)] == df.iloc[i][list(key)]).all(axis=1).to_numpy())[0])
        keytxt = ", ".join(f"{k}={df.iloc[i][k]}" for k in key)
        n = int(dup.sum())
        more = f" ({n - 1} more duplicate rows)" if n > 1 else ""
        problems.add(f"{name} row {i + 1}: duplicate key ({keytxt}), first seen at row {first + 1}{more}")


def _unknown(df: pd.DataFrame, name: str, col: str, known: Sequence[str], what: str, problems: _Problems,
             skip: np.ndarray | None = None) -> None:
    m = ~df[col].isin(list(known)).to_numpy()
    if skip is not None:
        m &= ~skip
    problems.rows(name, m, f"unknown {what} (not in {_source_of(what)})", df[col])


def _source_of(what: str) -> str:
    return {"zone": "zones.csv", "network": "networks.csv", "daypart": "the dayparts of scenario.toml",
            "demo": "universes.csv"}.get(what, what)


def parse_clock(text: Any, *, allow_24: bool = False) -> int:
    """Quarter-hour index of an "HH:MM" clock time on a quarter-hour (0..95, or 96 for "24:00").

    Raises ValueError with a readable reason.
    """
    m = _CLOCK.match(str(text).strip()) if isinstance(text, str) else None
    if not m:
        raise ValueError(f"clock time must be \"HH:MM\", got {text!r}")
    h, mi = int(m.group(1)), int(m.group(2))
    if h == 24 and mi == 0 and allow_24:
        return QUARTER_HOURS
    if not (0 <= h <= 23 and 0 <= mi <= 59):
        raise ValueError(f"clock time out of range, got {text!r}")
    if mi % 15:
        raise ValueError(f"clock time must be on a quarter-hour (:00, :15, :30, :45), got {text!r}")
    return h * 4 + mi // 15


def daypart_quarter_hours(start_qh: int, end_qh: int) -> tuple[int, ...]:
    """Quarter-hours of a daypart relative to its start day; wraps past midnight if end <= start."""
    if end_qh > start_qh:
        return tuple(range(start_qh, end_qh))
    return tuple(range(start_qh, end_qh + QUARTER_HOURS))


def _as_date(value: Any) -> date:
    if isinstance(value, date) and not hasattr(value, "hour"):
        return value
    if hasattr(value, "date") and callable(value.date):  # a TOML datetime
        raise ValueError(f"must be a date without a time, got {value!r}")
    if isinstance(value, str):
        try:
            return date.fromisoformat(value.strip())
        except ValueError:
            raise ValueError(f"date does not parse (use YYYY-MM-DD), got {value!r}") from None
    raise ValueError(f"must be a date (YYYY-MM-DD), got {value!r}")


# ----------------------------------------------------------------------------- scenario.toml

def _parse_dayparts(raw: Any, problems: _Problems) -> list[Daypart]:
    f = "scenario.toml"
    if not isinstance(raw, list) or not raw:
        problems.add(f"{f}: at least one [[daypart]] table is required")
        return []
    out: list[Daypart] = []
    seen: set[str] = set()
    for i, d in enumerate(raw, start=1):
        if not isinstance(d, dict):
            problems.add(f"{f}: daypart {i} must be a table")
            continue
        name = d.get("name")
        where = f"{f} daypart {i}" + (f" ({name!r})" if isinstance(name, str) else "")
        if not isinstance(name, str) or not _IDENT.match(name):
            problems.add(f"{where}: name must be a lower-case identifier (letters, digits, _ or -), got {name!r}")
            continue
        if name in seen:
            problems.add(f"{where}: duplicate daypart name {name!r}")
            continue
        seen.add(name)
        try:
            s = parse_clock(d.get("start"))
        except ValueError as exc:
            problems.add(f"{where}: start: {exc}")
            continue
        try:
            e = parse_clock(d.get("end"), allow_24=True)
        except ValueError as exc:
            problems.add(f"{where}: end: {exc}")
            continue
        if s == e % QUARTER_HOURS:
            problems.add(f"{where}: start and end are the same clock time ({d.get('start')})")
            continue
        days_raw = d.get("days", list(DAY_NAMES))
        if not isinstance(days_raw, list) or not days_raw:
            problems.add(f"{where}: days must be a non-empty list of {', '.join(DAY_NAMES)}")
            continue
        bad = [x for x in days_raw if not isinstance(x, str) or x.strip().lower()[:3] not in DAY_NAMES]
        if bad:
            problems.add(f"{where}: unknown day {bad[0]!r} (use {', '.join(DAY_NAMES)})")
            continue
        days = tuple(sorted({DAY_NAMES.index(x.strip().lower()[:3]) for x in days_raw}))
        out.append(Daypart(name=name, start=str(d["start"]).strip(), end=str(d["end"]).strip(), days=days,
                           quarter_hours=daypart_quarter_hours(s, e)))
    # Overlap: the same weekday and clock time claimed twice (wrapping parts land on the next day).
    owner = np.full(7 * QUARTER_HOURS, -1)
    for k, dp in enumerate(out):
        slots = dp.slots()
        taken = owner[slots]
        clash = taken[taken >= 0]
        if clash.size:
            other = out[int(clash[0])]
            slot = int(slots[np.flatnonzero(taken >= 0)[0]])
            day, qh = divmod(slot, QUARTER_HOURS)
            problems.add(f"{f}: dayparts {other.name!r} and {dp.name!r} overlap "
                         f"({DAY_NAMES[day]} {qh // 4:02d}:{qh % 4 * 15:02d})")
        else:
            owner[slots] = k
    return out


def _parse_generator(raw: Any, problems: _Problems) -> dict | None:
    f = "scenario.toml [history_generator]"
    if raw is None:
        return None
    if not isinstance(raw, dict):
        problems.add(f"{f}: must be a table")
        return None
    g = dict(raw)
    family = g.get("family", "profile")
    if family not in GENERATOR_FAMILIES:
        problems.add(f"{f}: family must be one of {', '.join(GENERATOR_FAMILIES)}, got {family!r}")
        return None
    _unknown_keys(f, g, DRIFT_GENERATOR_KEYS if family == "drift" else PROFILE_GENERATOR_KEYS, problems)
    if family == "drift":
        for k, (what, ok) in DRIFT_GENERATOR_RULES.items():
            if k in g and not ok(g[k]):
                problems.add(f"{f}: {k} must be {what}, got {g[k]!r}")
    if not _is_int(g.get("seed")):
        problems.add(f"{f}: seed must be an integer, got {g.get('seed')!r}")
    for k in ("start", "end"):
        try:
            g[k] = _as_date(g.get(k))
        except ValueError as exc:
            problems.add(f"{f}: {k}: {exc}")
            return None
    if g["start"] > g["end"]:
        problems.add(f"{f}: start {g['start']} is after end {g['end']}")
    sh = g.get("short_history", [])
    if not isinstance(sh, list) or any(not (isinstance(x, list) and len(x) == 2) for x in sh):
        problems.add(f"{f}: short_history must be a list of [zone, network] pairs")
        g["short_history"] = []
    return g


# ----------------------------------------------------------------------------- deals

def _unknown_keys(f: str, raw: dict, known: Sequence[str], problems: _Problems, table: str = "") -> None:
    """One problem per key of `raw` not in `known` (a misspelt optional key would otherwise be
    silently ignored and its default used), with the closest known key as a hint."""
    where = f"{table} " if table else ""
    for k in raw:
        if k not in known:
            near = difflib.get_close_matches(str(k), known, n=1, cutoff=0.6)
            hint = f"did you mean {near[0]!r}? " if near else ""
            problems.add(f"{f}: {where}unknown key {k!r} ({hint}known: {', '.join(known)})")


def _parse_deal(path: Path, raw: dict, *, weeks: int, demos: Sequence[str], zones: Sequence[str],
                networks: Sequence[str], dayparts: Sequence[str], problems: _Problems,
                terms: tm.Terms | None = None) -> Deal | None:
    f = f"deals/{path.name}"
    start = len(problems.items)
    _unknown_keys(f, raw, DEAL_KEYS, problems)
    for k in ("name", "advertiser", "demo", "impressions", "first_week", "last_week", "price_cpm"):
        if k not in raw:
            problems.add(f"{f}: missing key {k!r}")
    if len(problems.items) > start:
        return None
    name, adv, demo = raw["name"], raw["advertiser"], raw["demo"]
    if not isinstance(name, str) or not name.strip():
        problems.add(f"{f}: name must be a non-empty string, got {name!r}")
    if not isinstance(adv, str):
        problems.add(f"{f}: advertiser must be a string, got {adv!r}")
    if not isinstance(demo, str) or demo not in demos:
        problems.add(f"{f}: demo {demo!r} is unknown (universes.csv has {', '.join(demos)})")
    imp = raw["impressions"]
    if not _is_num(imp) or imp <= 0:
        problems.add(f"{f}: impressions (the guarantee) must be a positive number, got {imp!r}")
    fw, lw = raw["first_week"], raw["last_week"]
    for k, v in (("first_week", fw), ("last_week", lw)):
        if not _is_int(v) or not 1 <= v <= weeks:
            problems.add(f"{f}: {k} must be a plan week 1..{weeks} of the inventory, got {v!r}")
    if _is_int(fw) and _is_int(lw) and fw > lw:
        problems.add(f"{f}: first_week {fw} is after last_week {lw}")
    cpm = raw["price_cpm"]
    if not _is_num(cpm) or cpm < 0:
        problems.add(f"{f}: price_cpm must be a number >= 0, got {cpm!r}")
    conf, pad = raw.get("confidence"), raw.get("pad")
    if conf is not None and pad is not None:
        problems.add(f"{f}: give either confidence or pad, not both")
    if conf is not None and (not _is_num(conf) or not 0.5 < conf < 0.999):
        problems.add(f"{f}: confidence must be a number in (0.5, 0.999), got {conf!r}")
    if pad is not None and (not _is_num(pad) or pad < 0):
        problems.add(f"{f}: pad must be a number >= 0, got {pad!r}")
    mix = _parse_mix(f, raw.get("mix", {}), zones=zones, networks=networks, dayparts=dayparts, problems=problems)
    deal_terms = tm.parse_terms(raw.get("terms"), f, terms or tm.Terms(), problems.add)
    if len(problems.items) > start:
        return None
    default = conf is None and pad is None
    return Deal(name=name.strip(), advertiser=adv, demo=demo, impressions=float(imp), first_week=int(fw),
                last_week=int(lw), price_cpm=float(cpm),
                confidence=DEFAULT_CONFIDENCE if default else (float(conf) if conf is not None else None),
                pad=float(pad) if pad is not None else None, mix=mix, path=path, risk_default_used=default,
                terms=deal_terms)


def _parse_mix(f: str, raw: Any, *, zones, networks, dayparts, problems: _Problems) -> Mix:
    """The deal's [mix] table: each rule family of `planner.rules.FAMILIES` reads and checks its
    own keys (`RuleFamily.parse_mix`); a key no family reads is a problem."""
    if not isinstance(raw, dict):
        problems.add(f"{f}: [mix] must be a table")
        return Mix()
    _unknown_keys(f, raw, rl.mix_keys(), problems, "[mix]")
    settings = rl.parse_mix(raw, rl.DealFile(f, zones=zones, networks=networks, dayparts=dayparts), problems.add)
    fields = {k for k in Mix.__dataclass_fields__ if k != "extra"}
    mix = Mix(**{k: v for k, v in settings.items() if k in fields})
    mix.extra = {k: v for k, v in settings.items() if k not in fields}
    return mix


# ----------------------------------------------------------------------------- the loader

def _read_header(folder: Path, problems: _Problems) -> dict:
    """scenario.toml's keys, checked: name, first_week, weeks, currency, preempt_rate, dayparts,
    generator (the [history_generator] table or None), demos (the list given, or None)."""
    f = "scenario.toml"
    cfg = _read_toml(folder / f, f)
    name = cfg.get("name", folder.name)
    if not isinstance(name, str):
        problems.add(f"{f}: name must be a string, got {name!r}")
        name = folder.name
    first_week = None
    if "first_week" not in cfg:
        problems.add(f"{f}: missing key 'first_week'")
    else:
        try:
            first_week = _as_date(cfg["first_week"])
            if first_week.weekday() != 0:
                problems.add(f"{f}: first_week {first_week} is a {DAY_NAMES[first_week.weekday()]}, not a Monday")
        except ValueError as exc:
            problems.add(f"{f}: first_week: {exc}")
    weeks = cfg.get("weeks")
    if not _is_int(weeks) or weeks < 1:
        problems.add(f"{f}: weeks must be a whole number >= 1, got {weeks!r}")
        weeks = 0
    currency = cfg.get("currency", "USD")
    if not isinstance(currency, str) or not currency.strip():
        problems.add(f"{f}: currency must be a non-empty string, got {currency!r}")
    preempt = cfg.get("preempt_rate", 0.0)
    if not _is_num(preempt) or not 0 <= preempt < 1:
        problems.add(f"{f}: preempt_rate must be a number with 0 <= p < 1, got {preempt!r}")
        preempt = 0.0
    dayparts = _parse_dayparts(cfg.get("daypart"), problems)
    terms = tm.parse_terms(cfg.get("terms"), f, tm.Terms(), problems.add)
    generator = _parse_generator(cfg.get("history_generator"), problems)
    demos_cfg = cfg.get("demos")
    if demos_cfg is not None and (not isinstance(demos_cfg, list) or not all(isinstance(x, str) for x in demos_cfg)):
        problems.add(f"{f}: demos must be a list of demo names")
        demos_cfg = None
    return dict(name=name, first_week=first_week, weeks=weeks, currency=currency, preempt=preempt,
                dayparts=dayparts, generator=generator, demos=demos_cfg, terms=terms)


def _read_zones_networks(folder: Path, problems: _Problems) -> tuple[pd.DataFrame, pd.DataFrame]:
    """zones.csv and networks.csv, checked (blank cells, duplicates, none at all)."""
    zones = _read_csv(folder, "zones.csv", ["zone", "market"])
    _blank(zones, "zones.csv", ["zone", "market"], problems)
    _duplicates(zones, "zones.csv", ["zone"], problems)
    networks = _read_csv(folder, "networks.csv", ["network", "genre"])
    _blank(networks, "networks.csv", ["network"], problems)
    _duplicates(networks, "networks.csv", ["network"], problems)
    if not len(zones):
        problems.add("zones.csv: no zones")
    if not len(networks):
        problems.add("networks.csv: no networks")
    return zones, networks


def _read_universes(folder: Path, zone_names: list, demos_cfg: list | None,
                    problems: _Problems) -> tuple[pd.DataFrame, list[str]]:
    """universes.csv, checked, as the DataFrame zone, demo, universe (float); and the demos
    (scenario.toml's list, else the universes' in file order)."""
    uni = _read_csv(folder, "universes.csv", ["zone", "demo", "universe"])
    blank = _blank(uni, "universes.csv", ["zone", "demo", "universe"], problems)
    _unknown(uni, "universes.csv", "zone", zone_names, "zone", problems, skip=blank)
    if demos_cfg is not None:
        m = ~uni["demo"].isin(demos_cfg).to_numpy() & ~blank
        problems.rows("universes.csv", m, f"demo not in scenario.toml demos ({', '.join(demos_cfg)})", uni["demo"])
    u = _numeric(uni, "universe")
    problems.rows("universes.csv", (~(u > 0) & ~blank).to_numpy(), "universe must be a positive number", uni["universe"])
    _duplicates(uni, "universes.csv", ["zone", "demo"], problems)
    demos = list(demos_cfg) if demos_cfg is not None else list(dict.fromkeys(uni.loc[~blank, "demo"]))
    universes = pd.DataFrame({"zone": uni["zone"].astype(str), "demo": uni["demo"].astype(str),
                              "universe": u.astype(float)})
    return universes, demos


def _read_deals(folder: Path, problems: _Problems, **context) -> dict[str, Deal]:
    """deals/*.toml, each checked against `context` (weeks, demos, zones, networks, dayparts, and
    the scenario's default `terms`)."""
    deals: dict[str, Deal] = {}
    deal_dir = folder / "deals"
    if deal_dir.exists() and not deal_dir.is_dir():
        problems.add("deals: must be a folder of .toml files")
    files = sorted(deal_dir.glob("*.toml")) if deal_dir.is_dir() else []
    for p in files:
        try:
            raw = _read_toml(p, f"deals/{p.name}")
        except ScenarioError as exc:
            problems.add(str(exc))
            continue
        deal = _parse_deal(p, raw, problems=problems, **context)
        if deal is None:
            continue
        if deal.name in deals:
            problems.add(f"deals/{p.name}: duplicate deal name {deal.name!r} (also in deals/{deals[deal.name].path.name})")
            continue
        deals[deal.name] = deal
    return deals


def _check_universe_coverage(universes: pd.DataFrame, zone_names: list, demos: list, problems: _Problems) -> None:
    """Every zone has a universe for every demo used anywhere."""
    have = set(zip(universes["zone"], universes["demo"]))
    for z in zone_names:
        lacking = [d for d in demos if (z, d) not in have]
        if lacking:
            problems.add(f"universes.csv: zone {z!r} has no row for demo(s) {', '.join(lacking)}")


def _read_inventory(folder: Path, problems: _Problems, *, weeks: int, preempt: float, zone_names: list,
                    network_names: list, dp_names: list, allow_empty: bool) -> pd.DataFrame:
    """inventory.csv, checked, as zone, network, daypart, week, avails, rate, preempt_rate (the
    scenario's default where a row gives none); raises every problem collected so far."""
    inv_file = "inventory.csv"
    inv = _read_csv(folder, inv_file, ["zone", "network", "daypart", "week", "avails", "rate"])
    blank = _blank(inv, inv_file, ["zone", "network", "daypart", "week", "avails", "rate"], problems)
    _unknown(inv, inv_file, "zone", zone_names, "zone", problems, skip=blank)
    _unknown(inv, inv_file, "network", network_names, "network", problems, skip=blank)
    _unknown(inv, inv_file, "daypart", dp_names, "daypart", problems, skip=blank)
    wk = _numeric(inv, "week")
    bad = (~((wk >= 1) & (wk <= weeks) & (wk == np.round(wk))) & ~blank).to_numpy()
    problems.rows(inv_file, bad, f"week must be a whole plan week 1..{weeks}", inv["week"])
    av = _numeric(inv, "avails")
    problems.rows(inv_file, ((av.isna()) & ~blank).to_numpy(), "avails must be a number", inv["avails"])
    problems.rows(inv_file, ((av < 0) & ~blank).to_numpy(), "avails must be >= 0", inv["avails"])
    problems.rows(inv_file, ((av >= 0) & (av != np.round(av)) & ~blank).to_numpy(),
                  "avails must be a whole number of spots", inv["avails"])
    rate = _numeric(inv, "rate")
    problems.rows(inv_file, ((rate.isna()) & ~blank).to_numpy(), "rate must be a number", inv["rate"])
    problems.rows(inv_file, ((rate < 0) & ~blank).to_numpy(), "rate must be >= 0", inv["rate"])
    if "preempt_rate" in inv.columns:
        given = (inv["preempt_rate"] != "").to_numpy()
        pr = _numeric(inv, "preempt_rate")
        problems.rows(inv_file, given & ~((pr >= 0) & (pr < 1)).to_numpy(),
                      "preempt_rate must be a number with 0 <= p < 1", inv["preempt_rate"])
        pr = pr.where(given, float(preempt))
    else:
        pr = pd.Series(float(preempt), index=inv.index)
    _duplicates(inv, inv_file, ["zone", "network", "daypart", "week"], problems)
    if inv.empty and not allow_empty:
        problems.add(f"{inv_file}: no rows (nothing can be bought)")
    problems.raise_if_any()
    return pd.DataFrame({
        "zone": inv["zone"].astype(str), "network": inv["network"].astype(str),
        "daypart": inv["daypart"].astype(str), "week": wk.astype("int64"),
        "avails": av.astype("int64"), "rate": rate.astype(float), "preempt_rate": pr.astype(float),
    })


def _check_generator_names(generator: dict | None, first_week, zone_names: list, network_names: list,
                           problems: _Problems) -> None:
    """The [history_generator] table's zones and networks exist; the drift family's calendar holds."""
    if generator is None:
        return
    for z, n in generator.get("short_history", []):
        if z not in zone_names or n not in network_names:
            problems.add(f"scenario.toml [history_generator]: short_history [{z!r}, {n!r}] names an unknown "
                         "zone or network")
    if generator.get("family") == "drift":
        _check_drift_calendar(generator, first_week, network_names, problems)
    problems.raise_if_any()


def _find_history(folder: Path) -> Path:
    """history.parquet, else history.csv, else a history/ folder of parts, else history.parquet (to come)."""
    hp, hc, hd = folder / "history.parquet", folder / "history.csv", folder / "history"
    return hp if hp.is_file() else (hc if hc.is_file() else (hd if _history_exists(hd) else hp))


def load_scenario(path: str | Path, *, allow_empty_inventory: bool = False) -> Scenario:
    """Load and validate the scenario folder at `path` (all files except the history rows).

    A missing history is accepted when `[history_generator]` can make it (the scenario's
    `history_path` is then the `history.parquet` to come; `scenarios.families.ensure_history`
    writes it); the loader never generates.
    `allow_empty_inventory` accepts an inventory.csv with no rows (the demo builder's placeholder,
    written before the real inventory is computed); otherwise it is a problem.
    Raises `ScenarioError` naming the file, row or key and what is wrong.
    """
    folder = Path(path)
    if not folder.is_dir():
        raise ScenarioError(f"{folder}: not a scenario folder (no such directory)")
    if not (folder / "scenario.toml").is_file():
        raise ScenarioError(f"{folder}: not a scenario folder (scenario.toml is missing)")
    problems = _Problems()
    h = _read_header(folder, problems)
    problems.raise_if_any()
    zones, networks = _read_zones_networks(folder, problems)
    problems.raise_if_any()
    zone_names, network_names = list(zones["zone"]), list(networks["network"])
    dp_names = [d.name for d in h["dayparts"]]
    universes, demos = _read_universes(folder, zone_names, h["demos"], problems)
    problems.raise_if_any()
    # deal demos must be in universes; collected before the coverage check
    deals = _read_deals(folder, problems, weeks=h["weeks"], demos=demos, zones=zone_names, networks=network_names,
                        dayparts=dp_names, terms=h["terms"])
    _check_universe_coverage(universes, zone_names, demos, problems)
    inventory = _read_inventory(folder, problems, weeks=h["weeks"], preempt=h["preempt"], zone_names=zone_names,
                                network_names=network_names, dp_names=dp_names, allow_empty=allow_empty_inventory)
    networks_df = networks.copy()
    networks_df["genre"] = networks_df["genre"].str.lower()
    _check_generator_names(h["generator"], h["first_week"], zone_names, network_names, problems)
    history_path = _find_history(folder)
    scenario = Scenario(path=folder, name=h["name"], first_week=h["first_week"], weeks=int(h["weeks"]),
                        currency=h["currency"].strip(), preempt_rate=float(h["preempt"]), dayparts=h["dayparts"],
                        zones=zones.copy(), universes=universes, networks=networks_df, inventory=inventory,
                        deals=deals, demos=demos, history_path=history_path, history_generator=h["generator"],
                        terms=h["terms"])
    if not _history_exists(history_path) and h["generator"] is None:
        raise ScenarioError("history.parquet: file is missing (no history.csv, and scenario.toml has no "
                            "[history_generator] table to make one)")
    if _history_exists(history_path):
        _check_history_columns(history_path)
    return scenario


def _check_drift_calendar(g: dict, first_week: date, networks: Sequence[str], problems: _Problems) -> None:
    """The drift family simulates the plan weeks after the history: `end` before `first_week`, and
    the launched network (`launch_network`, default the last network) launched before `end`."""
    f = "scenario.toml [history_generator]"
    if g["end"] >= first_week:
        problems.add(f"{f}: end {g['end']} must be before first_week {first_week} (the drift family simulates "
                     "the plan weeks after the history)")
        return
    launch = g.get("launch_network", networks[-1])
    if "launch_network" in g and launch not in networks:
        problems.add(f"{f}: launch_network {launch!r} is not a network in networks.csv")
        return
    months = g.get("launch_months", DRIFT_DEFAULT_LAUNCH_MONTHS)
    if months:
        day = (pd.Timestamp(first_week) - pd.DateOffset(months=int(months))).date()
        if day > g["end"]:
            problems.add(f"{f}: launch_months {months} puts the launch of {launch} on {day}, after the history's "
                         f"end {g['end']} (the network would have no history)")


def _history_parts(path: Path) -> list[Path]:
    """The Parquet parts of a `history/` folder, sorted."""
    return sorted(p for p in Path(path).rglob("*.parquet") if p.is_file())


def _history_exists(path: Path) -> bool:
    """A history file, or a history folder with at least one Parquet part."""
    path = Path(path)
    return path.is_file() or (path.is_dir() and bool(_history_parts(path)))


def _check_history_columns(path: Path) -> None:
    name = path.name
    if path.is_dir():  # a folder of parts: check the first part's columns
        parts = _history_parts(path)
        if not parts:
            raise ScenarioError(f"{name}/: no Parquet parts in the history folder")
        name = f"{name}/{parts[0].relative_to(path)}"
        path = parts[0]
    if path.suffix == ".parquet":
        try:
            cols = [c.lower() for c in pq.read_schema(path).names]
        except Exception as exc:  # noqa: BLE001 - any unreadable file is bad input
            raise ScenarioError(f"{name}: not a readable Parquet file ({exc})") from None
    else:
        try:
            cols = [c.strip().lower() for c in pd.read_csv(path, nrows=0).columns]
        except Exception as exc:  # noqa: BLE001
            raise ScenarioError(f"{name}: cannot be parsed as CSV ({exc})") from None
    missing = [c for c in HISTORY_COLUMNS if c not in cols]
    if missing:
        raise ScenarioError(f"{name}: missing column(s) {', '.join(missing)} (has {', '.join(cols)})")


# ----------------------------------------------------------------------------- history

def history_fingerprint(scenario: Scenario) -> str:
    """A cheap token that changes when the history file changes (path, size, mtime)."""
    p = Path(scenario.history_path)
    files = _history_parts(p) if p.is_dir() else [p]
    text = "|".join(f"{f.resolve()}|{f.stat().st_size}|{f.stat().st_mtime_ns}" for f in files)
    return hashlib.sha1(text.encode()).hexdigest()[:16]


def _relation(con, path: Path) -> str:
    """Register `path` as DuckDB view `h` with typed (TRY_CAST) columns; returns the view name."""
    p = str(path).replace("'", "''")
    if path.is_dir():
        src = f"read_parquet('{p}/**/*.parquet', hive_partitioning = false, union_by_name = true)"
    elif path.suffix == ".parquet":
        src = f"read_parquet('{p}')"
    else:
        src = f"read_csv('{p}', header=true, all_varchar=true)"
    con.execute(f"""
        CREATE OR REPLACE TEMP VIEW raw AS SELECT * FROM {src};
        CREATE OR REPLACE TEMP VIEW h AS SELECT
            trim(CAST(zone AS VARCHAR)) AS zone, trim(CAST(network AS VARCHAR)) AS network,
            trim(CAST(demo AS VARCHAR)) AS demo,
            CAST(date AS VARCHAR) AS date_text, TRY_CAST(date AS DATE) AS date,
            CAST(quarter_hour AS VARCHAR) AS qh_text, TRY_CAST(quarter_hour AS DOUBLE) AS quarter_hour,
            CAST(rating AS VARCHAR) AS rating_text, TRY_CAST(rating AS DOUBLE) AS rating
        FROM raw;
    """)
    return "h"


@dataclass
class HistorySummary:
    """What `validate_history` found. Dates inclusive; completeness = rows / expected rows."""

    path: str
    rows: int
    series: int
    start: date | None
    end: date | None
    days: int
    completeness: float
    zero_share: float
    rating_max: float
    short_series: list[dict]
    missing_series: list[dict] = field(default_factory=list)


def validate_history(scenario: Scenario) -> HistorySummary:
    """Check every history row (DuckDB, out of core) and summarise; raises ScenarioError.

    Checks: dates parse, quarter_hour whole 0..95, rating a number in [0, 1], zone/network/demo
    known, key (zone, network, demo, date, quarter_hour) unique. `completeness` is rows over
    series x days of the whole span x 96; `short_series` lists series starting > 28 days late.
    """

    path = Path(scenario.history_path)
    name = path.name
    if not _history_exists(path):
        raise ScenarioError(f"{name}: file is missing")
    _check_history_columns(path)
    con = duckdb.connect()
    try:
        con.execute("SET preserve_insertion_order = true")
        con.execute("SET enable_progress_bar = false")
        _relation(con, path)
        con.register("kz", pd.DataFrame({"zone": scenario.zone_names}))
        con.register("kn", pd.DataFrame({"network": scenario.network_names}))
        con.register("kd", pd.DataFrame({"demo": list(scenario.demos)}))
        checks = [
            ("date IS NULL", "date does not parse (use YYYY-MM-DD)", "date_text"),
            ("quarter_hour IS NULL OR quarter_hour <> round(quarter_hour) OR quarter_hour < 0 OR quarter_hour > 95",
             "quarter_hour must be a whole number 0..95", "qh_text"),
            ("rating IS NULL OR isnan(rating) OR rating < 0 OR rating > 1", "rating must be a fraction in [0, 1]",
             "rating_text"),
            ("zone NOT IN (SELECT zone FROM kz) OR zone IS NULL", "unknown zone (not in zones.csv)", "zone"),
            ("network NOT IN (SELECT network FROM kn) OR network IS NULL", "unknown network (not in networks.csv)",
             "network"),
            ("demo NOT IN (SELECT demo FROM kd) OR demo IS NULL", "unknown demo (not in universes.csv)", "demo"),
        ]
        select = ", ".join(f"count(*) FILTER (WHERE {cond})" for cond, _, _ in checks)
        counts = con.execute(f"SELECT {select} FROM h").fetchone()
        problems = _Problems()
        for (cond, what, col), n in zip(checks, counts):
            if n:
                row, val = con.execute(
                    f"SELECT rn, v FROM (SELECT row_number() OVER () AS rn, {col} AS v, * FROM h) "
                    f"WHERE {cond} LIMIT 1").fetchone()
                more = f" (and {n - 1} more)" if n > 1 else ""
                problems.add(f"{name} row {row}{more}: {what}, got {val!r}")
        problems.raise_if_any()
        clean = path.is_file() and path.suffix == ".parquet" and _parquet_keys_unique(path, scenario)
        dup = None if clean else con.execute("""
            SELECT zone, network, demo, date, quarter_hour, count(*) AS n FROM h
            GROUP BY ALL HAVING count(*) > 1 LIMIT 1""").fetchone()
        if dup:
            ndup = con.execute("""SELECT count(*) - count(DISTINCT (zone, network, demo, date, quarter_hour))
                                  FROM h""").fetchone()[0]
            raise ScenarioError(f"{name}: duplicate key (zone={dup[0]}, network={dup[1]}, demo={dup[2]}, "
                                f"date={dup[3]}, quarter_hour={int(dup[4])}) appears {dup[5]} times "
                                f"({ndup} duplicate rows in all)")
        per = con.execute("""
            SELECT zone, network, demo, min(date) AS first, max(date) AS last, count(*) AS n,
                   count(*) FILTER (WHERE rating = 0) AS zeros, max(rating) AS rmax
            FROM h GROUP BY ALL ORDER BY ALL""").df()
    finally:
        con.close()
    rows = int(per["n"].sum())
    if rows == 0:
        return HistorySummary(str(path), 0, 0, None, None, 0, 0.0, 0.0, 0.0, [])
    start = pd.Timestamp(per["first"].min()).date()
    end = pd.Timestamp(per["last"].max()).date()
    days = (end - start).days + 1
    first = pd.to_datetime(per["first"])
    late = per[(first - pd.Timestamp(start)).dt.days > 28]
    short = [{"zone": r.zone, "network": r.network, "demo": r.demo, "first": pd.Timestamp(r.first).date()}
             for r in late.itertuples()]
    # Sold units (inventory zone x network) with no history at all in some demo: forecasts must
    # borrow everything from the network and genre.
    sold = scenario.inventory[["zone", "network"]].drop_duplicates()
    want = sold.merge(pd.DataFrame({"demo": list(scenario.demos)}), how="cross")
    have = per[["zone", "network", "demo"]].astype(str).assign(_h=True)
    lack = want.merge(have, on=["zone", "network", "demo"], how="left")
    missing = lack.loc[lack["_h"].isna(), ["zone", "network", "demo"]].to_dict("records")
    return HistorySummary(path=str(path), rows=rows, series=len(per), start=start, end=end, days=days,
                          completeness=rows / (len(per) * days * QUARTER_HOURS),
                          zero_share=float(per["zeros"].sum()) / rows, rating_max=float(per["rmax"].max()),
                          short_series=short, missing_series=missing)


def _parquet_keys_unique(path: Path, scenario: Scenario) -> bool:
    """True when the Parquet history's keys are unique (numpy, streamed by batches).

    One int64 key per row; strictly increasing (the usual file, written in key order) or unique
    after sorting. False means "look closer" (DuckDB then locates the duplicate). Assumes
    zone/network/demo/date/quarter_hour already checked (known and valid).
    """

    cols = ["zone", "network", "demo", "date", "quarter_hour"]
    known = [scenario.zone_names, scenario.network_names, list(scenario.demos)]
    try:
        pf = pq.ParquetFile(path, read_dictionary=cols[:3])
        keys = np.empty(pf.metadata.num_rows, dtype=np.int64)
        at = 0
        for batch in pf.iter_batches(batch_size=1 << 20, columns=cols):
            code = np.zeros(batch.num_rows, dtype=np.int64)
            for i, names in enumerate(known):
                col = batch.column(i)
                if not pa.types.is_dictionary(col.type):
                    col = pc.dictionary_encode(pc.cast(col, pa.string()))
                lookup = pc.index_in(pc.utf8_trim_whitespace(col.dictionary), value_set=pa.array(names, pa.string()))
                if lookup.null_count:
                    return False
                code = code * len(names) + lookup.to_numpy()[col.indices.to_numpy()].astype(np.int64)
            day = pc.cast(batch.column(3), pa.date32()).cast(pa.int32()).to_numpy().astype(np.int64)
            qh = pc.cast(batch.column(4), pa.int64()).to_numpy()
            # 2**18 days (~700 years) per series, offset so dates before 1970 stay positive
            keys[at:at + batch.num_rows] = (code * 262_144 + (day + 131_072)) * QUARTER_HOURS + qh
            at += batch.num_rows
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return False
    keys = keys[:at]
    if keys.size < 2 or np.all(keys[1:] > keys[:-1]):
        return True
    keys.sort()
    return bool(np.all(keys[1:] != keys[:-1]))


def load_history(scenario: Scenario, columns: Sequence[str] | None = None, *, filters=None) -> pd.DataFrame:
    """Read the history rows into a DataFrame (no row checks: see `validate_history`).

    `columns` a subset of zone, network, demo, date, quarter_hour, rating; `filters` a pyarrow
    filter expression or list of tuples, e.g. [("demo", "=", "hh")]. `date` is datetime64,
    `quarter_hour` int16, `rating` float32 (fraction of the universe).
    """

    path = Path(scenario.history_path)
    cols = list(columns) if columns is not None else list(HISTORY_COLUMNS)
    if path.suffix == ".parquet" or path.is_dir():
        table = pq.read_table(path, columns=cols, filters=filters)
        df = table.to_pandas(date_as_object=False)
    else:
        df = pd.read_csv(path, usecols=cols)
        if filters is not None:
            table = pa.Table.from_pandas(df, preserve_index=False)
            df = ds.dataset(table).to_table(filter=pq.filters_to_expression(filters)).to_pandas()
        if "date" in df:
            df["date"] = pd.to_datetime(df["date"], format="ISO8601")
    if "quarter_hour" in df:
        df["quarter_hour"] = df["quarter_hour"].astype("int16")
    if "rating" in df:
        df["rating"] = df["rating"].astype("float32")
    return df
