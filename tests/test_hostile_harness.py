"""The hostile-input harness itself: an earlier run is copied, and a change to it is caught."""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow


def test_the_checker_notices_a_changed_earlier_run(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    check = earlier_run()
    check()  # untouched: passes
    results = next((tmp_path / "out" / "t").glob("*/results.json"))
    os.chmod(results, 0o644)
    results.write_text("{}", encoding="utf-8")
    with pytest.raises(AssertionError, match=r"results\.json"):
        check()
