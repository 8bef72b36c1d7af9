"""Seeded generator of invented quarter-hour rating history (the "profile" family).

Everything this module makes is invented: zones, networks, advertisers and audiences.

The ratings follow a multiplicative structure in log space, built for every zone x network x
demo x day x quarter-hour at once with numpy (one zone at a time, to bound memory):

    rating = panel( peak[network] * zone_level * zn_level * profile[genre, weekday/weekend, qh]
                    * demo_factor[genre, demo](qh) * season[genre](day) * dow[genre](day)
                    * trend(zone, network, day) * shock[network](day)
                    * exp(day_noise[zone, network, day] + airing_noise[zone, network, day, qh]
                          + demo_noise[zone, network, demo, day, qh]) )

- `profile`: a genre-shaped day over the 96 quarter-hours (sum of von Mises bumps on the clock
  circle over a small overnight floor), perturbed per network by a few smooth harmonics.
- `season`: smooth month-of-year curve; `dow`: day-of-week effect; `trend`: slow linear drift.
- `shock`: episodes lasting weeks, shared by a network in every zone and demo, plus a slow
  network-wide AR(1) drift.
- `day_noise`: AR(1) across days; `airing_noise`: AR(1) within a day, shared by the demos of the
  same airing; `demo_noise`: independent per quarter-hour.
- `panel`: the measurement. A quarter-hour rating is a Poisson count of panel members over the
  panel size (`panel_fraction` x universe), so small zones at night give true zeros.

Gaps: quarter-hours missing at random, a few whole days missing per zone (all networks) and per
series, and some zone x network series with short history (a network launched in a zone a few
months before the end of the history).

The simulation runs `horizon_days` past the end of the history (never written to the history
file) so that tests and the demo builder can size deals against what the "future" delivers.

References
----------
- Box, G. E. P., Jenkins, G. M. (1970), *Time Series Analysis: Forecasting and Control*: the AR(1)
  process used for day-to-day and within-day noise (unit marginal variance: scale sqrt(1 - rho^2)).
- Mardia, K. V., Jupp, P. E. (2000), *Directional Statistics*: the von Mises shape
  exp(kappa (cos(theta - mu) - 1)) used for the bumps of a day profile on the 24-hour circle.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy.signal import lfilter

from planner.atomic import atomic_path

QH = 96
_QH_HOURS = (np.arange(QH) + 0.5) / 4.0  # centre of each quarter-hour, hours from midnight

# Day profiles: (centre hour, width hours, amplitude) bumps, weekday and weekend, plus floor.
_GENRES: dict[str, dict] = {
    "news": dict(
        wd=[(7.0, 1.2, 0.55), (12.0, 1.0, 0.25), (18.0, 1.0, 0.70), (21.7, 1.4, 1.0)],
        we=[(9.0, 2.0, 0.45), (18.0, 1.2, 0.55), (21.5, 1.5, 0.80)],
        floor=0.035, peak=0.009, a2554=0.45, season_extra=None),
    "sports": dict(
        wd=[(12.5, 3.0, 0.20), (20.8, 1.6, 1.0)],
        we=[(14.5, 2.5, 0.90), (20.3, 2.0, 1.0)],
        floor=0.025, peak=0.009, a2554=0.65,
        season_extra=[0.18, 0.10, -0.02, -0.05, -0.08, -0.15, -0.18, -0.05, 0.12, 0.16, 0.16, 0.15]),
    "kids": dict(
        wd=[(7.5, 1.0, 0.70), (12.0, 2.5, 0.40), (16.5, 1.5, 1.0), (19.0, 1.0, 0.45)],
        we=[(8.5, 1.8, 1.0), (13.0, 2.5, 0.60), (18.5, 1.2, 0.50)],
        floor=0.02, peak=0.006, a2554=0.25,
        season_extra=[0.0, 0.0, 0.0, 0.0, 0.02, 0.10, 0.14, 0.10, -0.04, 0.0, 0.0, 0.05]),
    "movies": dict(
        wd=[(15.0, 3.0, 0.25), (21.5, 1.8, 1.0), (0.6, 1.2, 0.55)],
        we=[(14.0, 3.0, 0.50), (21.5, 2.0, 1.0), (0.6, 1.3, 0.60)],
        floor=0.05, peak=0.007, a2554=0.60, season_extra=None),
    "lifestyle": dict(
        wd=[(11.0, 2.5, 0.55), (20.5, 1.5, 1.0)],
        we=[(12.0, 3.0, 0.80), (20.5, 1.6, 0.90)],
        floor=0.03, peak=0.005, a2554=0.55, season_extra=None),
    "drama": dict(
        wd=[(15.0, 2.5, 0.30), (21.0, 1.4, 1.0), (23.5, 1.0, 0.45)],
        we=[(15.0, 3.0, 0.45), (21.0, 1.6, 0.90)],
        floor=0.03, peak=0.008, a2554=0.55, season_extra=None),
    "documentary": dict(
        wd=[(17.0, 2.0, 0.35), (21.0, 1.5, 1.0)],
        we=[(14.0, 3.0, 0.50), (20.5, 2.0, 1.0)],
        floor=0.03, peak=0.004, a2554=0.60, season_extra=None),
    "music": dict(
        wd=[(17.0, 2.0, 0.50), (22.5, 2.0, 1.0), (1.0, 1.5, 0.50)],
        we=[(13.0, 3.0, 0.50), (23.0, 2.0, 1.0), (1.5, 1.5, 0.70)],
        floor=0.04, peak=0.0025, a2554=0.80, season_extra=None),
    "business": dict(
        wd=[(10.5, 2.5, 1.0), (15.0, 1.5, 0.70), (19.0, 1.2, 0.50)],
        we=[(10.0, 2.0, 0.35), (19.0, 1.5, 0.30)],
        floor=0.03, peak=0.003, a2554=0.50, season_extra=None),
    "comedy": dict(
        wd=[(20.5, 1.2, 0.70), (23.3, 1.2, 1.0)],
        we=[(21.0, 2.0, 0.90), (23.5, 1.5, 0.90)],
        floor=0.035, peak=0.005, a2554=0.70, season_extra=None),
    "general": dict(
        wd=[(9.0, 2.0, 0.30), (15.0, 2.5, 0.35), (21.0, 1.6, 1.0)],
        we=[(12.0, 3.0, 0.50), (21.0, 1.8, 0.95)],
        floor=0.03, peak=0.005, a2554=0.60, season_extra=None),
}
GENRES = tuple(_GENRES)

# Log multipliers by month (Jan..Dec): more viewing in winter, less in summer.
_SEASON = np.array([0.10, 0.08, 0.03, -0.02, -0.05, -0.09, -0.11, -0.08, -0.01, 0.03, 0.06, 0.07])
# Log multipliers by weekday (Mon..Sun) on top of the weekday/weekend profile.
_DOW = np.array([0.02, 0.03, 0.02, 0.0, -0.06, -0.04, 0.03])


@dataclass
class HistorySpec:
    """What to simulate. `universes` is (zones, demos) people or homes; dates inclusive."""

    zones: list[str]
    networks: list[str]
    genres: list[str]
    demos: list[str]
    universes: np.ndarray
    start: date
    end: date
    seed: int
    short_history: list[tuple[str, str]] = field(default_factory=list)
    short_history_days: int = 150
    horizon_days: int = 240
    network_peak: dict[str, float] = field(default_factory=dict)
    panel_fraction: float = 0.04
    missing_qh_rate: float = 0.003
    missing_days_per_zone: int = 3
    missing_days_per_series: int = 1

    @property
    def history_days(self) -> int:
        return (self.end - self.start).days + 1

    @property
    def total_days(self) -> int:
        return self.history_days + self.horizon_days


def _profile(bumps: Sequence[tuple[float, float, float]], floor: float) -> np.ndarray:
    """Day profile over 96 quarter-hours (max 1): von Mises bumps on the 24 h clock circle."""
    out = np.full(QH, floor)
    for centre, width, amp in bumps:
        kappa = (24.0 / (2 * np.pi * width)) ** 2
        out = out + amp * np.exp(kappa * (np.cos(2 * np.pi * (_QH_HOURS - centre) / 24.0) - 1.0))
    # Everybody sleeps: damp 02:00-06:00 smoothly so overnight stays near the floor.
    night = np.exp(4.0 * (np.cos(2 * np.pi * (_QH_HOURS - 4.0) / 24.0) - 1.0))
    out = out * (1.0 - 0.6 * night) + floor * 0.6 * night
    return out / out.max()


def _seasonal(dates: np.ndarray, monthly: np.ndarray) -> np.ndarray:
    """Smooth periodic interpolation of 12 monthly values (placed mid-month) at `dates`."""
    months = dates.astype("datetime64[M]")
    m = months.astype(int) % 12
    month_start = months.astype("datetime64[D]")
    next_start = (months + 1).astype("datetime64[D]")
    frac = (dates - month_start).astype(float) / (next_start - month_start).astype(float)
    pos = m + frac - 0.5
    return np.interp(pos, np.arange(12), monthly, period=12)


def _ar1(shocks: np.ndarray, rho: float, axis: int = -1) -> np.ndarray:
    """AR(1) filter along `axis` with unit marginal variance for unit-variance shocks."""
    return lfilter([np.sqrt(1 - rho**2)], [1.0, -rho], shocks, axis=axis)


def _genre(name: str) -> dict:
    return _GENRES.get(str(name).lower(), _GENRES["general"])


class ProfileSim:
    """Shared parts of the simulation (network-level, calendar) and per-zone generation."""

    def __init__(self, spec: HistorySpec):
        self.spec = spec
        n_net, n_dem = len(spec.networks), len(spec.demos)
        days = spec.total_days
        rng = np.random.default_rng([spec.seed, 1])
        self.dates = np.datetime64(spec.start, "D") + np.arange(days)
        dow = (self.dates.astype(int) + 3) % 7  # 1970-01-01 was a Thursday; 0 = Monday
        self.dow = dow
        weekend = dow >= 5
        years = np.arange(days) / 365.25

        # Network programming: the genre profile perturbed by a few smooth harmonics.
        prof = np.empty((n_net, 2, QH))
        phase = 2 * np.pi * _QH_HOURS / 24.0
        for j, g in enumerate(spec.genres):
            gd = _genre(g)
            pert = np.zeros(QH)
            for k in range(1, 5):
                a, b = rng.normal(0, 0.10 / k, 2)
                pert += a * np.cos(k * phase) + b * np.sin(k * phase)
            for w, key in enumerate(("wd", "we")):
                p = _profile(gd[key], gd["floor"]) * np.exp(pert)
                prof[j, w] = p / p.max()
        # log profile per network x day x qh (weekday/weekend choice)
        self.log_prof = np.log(prof[:, weekend.astype(int), :])  # (net, days, qh)

        # Demo factor: genre ratio for a25-54-like demos, a25-54 lower in the working day.
        working = np.exp(3.0 * (np.cos(2 * np.pi * (_QH_HOURS - 12.5) / 24.0) - 1.0))
        dem = np.zeros((n_net, n_dem, 2, QH))
        for j, g in enumerate(spec.genres):
            gd = _genre(g)
            for d, demo in enumerate(spec.demos):
                if demo == "hh":
                    continue
                ratio = gd["a2554"] * float(np.exp(rng.normal(0, 0.08)))
                dem[j, d, 0] = np.log(ratio) - 0.35 * working  # weekday: at work
                dem[j, d, 1] = np.log(ratio) - 0.10 * working
        self.log_demo = dem  # (net, demo, weekday/weekend, qh)
        self.weekend = weekend

        # Network peak level, seasonality, day-of-week, network trend.
        peaks = np.array([
            spec.network_peak.get(n, _genre(g)["peak"] * float(np.exp(rng.normal(0, 0.15))))
            for n, g in zip(spec.networks, spec.genres)
        ])
        base_season = _seasonal(self.dates, _SEASON)
        season = np.empty((n_net, days))
        for j, g in enumerate(spec.genres):
            extra = _genre(g)["season_extra"]
            season[j] = base_season + (0 if extra is None else _seasonal(self.dates, np.asarray(extra)))
        net_trend = rng.normal(-0.04, 0.04, n_net)[:, None] * years[None, :]
        dow_eff = _DOW[dow][None, :] + rng.normal(0, 0.02, (n_net, 7))[:, dow]
        # Shocks shared by a network everywhere: episodes of weeks plus a slow AR(1) drift.
        shock = 0.06 * _ar1(rng.standard_normal((n_net, days)), 0.985)
        t = np.arange(days)
        for j in range(n_net):
            for _ in range(rng.poisson(1.5 * days / 365.25)):
                s0 = rng.integers(0, days)
                length = rng.integers(14, 70)
                amp = rng.normal(0, 0.18)
                ramp = 4.0
                shape = (1 / (1 + np.exp(-(t - s0) / ramp))) * (1 / (1 + np.exp((t - s0 - length) / ramp)))
                shock[j] += amp * shape
        self.log_net_day = np.log(peaks)[:, None] + season + net_trend + dow_eff + shock  # (net, days)
        self.net_shock = shock  # (net, days), log multipliers: the drift and episodes alone
        self.years = years

    def zone(self, zi: int) -> np.ndarray:
        """Measured ratings of zone `zi`: float32 (networks, demos, total_days, 96), no gaps."""
        spec = self.spec
        n_net, n_dem, days = len(spec.networks), len(spec.demos), spec.total_days
        rng = np.random.default_rng([spec.seed, 100 + zi])
        zone_level = rng.normal(0, 0.10)
        zn_level = rng.normal(0, 0.20, n_net)
        zn_trend = rng.normal(0, 0.03, n_net)[:, None] * self.years[None, :]
        day_noise = 0.07 * _ar1(rng.standard_normal((n_net, days)), 0.6)
        log_zn_day = self.log_net_day + zone_level + zn_level[:, None] + zn_trend + day_noise
        base = self.log_prof + log_zn_day[:, :, None]  # (net, days, qh)
        airing = 0.22 * _ar1(rng.standard_normal((n_net, days, QH), dtype=np.float32), 0.5).astype(np.float32)
        base = (base + airing).astype(np.float32)
        out = np.empty((n_net, n_dem, days, QH), dtype=np.float32)
        wk = self.weekend.astype(int)
        for d in range(n_dem):
            demo_noise = 0.10 * rng.standard_normal((n_net, days, QH), dtype=np.float32)
            log_r = base + self.log_demo[:, d][:, wk, :] + demo_noise
            lam = np.exp(log_r, dtype=np.float32)
            panel = max(float(spec.universes[zi, d]) * spec.panel_fraction, 1.0)
            counts = rng.poisson(np.minimum(lam, 1.0).astype(np.float64) * panel)
            out[:, d] = np.minimum(counts / panel, 1.0).astype(np.float32)
        return out

    def history_mask(self, zi: int) -> np.ndarray:
        """Boolean (networks, demos, history_days, 96): True where a history row is present."""
        spec = self.spec
        n_net, n_dem, days = len(spec.networks), len(spec.demos), spec.history_days
        rng = np.random.default_rng([spec.seed, 5000 + zi])
        keep = rng.random((n_net, n_dem, days, QH)) >= spec.missing_qh_rate
        outage = rng.choice(days, size=min(spec.missing_days_per_zone, days), replace=False)
        keep[:, :, outage, :] = False
        for j in range(n_net):
            lost = rng.choice(days, size=min(spec.missing_days_per_series, days), replace=False)
            keep[j, :, lost, :] = False
        zone = spec.zones[zi]
        for z, n in spec.short_history:
            if z == zone and n in spec.networks:
                keep[spec.networks.index(n), :, : max(days - spec.short_history_days, 0), :] = False
        return keep


def _dict_column(names: Sequence[str], idx: np.ndarray) -> pa.Array:
    return pa.DictionaryArray.from_arrays(pa.array(idx.astype(np.int32)), pa.array(list(names))).cast(pa.string())


GENERATOR_VERSION = "1"
METADATA_KEY = b"pledge.history_generator"


def spec_digest(spec: HistorySpec) -> str:
    """Short digest of everything that determines the generated history (and the code version)."""
    d = {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in spec.__dict__.items()}
    text = json.dumps({"version": GENERATOR_VERSION, **d}, sort_keys=True, default=str)
    return hashlib.sha1(text.encode()).hexdigest()[:16]


HISTORY_SCHEMA = pa.schema([
    ("zone", pa.string()), ("network", pa.string()), ("demo", pa.string()),
    ("date", pa.date32()), ("quarter_hour", pa.int16()), ("rating", pa.float32()),
])


def write_spec(spec: HistorySpec, path: str | Path) -> Path:
    """Simulate `spec` and write its history (start..end) to Parquet at `path` atomically."""
    return write_history_parquet(path, ProfileSim(spec), zones=spec.zones, networks=spec.networks, demos=spec.demos,
                                 start=spec.start, days=spec.history_days, digest=spec_digest(spec))


def write_history_parquet(path: str | Path, sim, *, zones: Sequence[str], networks: Sequence[str],
                          demos: Sequence[str], start, days: int, digest: str) -> Path:
    """Write a simulation's history days to Parquet at `path` atomically, one zone at a time.

    `sim` gives ``zone(zi)`` (ratings, (networks, demos, >= days, 96)) and ``history_mask(zi)``
    (bool, (networks, demos, days, 96): the cells the history holds). The data contract's columns
    (zone, network, demo string, date date32, quarter_hour int16, rating float32), rows in zone,
    network, demo, date, quarter-hour order; the schema metadata carries `digest`.
    """
    path = Path(path)
    n_net, n_dem = len(networks), len(demos)
    # Index grids for one zone in (network, demo, day, qh) C order.
    net_i = np.repeat(np.arange(n_net), n_dem * days * QH)
    dem_i = np.tile(np.repeat(np.arange(n_dem), days * QH), n_net)
    day_i = np.tile(np.repeat(np.arange(days), QH), n_net * n_dem)
    qh_i = np.tile(np.arange(QH, dtype=np.int16), n_net * n_dem * days)
    day0 = (np.datetime64(start, "D") - np.datetime64("1970-01-01", "D")).astype(int)
    with atomic_path(path) as tmp:
        schema = HISTORY_SCHEMA.with_metadata({METADATA_KEY: digest.encode()})
        with pq.ParquetWriter(tmp, schema, compression="zstd") as writer:
            for zi, zone in enumerate(zones):
                ratings = sim.zone(zi)[:, :, :days, :].reshape(-1)
                keep = sim.history_mask(zi).reshape(-1)
                n = int(keep.sum())
                table = pa.table({
                    "zone": _dict_column([zone], np.zeros(n, dtype=np.int32)),
                    "network": _dict_column(networks, net_i[keep]),
                    "demo": _dict_column(demos, dem_i[keep]),
                    "date": pa.array((day0 + day_i[keep]).astype(np.int32), type=pa.int32()).cast(pa.date32()),
                    "quarter_hour": pa.array(qh_i[keep]),
                    "rating": pa.array(ratings[keep]),
                }, schema=schema)
                writer.write_table(table, row_group_size=1 << 20)
    return path


def generate_history(
    path: str | Path,
    *,
    zones: Sequence[str],
    networks: Sequence[str],
    demos: Sequence[str],
    universes: Mapping[tuple[str, str], float] | np.ndarray,
    start: date,
    end: date,
    seed: int,
    genres: Sequence[str] | None = None,
    short_history: Iterable[tuple[str, str]] = (),
    **options,
) -> Path:
    """Write invented quarter-hour rating history to Parquet at `path`; return the path.

    Parameters
    ----------
    zones, networks, demos : identifiers; `genres` one per network (unknown -> "general"; None:
        the genres in turn).
    universes : {(zone, demo): people} or an array (zones, demos) of people (or homes).
    start, end : first and last calendar day of the history, inclusive.
    seed : the whole output is a function of the inputs and this seed.
    short_history : (zone, network) series whose history starts `short_history_days` before end.
    options : further `HistorySpec` fields (horizon_days, network_peak, panel_fraction, ...).

    Columns: zone, network, demo (string), date (date32), quarter_hour (int16, 0..95),
    rating (float32 fraction of the universe, in [0, 1]).
    """
    spec = make_spec(zones=zones, networks=networks, genres=genres, demos=demos, universes=universes,
                     start=start, end=end, seed=seed, short_history=short_history, **options)
    return write_spec(spec, path)


def make_spec(*, zones, networks, demos, universes, start, end, seed, genres=None, short_history=(),
              **options) -> HistorySpec:
    """Build a `HistorySpec` (see `generate_history` for the arguments)."""
    zones, networks, demos = list(zones), list(networks), list(demos)
    if genres is None:
        genres = [GENRES[i % len(GENRES)] for i in range(len(networks))]
    if isinstance(universes, Mapping):
        uni = np.array([[float(universes[(z, d)]) for d in demos] for z in zones])
    else:
        uni = np.asarray(universes, dtype=float).reshape(len(zones), len(demos))
    return HistorySpec(zones=zones, networks=networks, genres=list(genres), demos=demos, universes=uni,
                       start=start, end=end, seed=int(seed),
                       short_history=[(str(z), str(n)) for z, n in short_history], **options)


def spec_from_scenario(scenario) -> HistorySpec:
    """The `HistorySpec` described by a loaded scenario's `[history_generator]` table."""
    g = dict(scenario.history_generator)
    uni = scenario.universes.set_index(["zone", "demo"])["universe"]
    zones = list(scenario.zones["zone"])
    networks = list(scenario.networks["network"])
    genres = list(scenario.networks["genre"])
    demos = list(scenario.demos)
    options = {k: g[k] for k in ("short_history_days", "horizon_days", "panel_fraction", "missing_qh_rate",
                                 "missing_days_per_zone", "missing_days_per_series") if k in g}
    if "network_peak" in g:
        options["network_peak"] = {str(k): float(v) for k, v in dict(g["network_peak"]).items()}
    return make_spec(
        zones=zones, networks=networks, genres=genres, demos=demos,
        universes={(z, d): float(uni[(z, d)]) for z in zones for d in demos},
        start=g["start"], end=g["end"], seed=int(g["seed"]),
        short_history=[tuple(x) for x in g.get("short_history", [])], **options)


def simulate_truth(spec: HistorySpec):
    """Measured ratings over the whole simulated span (history + horizon), no gaps.

    Returns (dates, array) with array float32 of shape (zones, networks, demos, total_days, 96).
    Used to size the demo's deals and by tests; several hundred MB for the full demo.
    """
    sim = ProfileSim(spec)
    return sim.dates, np.stack([sim.zone(zi) for zi in range(len(spec.zones))])


# ----------------------------------------------------------------------------- scenario folders

def demo_path() -> Path:
    """The shipped demo scenario folder (its history is generated on first use)."""
    return Path(__file__).resolve().parent / "demo"
