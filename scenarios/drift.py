"""Second family of invented quarter-hour rating history ("drift"): weekly shocks, erosion, a launch.

Everything this module makes is invented. It is built to differ in structure from the "profile"
family (`scenarios.generate`), so that the forecast can be measured on more than one kind of
history. Per zone z, network n, demo k, day t and quarter-hour q, in log rating:

    log r = L[n] + log shape[genre(n), weekend(t), q]            network level, day shape
          + A cos(2 pi (tau(t) - phi[n]))                         season, own phase per network
          + g[n] * t / 365.25                                     erosion, g[n] = log(1 + rate[n])
          + S[n, week(t)] + S[z, n, week(t)]                      weekly AR(1) shocks
          + Z[z] + ZN[z, n]                                       zone and zone x network levels
          + log ratio[genre(n), k, weekend(t), q]                 demo ratio by genre, time of day
          + e_day[z, n, t] + e_air[z, n, t, q] + e_demo[z, n, k, t, q]   iid normal noise
    rating = min(exp(log r), 1), read as exactly 0 below `floor` (the measurement floor)

- `shape`: a genre's day over the 96 quarter-hours, weekday and weekend apart, as a sum of
  two-piece (split) normal peaks (a rise and a fall width each, on the 24-hour clock, wrapped)
  over a base, times a piecewise-linear sleep trough (02:00-06:00), scaled to 1 at its top; the
  weekend shape carries the genre's weekend level. Each network shifts its genre's peaks by
  `N(0, peak_jitter_hours)` hours.
- `tau`: calendar time in years since 2000-01-01; `phi[n] ~ U(0, 1)` (the season's top falls on
  day-of-year `365.25 phi[n]`); `A = season_amplitude`.
- `rate[n] ~ N(erosion_mean, erosion_sd)` (fraction per year, clipped to [-0.5, 0.5]); `t` in
  days since the first simulated day.
- `S[n, w]`: stationary Gaussian AR(1) over calendar weeks (Monday to Sunday) per network, shared
  by every zone and demo, `rho = network_shock_rho`, marginal sd `network_shock_sd`; `S[z, n, w]`
  the same per zone x network (`zone_network_shock_*`). Both run on through the plan weeks.
- `launch_network` (default the last network) launches `launch_months` calendar months before
  plan week 1: no history before the launch in any zone; the truth is 0 before it (not aired).
- Gaps (history only): each zone x network day is missing (every demo, every quarter-hour) with
  chance `missing_day_share`; each quarter-hour row with chance `missing_qh_share`.
- The simulation covers the history (`start`..`end`), the lead (`lead_days` days) and the plan
  weeks (`plan_weeks`, one day more for dayparts past midnight): `simulate_drift` returns all of
  it without gaps (the truth), `write_drift_history` writes the history days only, with gaps.

Random draws come from streams keyed by (seed, component, zone, network, demo), so a component's
knob set to 0 leaves every other component's draws unchanged, and a longer horizon leaves the
history unchanged.

References
----------
- Box, G. E. P., Jenkins, G. M. (1970), *Time Series Analysis: Forecasting and Control*,
  Holden-Day: the stationary AR(1) process x_w = rho x_(w-1) + sd sqrt(1 - rho^2) e_w, x_0 ~ N(0, sd^2).
- John, S. (1982), "The three-parameter two-piece normal family of distributions and its fitting",
  Communications in Statistics - Theory and Methods 11(8): the split normal peak shape.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, fields
from datetime import date, timedelta
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from scenarios.generate import QH, write_history_parquet

DRIFT_VERSION = "1"
_HOURS = (np.arange(QH) + 0.5) / 4.0  # centre of each quarter-hour, hours from midnight
_EPOCH = np.datetime64("2000-01-01", "D")

# Per genre: hh rating at the weekday top of the day (`level`), weekend level (log), base of the
# day shape (fraction of its top), ratio of an adult demo to households (`adult`), the adult
# demo's dip in weekday working hours (log), and peaks (centre hour, rise sd h, fall sd h, height)
# on weekdays and weekends. The main peak (height 1) sets the top of the day. Invented numbers.
DRIFT_GENRES: dict[str, dict] = {
    "news": dict(level=0.006, weekend=-0.05, base=0.06, adult=0.50, work_dip=0.30,
                 wd=[(6.75, 0.8, 1.5, 0.55), (12.25, 0.6, 1.0, 0.30), (18.5, 1.2, 0.9, 1.0), (22.0, 0.7, 1.0, 0.6)],
                 we=[(9.5, 1.5, 1.8, 1.0), (18.0, 1.0, 1.2, 0.7), (22.0, 0.8, 1.0, 0.5)]),
    "sports": dict(level=0.007, weekend=0.15, base=0.04, adult=0.62, work_dip=0.25,
                   wd=[(12.0, 2.0, 2.0, 0.25), (20.75, 1.5, 1.2, 1.0)],
                   we=[(15.0, 2.0, 2.5, 1.0), (20.5, 1.2, 1.5, 0.75)]),
    "kids": dict(level=0.005, weekend=0.10, base=0.03, adult=0.22, work_dip=0.10,
                 wd=[(7.25, 0.6, 0.9, 0.6), (12.0, 1.5, 1.5, 0.35), (16.5, 1.5, 1.0, 1.0)],
                 we=[(8.5, 1.0, 2.0, 1.0), (14.0, 2.0, 2.0, 0.55), (18.5, 1.0, 1.0, 0.45)]),
    "movies": dict(level=0.006, weekend=0.10, base=0.08, adult=0.58, work_dip=0.35,
                   wd=[(15.0, 2.0, 2.0, 0.30), (21.25, 1.5, 1.3, 1.0), (0.5, 0.7, 1.2, 0.45)],
                   we=[(15.5, 2.5, 2.0, 1.0), (21.0, 1.6, 1.5, 0.85)]),
    "lifestyle": dict(level=0.004, weekend=0.05, base=0.05, adult=0.55, work_dip=0.40,
                      wd=[(10.5, 1.5, 2.5, 1.0), (20.0, 1.0, 1.2, 0.8)],
                      we=[(13.0, 2.0, 2.5, 1.0), (20.0, 1.2, 1.2, 0.6)]),
    "drama": dict(level=0.007, weekend=-0.05, base=0.05, adult=0.55, work_dip=0.35,
                  wd=[(15.0, 2.0, 1.5, 0.30), (21.5, 1.2, 1.0, 1.0)],
                  we=[(14.0, 2.0, 2.0, 0.45), (20.5, 1.5, 1.5, 1.0)]),
    "documentary": dict(level=0.0035, weekend=0.0, base=0.05, adult=0.60, work_dip=0.35,
                        wd=[(17.0, 1.5, 1.0, 0.40), (20.25, 1.2, 1.2, 1.0)],
                        we=[(16.0, 2.5, 2.0, 1.0), (20.5, 1.2, 1.2, 0.8)]),
    "music": dict(level=0.0025, weekend=0.05, base=0.08, adult=0.75, work_dip=0.30,
                  wd=[(17.0, 1.5, 1.5, 0.50), (23.0, 1.5, 1.5, 1.0)],
                  we=[(14.0, 2.5, 2.5, 0.50), (23.75, 1.5, 1.5, 1.0)]),
    "business": dict(level=0.003, weekend=-0.6, base=0.06, adult=0.50, work_dip=0.25,
                     wd=[(9.5, 1.0, 2.5, 1.0), (15.5, 1.2, 1.2, 0.70), (19.0, 1.0, 1.0, 0.40)],
                     we=[(11.0, 1.5, 2.0, 1.0), (19.0, 1.5, 1.5, 0.80)]),
    "comedy": dict(level=0.0045, weekend=0.0, base=0.05, adult=0.68, work_dip=0.30,
                   wd=[(19.5, 1.0, 1.0, 0.60), (22.5, 1.2, 1.0, 1.0)],
                   we=[(16.0, 2.0, 2.0, 0.50), (23.0, 1.5, 1.2, 1.0)]),
    "general": dict(level=0.0045, weekend=0.0, base=0.06, adult=0.60, work_dip=0.30,
                    wd=[(9.0, 1.2, 1.5, 0.30), (15.0, 2.0, 2.0, 0.35), (20.5, 1.5, 1.2, 1.0)],
                    we=[(12.5, 2.0, 2.0, 0.50), (19.5, 1.8, 1.5, 1.0)]),
}
# Sleep trough (hour, multiplier), piecewise linear over the clock; adult working hours (weekdays).
_AWAKE = ((0.0, 1.0), (1.0, 0.9), (2.5, 0.5), (4.0, 0.25), (5.5, 0.3), (7.0, 0.75), (8.5, 1.0), (24.0, 1.0))
_WORKING = ((0.0, 0.0), (8.0, 0.0), (9.5, 1.0), (16.5, 1.0), (18.0, 0.0), (24.0, 0.0))

# Stream tags of the random draws (one stream per component and zone / network / demo).
_NET, _SHOCK, _ZONE, _ZN, _ZN_SHOCK, _DAY, _AIR, _DEMO, _MASK = 1, 2, 3, 4, 5, 6, 7, 8, 9
_TAG = 7411


def drift_genre(name: str) -> dict:
    """The genre's row of `DRIFT_GENRES` (unknown genres: "general")."""
    return DRIFT_GENRES.get(str(name).lower(), DRIFT_GENRES["general"])


