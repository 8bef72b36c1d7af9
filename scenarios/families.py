"""The one place that dispatches on a scenario's history family ("profile" or "drift").

A scenario's `[history_generator]` table names the family that makes its invented history
(`family = "drift"`; absent: "profile", `scenarios.generate`). Everything that needs the
generator of a scenario, writing a missing history and checking a cached one
(`ensure_history`, which the workflows and the CLI call before they load a folder; the loader
`planner.scenario` itself never generates), and the truth helpers (`scenarios.build.unit_truth`, `scenarios.actuals`), goes through the functions
here. Invented data only.
"""
from __future__ import annotations

from datetime import date
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow.parquet as pq

from planner.scenario import GENERATOR_FAMILIES, Scenario, load_scenario
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


def _stale(path: Path, scenario) -> bool:
    """True when `path` was written by the generator from settings other than the scenario's."""
    try:
        meta = pq.read_schema(path).metadata or {}
    except Exception:  # noqa: BLE001 - unreadable: the loader's column check reports it
        return False
    made = meta.get(generate.METADATA_KEY)
    return made is not None and made.decode() != history_digest(scenario)


def ensure_history(folder: str | Path, *, info: Callable[[str], None] | None = None,
                   allow_empty_inventory: bool = False) -> Scenario:
    """Make the folder's invented history when it is missing or was made from other settings, then
    return the loaded scenario (`planner.scenario.load_scenario`).

    A folder without a `[history_generator]` table is only loaded. `history.parquet` is written
    from the table (its family, its seed; seconds for the demo) when no history file or folder
    exists, and made again when its metadata digest differs from the table's settings. `info`
    receives a one-line note before a history is generated.
    """
    folder = Path(folder)
    scenario = load_scenario(folder, allow_empty_inventory=allow_empty_inventory)
    if scenario.history_generator is None:
        return scenario
    target = folder / "history.parquet"
    if scenario.history_path == target and target.is_file() and _stale(target, scenario):
        target.unlink(missing_ok=True)  # made by the generator from other settings: make it again
    if scenario.history_path == target and not target.is_file():
        if info is not None:
            info(f"{folder.name}: generating the invented history into history.parquet (first use, seconds) ...")
        write_scenario_history(scenario, target)
    return scenario


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
        self._sim = drift.DriftSim(spec) if family == "drift" else generate.ProfileSim(spec)

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
