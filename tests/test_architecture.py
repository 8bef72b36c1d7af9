"""The one-way flow, enforced: the import contracts in pyproject.toml ([tool.importlinter]: layers,
forecasting never importing planner, the invented scenarios used by the workflows only) and the
ruff rule set ([tool.ruff]: errors, and no import inside a function in the core modules)."""
from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _need(module: str) -> None:
    """Skip without `module` on a developer's machine; CI (CI set, the test extra installed) fails."""
    if importlib.util.find_spec(module) is None:
        if os.environ.get("CI"):
            pytest.fail(f"{module} is missing: install the test extra (pip install -e '.[test]')")
        pytest.skip(f"{module} is in the test extra")


def test_import_contracts_are_kept(capsys):
    _need("importlinter")
    from importlinter import cli

    code = cli.lint_imports(config_filename=str(ROOT / "pyproject.toml"), no_cache=True)
    assert code == 0, capsys.readouterr().out


def test_ruff_finds_nothing():
    _need("ruff")
    p = subprocess.run([sys.executable, "-m", "ruff", "check", "--no-cache", "--output-format", "concise", "."],
                       cwd=ROOT, capture_output=True, text=True)
    assert p.returncode == 0, p.stdout + p.stderr
