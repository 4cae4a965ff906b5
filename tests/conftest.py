"""Shared fixtures: a small seeded, unbalanced simulated panel.

The generator is written here, independent of ``panelpipe.demo``, so that the
reference tests do not depend on the package's own simulation code.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

FIRST_PERIOD = 2001


def simulate_panel(
    n_units: int = 30, n_periods: int = 8, seed: int = 20240601, n_missing: int = 6
) -> pd.DataFrame:
    """A seeded unbalanced panel shaped like the output of ``ingest.read_panel``.

    Columns: ``unit`` (text such as ``"u07"``), ``period`` (integer year from
    2001), outcome ``y``, time-varying regressors ``x1`` (correlated with the unit
    effect, so fixed and random effects differ) and ``x2``, a time-invariant ``z``,
    and the bookkeeping columns ``_source`` and ``_line``. Errors are
    heteroskedastic so that classical and clustered standard errors differ.
    ``n_missing`` rows are removed, one from each of ``n_missing`` distinct units
    at a random period, so some units have a gap inside their span.
    """
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(n_units), n_periods)
    t = np.tile(np.arange(n_periods), n_units)
    unit_effect = rng.normal(size=n_units)[unit]
    period_effect = rng.normal(scale=0.5, size=n_periods)[t]
    z = rng.normal(size=n_units)[unit]
    x1 = 0.8 * unit_effect + 0.1 * t + rng.normal(size=unit.size)
    x2 = 0.5 * z + rng.normal(size=unit.size)
    noise = rng.normal(size=unit.size) * (1.0 + 0.5 * np.abs(x2))
    y = unit_effect + period_effect + 1.5 * x1 - 0.7 * x2 + 0.3 * z + noise
    frame = pd.DataFrame(
        {
            "unit": [f"u{u:02d}" for u in unit],
            "period": FIRST_PERIOD + t,
            "y": y,
            "x1": x1,
            "x2": x2,
            "z": z,
        }
    )
    gone_units = rng.choice(n_units, size=n_missing, replace=False)
    gone_periods = rng.integers(0, n_periods, size=n_missing)
    gone = gone_units * n_periods + gone_periods
    frame = frame.drop(index=gone).reset_index(drop=True)
    frame["unit"] = frame["unit"].astype("string")
    frame["_source"] = "simulated.csv"
    frame["_line"] = np.arange(2, len(frame) + 2)  # CSV line numbers, header = line 1
    return frame


@pytest.fixture(scope="session")
def make_panel() -> Callable[..., pd.DataFrame]:
    """Factory fixture: ``make_panel(n_units=30, n_periods=8, seed=..., n_missing=6)``."""
    return simulate_panel


@pytest.fixture(scope="session")
def earlier_run_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A complete earlier run of the small hostile-input panel, made once per session.

    Returns the folder holding ``out/`` (the output_dir with the run) and ``a.csv``.
    """
    from _support import (
        HOSTILE_HEADER,
        hostile_analysis,
        hostile_rows,
        run_panelpipe,
        write_hostile_config,
    )

    base = tmp_path_factory.mktemp("earlier")
    (base / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    config = write_hostile_config(base, hostile_analysis())
    done = run_panelpipe(base, "run", "--config", str(config))
    assert done.returncode == 0, done.stderr[-3000:]
    return base


@pytest.fixture
def earlier_run(earlier_run_template: Path, tmp_path: Path) -> Callable[[], Any]:
    """Copy the earlier run into ``tmp_path/out``; returns a checker to call at the end.

    Usage: ``check = earlier_run()`` before the hostile case, ``check()`` after it:
    the checker asserts that every file of the earlier run folder is byte-identical
    and keeps its mode.
    """
    import shutil

    from _support import folder_snapshot

    def start() -> Callable[[], None]:
        shutil.copytree(earlier_run_template / "out", tmp_path / "out", symlinks=True)
        analysis = tmp_path / "out" / "t"
        runs = [p for p in analysis.iterdir() if p.is_dir()]
        assert len(runs) == 1
        before = folder_snapshot(runs[0])

        def check() -> None:
            assert runs[0].is_dir(), "the earlier run folder is gone"
            after = folder_snapshot(runs[0])
            changed = sorted(
                k for k in before.keys() | after.keys() if before.get(k) != after.get(k)
            )
            assert not changed, f"the earlier run folder changed: {changed}"

        return check

    return start


@pytest.fixture(scope="session")
def postgres() -> Any:
    """A throwaway PostgreSQL server for the session (tests/_postgres.py), always stopped."""
    import _postgres

    server = _postgres.start()
    if isinstance(server, str):
        pytest.skip(server)
    try:
        yield server
    finally:
        server.stop()
