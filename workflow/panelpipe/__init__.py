"""panelpipe: a reproducible pipeline for regressions on panel data.

The modules follow the data: ``ingest`` → ``validate`` → ``estimate`` →
``compare`` → ``report``; ``config`` reads the settings, ``runs`` names and
guards run folders, ``demo`` simulates the shipped example data.
"""

from __future__ import annotations

__all__ = ["__version__"]

__version__ = "0.1.0"
