"""The report as a browser shows it: headless Chromium (Debian's package).

Renders a real run's report.html offline and checks that the page is not blank,
that every section and figure is present, that nothing is fetched from the
network, and that a hostile column name appears as text, not markup.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml
from PIL import Image

from _support import run_panelpipe
from panelpipe.config import REPO_ROOT

pytestmark = pytest.mark.slow

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
HOSTILE = "<script>alert(1)</script>"
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    # Any attempt to reach a host fails, so a page that needed the network would show it.
    "--host-resolver-rules=MAP * ~NOTFOUND",
]


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> Path:
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (.ci/run installs Debian's package)")
    work = tmp_path_factory.mktemp("browser")
    shutil.copytree(REPO_ROOT / "config" / "demo", work / "data")
    for name in ("regional_jobs_2011_2024.csv", "regional_jobs_2025.csv"):
        text = (work / "data" / name).read_text().replace("broadband_share", HOSTILE)
        (work / "data" / name).write_text(text)
    config = {
        "output_dir": "out",
        "analyses": {
            "jobs": {
                "sources": ["data/regional_jobs_2011_2024.csv", "data/regional_jobs_2025.csv"],
                "unit": "region",
                "period": "year",
                "outcome": "youth_employment",
                "regressors": ["subsidy_rate", HOSTILE, "coastal"],
                "estimators": ["pooled_ols", "fixed_effects", "random_effects"],
                "inference": ["classical", "cluster"],
            }
        },
    }
    (work / "c.yaml").write_text(yaml.safe_dump(config))
    done = run_panelpipe(work, "run", "--config", "c.yaml")
    assert done.returncode == 0, done.stderr[-3000:]
    run_id = json.loads(done.stdout.strip().splitlines()[-1])["run_id"]
    return work / "out" / "jobs" / run_id / "report.html"


def _chromium(tmp: Path, *args: str) -> subprocess.CompletedProcess[str]:
    assert CHROMIUM is not None
    return subprocess.run(
        [CHROMIUM, *FLAGS, f"--user-data-dir={tmp / 'profile'}", *args],
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_page_renders_with_sections_and_figures(report: Path, tmp_path: Path) -> None:
    dom = _chromium(tmp_path, "--dump-dom", report.as_uri()).stdout
    for section in ("data", "estimates", "comparison", "changes", "provenance"):
        assert f'id="{section}"' in dom, section
    assert dom.count("<svg") >= 3  # coefficients, presence, variance shares
    assert "Read this before using the numbers" in dom
    assert "Recommended estimate" in dom


def test_page_is_not_blank(report: Path, tmp_path: Path) -> None:
    shot = tmp_path / "page.png"
    _chromium(tmp_path, f"--screenshot={shot}", "--window-size=1200,2400", report.as_uri())
    image = Image.open(shot).convert("L")
    colours = image.getcolors(maxcolors=1 << 16) or []
    assert len(colours) > 50, "the screenshot is (nearly) one colour"
    dark = sum(n for n, level in colours if level < 128)
    assert dark > 0.005 * image.width * image.height, "no text or figures drawn"


def test_nothing_loads_from_the_network(report: Path) -> None:
    html = report.read_text()
    assert "default-src 'none'" in html  # the page forbids every fetch
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", html, re.I)
    assert not re.search(r"url\(\s*['\"]?(https?:)?//", html, re.I)
    assert "@import" not in html and "<link" not in html and "<script" not in html.lower()


def test_hostile_column_name_is_text(report: Path, tmp_path: Path) -> None:
    html = report.read_text()
    assert HOSTILE not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    dom = _chromium(tmp_path, "--dump-dom", report.as_uri()).stdout
    assert "<script>alert(1)" not in dom  # never became an element
