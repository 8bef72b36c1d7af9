"""Open a scenario folder for work: its invented history made first when it has none."""
from __future__ import annotations

from pathlib import Path
from typing import Callable

from planner.scenario import Scenario
from scenarios.families import ensure_history


def open_scenario(path: str | Path, *, info: Callable[[str], None] | None = None) -> Scenario:
    """Load the scenario folder at `path` (`planner.scenario.load_scenario`), after making its
    invented history when a `[history_generator]` table says how and the history is missing or
    was made from other settings (`scenarios.families.ensure_history`; `info` receives a note
    first). Every command and the notebook API open folders this way; the loader never generates."""
    return ensure_history(path, info=info)
