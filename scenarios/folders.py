"""Invented scenario folders ready to use: the demo copied with its history, the small test scenario.

The top of the `scenarios` package: it builds on the generators (`scenarios.generate`,
`scenarios.drift`), their dispatch (`scenarios.families`) and the folder builder
(`scenarios.build`); nothing in `scenarios` imports it. Everything it writes is invented.
"""
from __future__ import annotations

import shutil
from pathlib import Path
from typing import Callable

import pyarrow.parquet as pq

from planner.scenario import load_scenario
from scenarios.build import write_scenario
from scenarios.families import ensure_history
from scenarios.generate import METADATA_KEY, HistorySpec, demo_path, spec_digest, spec_from_scenario

__all__ = ["copy_demo", "demo_path", "ensure_history", "make_small_scenario"]


def copy_demo(dest: str | Path, *, info: Callable[[str], None] | None = None) -> Path:
    """Copy the demo scenario (without generated files) to `dest`, generate its history; return dest.

    `info` receives a one-line note when the history is generated (`ensure_history`).
    """
    dest = Path(dest)
    src = demo_path()
    ignore = shutil.ignore_patterns("history.parquet", "forecast", "book.sqlite*", "__pycache__", ".*.tmp")
    shutil.copytree(src, dest, ignore=ignore, dirs_exist_ok=True)
    cached = src / "history.parquet"
    if cached.is_file() and _made_from(cached, spec_from_scenario(load_scenario(dest))):
        shutil.copyfile(cached, dest / "history.parquet")  # the same seeded history: copy, do not remake
    ensure_history(dest, info=info)
    return dest


def _made_from(path: Path, spec: HistorySpec) -> bool:
    """True when the Parquet file at `path` was generated from exactly `spec` (metadata digest)."""
    try:
        meta = pq.read_schema(path).metadata or {}
    except Exception:  # noqa: BLE001 - unreadable cache: regenerate
        return False
    return meta.get(METADATA_KEY) == spec_digest(spec).encode()


def make_small_scenario(dest: str | Path, *, seed: int = 0, n_zones: int = 3, n_networks: int = 3,
                        history_days: int = 420, weeks: int = 8) -> Path:
    """Write a complete small invented scenario folder (history, inventory, 3 deals); return it.

    Made by the same generator as the demo; meant for tests (about a second).
    """
    return write_scenario(dest, seed=seed, n_zones=n_zones, n_networks=n_networks,
                          history_days=history_days, weeks=weeks)
