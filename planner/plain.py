"""Plain JSON-ready values of results (the `--json` output and the demo's summary file)."""
from __future__ import annotations

import math
from dataclasses import asdict, is_dataclass
from typing import Any

import numpy as np


def plain(obj: Any) -> Any:
    """`obj` as plain JSON-ready values: dataclasses and dicts to dicts (string keys), sequences and
    arrays to lists, numpy scalars to Python ones, NaN/inf to None, dates to ISO text, paths to text."""
    if is_dataclass(obj) and not isinstance(obj, type):
        return plain(asdict(obj))
    if isinstance(obj, dict):
        return {str(k): plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain(v) for v in obj]
    if isinstance(obj, np.generic):
        return plain(obj.item())
    if isinstance(obj, np.ndarray):
        return [plain(v) for v in obj.tolist()]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if hasattr(obj, "isoformat"):
        return obj.isoformat()
    if hasattr(obj, "__fspath__"):
        return str(obj)
    return obj


def is_int(v: Any) -> bool:
    """True for a whole number read from a file (a bool is not one)."""
    return isinstance(v, int) and not isinstance(v, bool)


def is_num(v: Any) -> bool:
    """True for a finite number read from a file (a bool is not one)."""
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(float(v))
