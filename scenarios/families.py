"""The one place that dispatches on a scenario's history family ("profile" or "drift").

A scenario's `[history_generator]` table names the family that makes its invented history
(`family = "drift"`; absent: "profile", `scenarios.generate`). Everything that needs the
generator of a scenario, the loader writing a missing history and checking a cached one, and the
truth helpers (`scenarios.build.unit_truth`, `scenarios.actuals`), goes through the functions
here. Invented data only.
"""
from __future__ import annotations

from datetime import date
from pathlib import Path

import numpy as np

from planner.scenario import GENERATOR_FAMILIES
from scenarios import drift, generate

#: the history families a [history_generator] table may name (the loader's list)
FAMILIES = GENERATOR_FAMILIES


def family_of(scenario) -> str:
    """The history family of a scenario with a `[history_generator]` table ("profile" when unnamed)."""
    if scenario.history_generator is None:
        raise ValueError(f"{scenario.name}: no [history_generator] table (the history was not generated)")
    return str(scenario.history_generator.get("family", "profile"))


def scenario_spec(scenario) -> generate.HistorySpec | drift.DriftSpec:
    """The generator spec of the scenario's family (`HistorySpec` or `DriftSpec`)."""
    if family_of(scenario) == "drift":
        return drift.drift_spec_from_scenario(scenario)
    return generate.spec_from_scenario(scenario)


def history_digest(scenario) -> str:
    """Digest of the settings that make the scenario's history (the Parquet metadata of a generated file)."""
    spec = scenario_spec(scenario)
    return drift.drift_digest(spec) if isinstance(spec, drift.DriftSpec) else generate.spec_digest(spec)


def write_scenario_history(scenario, path: str | Path) -> Path:
    """Generate the scenario's invented history (its family, its seed) into Parquet at `path`."""
    spec = scenario_spec(scenario)
    if isinstance(spec, drift.DriftSpec):
        return drift.write_drift_history(spec, path)
    return generate.write_spec(spec, path)


class ScenarioTruth:
    """The simulated ratings of a generated scenario over its history and plan weeks, without gaps.

    `family`, `spec`; `zones`, `networks`, `demos` (the array axes); `start` (first simulated day);
    `dates` (days,) datetime64[D]. `zone(zi)` is one zone's float32 (networks, demos, days, 96)
    measured ratings (fractions); `ratings()` all zones, (zones, networks, demos, days, 96);
    `network_shock()` the shocks shared by a network in every zone and demo, float (networks, days),
    log multipliers (profile: its slow drift and episodes; drift: its weekly AR(1) shock).
    """

    def __init__(self, family: str, spec):
        self.family, self.spec = family, spec
        self._sim = drift.DriftSim(spec) if family == "drift" else generate._Sim(spec)

    @property
    def zones(self) -> list[str]:
        return self.spec.zones

    @property
    def networks(self) -> list[str]:
        return self.spec.networks

    @property
    def demos(self) -> list[str]:
        return self.spec.demos

    @property
    def start(self) -> date:
        return self.spec.start

    @property
    def dates(self) -> np.ndarray:
        return self._sim.dates

    def zone(self, zi: int) -> np.ndarray:
        return self._sim.zone(zi)

    def ratings(self) -> np.ndarray:
        return np.stack([self._sim.zone(zi) for zi in range(len(self.spec.zones))])

    def network_shock(self) -> np.ndarray:
        return self._sim.network_shock() if self.family == "drift" else self._sim.net_shock


def simulate_scenario_truth(scenario) -> ScenarioTruth:
    """The simulation behind a generated scenario (any family): its history and the plan weeks' truth."""
    return ScenarioTruth(family_of(scenario), scenario_spec(scenario))