def main_peak_hour(genre: str, weekend: bool) -> float:
    """Centre hour of the genre's main peak (height 1) on weekdays or weekends, hours from midnight."""
    peaks = drift_genre(genre)["we" if weekend else "wd"]
    return float(max(peaks, key=lambda p: p[3])[0])


def _piecewise(knots: Sequence[tuple[float, float]]) -> np.ndarray:
    """Piecewise-linear curve through (hour, value) knots, at the 96 quarter-hour centres."""
    h, v = np.array(knots, dtype=float).T
    return np.interp(_HOURS, h, v)


def _shape_of(g: dict, weekend: bool, shift_hours: float) -> np.ndarray:
    out = np.full(QH, g["base"])
    for centre, rise, fall, height in g["we" if weekend else "wd"]:
        d = (_HOURS - centre - shift_hours + 12.0) % 24.0 - 12.0  # signed hours from the centre, wrapped
        out = out + height * np.exp(-0.5 * (d / np.where(d < 0, rise, fall)) ** 2)
    out = out * _piecewise(_AWAKE)
    return out / out.max() * (np.exp(g["weekend"]) if weekend else 1.0)


def day_shape(genre: str, weekend: bool, shift_hours: float = 0.0) -> np.ndarray:
    """A genre's day shape over the 96 quarter-hours (top 1 on weekdays), float64 (96,).

    Sum of split normal peaks (John 1982) over the genre's base, times the sleep trough, scaled to
    1 at its top; the weekend shape is scaled by exp(genre weekend level). `shift_hours` moves
    every peak (a network's schedule a little earlier or later).
    """
    return _shape_of(drift_genre(genre), weekend, shift_hours)


