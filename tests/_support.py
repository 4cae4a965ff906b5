"""Small helpers shared by the test files (imported as ``from _support import ...``)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from typing import Any

from panelpipe.config import AnalysisSettings


def run_panelpipe(cwd: Path, *args: str) -> subprocess.CompletedProcess[str]:
    """Run ``python -m panelpipe ARGS`` in ``cwd`` and capture its output."""
    return subprocess.run(
        [sys.executable, "-m", "panelpipe", *args],
        cwd=cwd,
        text=True,
        capture_output=True,
        timeout=600,
    )


def panel_settings(**overrides: Any) -> AnalysisSettings:
    """Settings for the simulated panels of conftest.py (unit, period, y, x1, x2, z)."""
    base: dict[str, Any] = {
        "name": "simulated",
        "sources": ("simulated.csv",),
        "unit": "unit",
        "period": "period",
        "outcome": "y",
        "regressors": ("x1", "x2", "z"),
        "period_effects": True,
        "cluster_by": ("unit",),
        "estimators": (),
        "inference": ("classical", "cluster"),
        "level": 0.95,
        "gates": {},
    }
    base.update(overrides)
    return AnalysisSettings(**base)