def months_before(day: date, months: int) -> date:
    """The calendar date `months` months before `day` (day of month clipped to the month's end)."""
    return (pd.Timestamp(day) - pd.DateOffset(months=int(months))).date()


@dataclass
class DriftSpec:
    """What to simulate (drift family). Names are identifiers; `start`/`end` the history, inclusive.

    The knobs (every field after `seed` except `lead_days`/`plan_weeks` is a knob a scenario's
    `[history_generator]` table may set, see `DRIFT_KNOBS`): log-scale sds, AR(1) coefficients,
    fractions per year (erosion), shares (gaps), rating fraction (floor), months (launch).
    """

    zones: list[str]
    networks: list[str]
    genres: list[str]
    demos: list[str]
    start: date
    end: date
    seed: int
    lead_days: int = 28            # days from the history's end to plan week 1 (0: the day after)
    plan_weeks: int = 13           # plan weeks simulated after the lead
    network_shock_rho: float = 0.7
    network_shock_sd: float = 0.08
    zone_network_shock_rho: float = 0.5
    zone_network_shock_sd: float = 0.05
    season_amplitude: float = 0.08
    erosion_mean: float = -0.06
    erosion_sd: float = 0.05
    launch_network: str | None = None  # None: the last network
    launch_months: int = 9             # 0: no launch
    floor: float = 2e-5
    missing_day_share: float = 0.02
    missing_qh_share: float = 0.001
    peak_jitter_hours: float = 0.25
    network_level_sd: float = 0.25
    zone_level_sd: float = 0.15
    zone_network_level_sd: float = 0.25
    demo_ratio_sd: float = 0.10
    day_noise_sd: float = 0.05
    airing_noise_sd: float = 0.15
    demo_noise_sd: float = 0.08

    def __post_init__(self):
        self.zones, self.networks, self.demos = list(self.zones), list(self.networks), list(self.demos)
        self.genres = list(self.genres)
        if len(self.genres) != len(self.networks):
            raise ValueError("one genre per network")
        if self.end < self.start:
            raise ValueError(f"history end {self.end} is before its start {self.start}")
        if self.lead_days < 0 or self.plan_weeks < 0:
            raise ValueError("lead_days and plan_weeks must be >= 0")
        for k in ("network_shock_rho", "zone_network_shock_rho"):
            if not -1 < getattr(self, k) < 1:
                raise ValueError(f"{k} must be in (-1, 1)")
        if self.launch_months and self.launch_name not in self.networks:
            raise ValueError(f"launch_network {self.launch_network!r} is not one of the networks")
        if self.launch_months and self.launch_date > self.end:
            raise ValueError(f"launch_months {self.launch_months} puts the launch of {self.launch_name} on "
                             f"{self.launch_date}, after the history's end {self.end}")

    @property
    def history_days(self) -> int:
        return (self.end - self.start).days + 1

    @property
    def plan_start(self) -> date:
        """First day of plan week 1."""
        return self.end + timedelta(days=1 + self.lead_days)

    @property
    def horizon_days(self) -> int:
        """Days simulated after the history: the lead, the plan weeks and one day for dayparts past midnight."""
        return self.lead_days + 7 * self.plan_weeks + 1

    @property
    def total_days(self) -> int:
        return self.history_days + self.horizon_days

    @property
    def launch_name(self) -> str | None:
        """The launched network (None when `launch_months` is 0)."""
        if not self.launch_months:
            return None
        return self.launch_network if self.launch_network is not None else self.networks[-1]

    @property
    def launch_date(self) -> date | None:
        """First day the launched network airs: `launch_months` calendar months before plan week 1."""
        return months_before(self.plan_start, self.launch_months) if self.launch_months else None


#: the DriftSpec fields a scenario's [history_generator] table may set (besides family, seed, start, end)
DRIFT_KNOBS = tuple(f.name for f in fields(DriftSpec)
                    if f.name not in ("zones", "networks", "genres", "demos", "start", "end", "seed",
                                      "lead_days", "plan_weeks"))


def _rng(spec: DriftSpec, *key: int) -> np.random.Generator:
    return np.random.default_rng([spec.seed, _TAG, *key])


def ar1(e: np.ndarray, rho: float, sd: float) -> np.ndarray:
    """Stationary Gaussian AR(1) along the last axis from iid N(0, 1) innovations `e`.

    x_0 = sd e_0, x_w = rho x_(w-1) + sd sqrt(1 - rho^2) e_w (Box & Jenkins 1970): marginal sd `sd`,
    lag-1 autocorrelation `rho`. Same shape as `e`, float64.
    """
    e = np.asarray(e, dtype=float)
    x = np.empty_like(e)
    x[..., 0] = e[..., 0]
    c = np.sqrt(1.0 - rho * rho)
    for w in range(1, e.shape[-1]):
        x[..., w] = rho * x[..., w - 1] + c * e[..., w]
    return sd * x


class DriftSim:
    """The network-level parts of a drift simulation and the per-zone generation.

    Attributes (n networks, T = total_days days, W calendar weeks):
    dates (T,) datetime64[D]; weekend (T,) bool; week_index (T,) int (calendar week from the
    Monday on or before `start`); network_level (n,) log hh rating at the weekday top;
    peak_shift_hours (n,); season_phase (n,) fraction of a year (top of the season on day-of-year
    365.25 x phase); erosion_rate (n,) fraction per year; network_weekly_shock (n, W) log;
    log_shape (n, 2, 96) weekday/weekend; log_demo (n, demos, 2, 96); launch_index (day index of
    the launch, or None); log_network_day (n, T) every network-level term but the day shape.
    """

    def __init__(self, spec: DriftSpec):
        self.spec = spec
        n_net, n_dem, T = len(spec.networks), len(spec.demos), spec.total_days
        self.dates = np.datetime64(spec.start, "D") + np.arange(T)
        dow = (self.dates.astype(np.int64) + 3) % 7  # 1970-01-01 was a Thursday; 0 = Monday
        self.weekend = dow >= 5
        offset = int(dow[0])
        self.week_index = (np.arange(T) + offset) // 7
        self.n_weeks = int(self.week_index[-1]) + 1
        genres = [drift_genre(g) for g in spec.genres]

        level, shift, phase, rate = (np.empty(n_net) for _ in range(4))
        self.log_shape = np.empty((n_net, 2, QH))
        self.log_demo = np.zeros((n_net, n_dem, 2, QH))
        working = _piecewise(_WORKING)
        for j, g in enumerate(genres):
            r = _rng(spec, _NET, j)
            z = r.standard_normal(4)
            level[j] = np.log(g["level"]) + spec.network_level_sd * z[0]
            shift[j] = spec.peak_jitter_hours * z[1]
            phase[j] = r.random()
            rate[j] = np.clip(spec.erosion_mean + spec.erosion_sd * z[2], -0.5, 0.5)
            for w in (0, 1):
                self.log_shape[j, w] = np.log(_shape_of(g, bool(w), shift[j]))
            jitter = r.standard_normal(n_dem)
            for k, demo in enumerate(spec.demos):
                if demo == "hh":
                    continue
                base = np.log(g["adult"]) + spec.demo_ratio_sd * jitter[k]
                self.log_demo[j, k, 0] = base - g["work_dip"] * working
                self.log_demo[j, k, 1] = base - 0.3 * g["work_dip"] * working
        self.network_level, self.peak_shift_hours, self.season_phase, self.erosion_rate = level, shift, phase, rate

        e = np.stack([_rng(spec, _SHOCK, j).standard_normal(self.n_weeks) for j in range(n_net)])
        self.network_weekly_shock = ar1(e, spec.network_shock_rho, spec.network_shock_sd)
        tau = (self.dates - _EPOCH).astype(float) / 365.25
        season = spec.season_amplitude * np.cos(2 * np.pi * (tau[None, :] - phase[:, None]))
        erosion = np.log1p(rate)[:, None] * (np.arange(T) / 365.25)[None, :]
        self.log_network_day = (level[:, None] + season + erosion
                                + self.network_weekly_shock[:, self.week_index])  # (n, T)
        self.launch_index = None
        if spec.launch_name is not None:
            self.launch_index = max(0, (spec.launch_date - spec.start).days)
            self.launch_network_index = spec.networks.index(spec.launch_name)

    def network_shock(self) -> np.ndarray:
        """The weekly network shocks, one value per day: float64 (networks, total_days), log multipliers."""
        return self.network_weekly_shock[:, self.week_index]

    def zone_parts(self, zi: int) -> dict:
        """Zone `zi`'s draws: `zone_level` (log), `zone_network_level` (networks,) log,
        `zone_network_weekly_shock` (networks, weeks) log."""
        spec, n_net = self.spec, len(self.spec.networks)
        zl = spec.zone_level_sd * float(_rng(spec, _ZONE, zi).standard_normal())
        zn = spec.zone_network_level_sd * np.array([_rng(spec, _ZN, zi, j).standard_normal() for j in range(n_net)])
        e = np.stack([_rng(spec, _ZN_SHOCK, zi, j).standard_normal(self.n_weeks) for j in range(n_net)])
        return {"zone_level": zl, "zone_network_level": zn,
                "zone_network_weekly_shock": ar1(e, spec.zone_network_shock_rho, spec.zone_network_shock_sd)}

    def zone(self, zi: int) -> np.ndarray:
        """Measured ratings of zone `zi` over the whole span, no gaps: float32 (networks, demos, total_days, 96).

        Fractions in [0, 1]; exactly 0 below the floor and before the launched network's launch.
        """
        spec = self.spec
        n_net, n_dem, T = len(spec.networks), len(spec.demos), spec.total_days
        parts = self.zone_parts(zi)
        wk = self.weekend.astype(np.intp)
        out = np.empty((n_net, n_dem, T, QH), dtype=np.float32)
        for j in range(n_net):
            day = (self.log_network_day[j] + parts["zone_level"] + parts["zone_network_level"][j]
                   + parts["zone_network_weekly_shock"][j, self.week_index]
                   + spec.day_noise_sd * _rng(spec, _DAY, zi, j).standard_normal(T))  # (T,)
            base = (self.log_shape[j][wk] + day[:, None]
                    + spec.airing_noise_sd * _rng(spec, _AIR, zi, j).standard_normal((T, QH)))
            for k in range(n_dem):
                log_r = base + self.log_demo[j, k][wk] + spec.demo_noise_sd * _rng(
                    spec, _DEMO, zi, j, k).standard_normal((T, QH))
                r = np.minimum(np.exp(log_r), 1.0)
                r[r < spec.floor] = 0.0
                out[j, k] = r
            if self.launch_index is not None and j == self.launch_network_index:
                out[j, :, : self.launch_index] = 0.0
        return out

    def history_mask(self, zi: int) -> np.ndarray:
        """Boolean (networks, demos, history_days, 96): True where zone `zi` has a history row."""
        spec = self.spec
        n_net, n_dem, H = len(spec.networks), len(spec.demos), spec.history_days
        r = _rng(spec, _MASK, zi)
        day_lost = r.random((n_net, H)) < spec.missing_day_share  # a zone x network day, every demo
        keep = r.random((n_net, n_dem, H, QH)) >= spec.missing_qh_share
        keep &= ~day_lost[:, None, :, None]
        if self.launch_index is not None:
            keep[self.launch_network_index, :, : self.launch_index] = False
        return keep


def simulate_drift(spec: DriftSpec) -> tuple[np.ndarray, np.ndarray]:
    """The truth: measured ratings over history, lead and plan weeks, without gaps.

    Returns (dates (total_days,) datetime64[D], ratings float32 (zones, networks, demos,
    total_days, 96)).
    """
    sim = DriftSim(spec)
    return sim.dates, np.stack([sim.zone(zi) for zi in range(len(spec.zones))])


def drift_digest(spec: DriftSpec) -> str:
    """Digest of everything that determines the drift history (and the code version); 'drift-' + 16 hex."""
    d = {k: v for k, v in asdict(spec).items()}
    text = json.dumps({"family": "drift", "version": DRIFT_VERSION, **d}, sort_keys=True, default=str)
    return "drift-" + hashlib.sha1(text.encode()).hexdigest()[:16]


def write_drift_history(spec: DriftSpec, path: str | Path) -> Path:
    """Simulate `spec` and write its history days (start..end, gaps applied) to Parquet at `path`
    (`scenarios.generate.write_history_parquet`: the contract's columns and dtypes, rows ordered by
    zone, network, demo, date, quarter-hour, the schema metadata carrying `drift_digest(spec)`;
    atomic, one zone at a time)."""
    return write_history_parquet(path, DriftSim(spec), zones=spec.zones, networks=spec.networks, demos=spec.demos,
                                 start=spec.start, days=spec.history_days, digest=drift_digest(spec))


def drift_spec_from_scenario(scenario) -> DriftSpec:
    """The `DriftSpec` of a loaded scenario whose `[history_generator]` has family = "drift".

    `lead_days` is the gap between the table's `end` and the scenario's `first_week`;
    `plan_weeks` the scenario's `weeks`; the knobs (`DRIFT_KNOBS`) as the table gives them.
    """
    g = dict(scenario.history_generator)
    knobs = {k: g[k] for k in DRIFT_KNOBS if k in g}
    return DriftSpec(zones=list(scenario.zones["zone"]), networks=list(scenario.networks["network"]),
                     genres=list(scenario.networks["genre"]), demos=list(scenario.demos),
                     start=g["start"], end=g["end"], seed=int(g["seed"]),
                     lead_days=(scenario.first_week - g["end"]).days - 1, plan_weeks=int(scenario.weeks), **knobs)
