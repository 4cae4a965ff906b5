r"""Simulated demo data: a regional youth-jobs programme.

The shipped demo analysis (``config/demo/``) uses an invented panel of regions
observed once a year. A wage subsidy for hiring young people is paid at a rate
that varies by region and year, and the question is how much the subsidy raises
youth employment. The data are simulated, so the true answer is known and the
pipeline's estimates can be checked against it.

The simulation is built so that the usual pitfalls of panel data are present:

* poorer regions receive larger subsidies *and* have lower youth employment, so
  a region effect is correlated with ``subsidy_rate`` and pooled OLS is biased
  downwards, while fixed effects (within regions) are not;
* the subsidy rate and the error are serially correlated within a region
  (AR(1)), so classical standard errors are too small and clustering by region
  matters;
* every region shares a yearly shock (a trend plus a business cycle), and the
  subsidy is topped up in bad years, so period effects matter;
* ``coastal`` never changes within a region, so fixed effects cannot estimate it;
* a few region-years are missing (the rows are simply absent), never in the
  last year.

Columns, in order: ``region`` (text code such as ``"R007"``), ``region_name``,
``year``, ``youth_employment`` (percent of 16-24 year olds in work, the outcome),
``subsidy_rate`` (percent of a young hire's wage cost reimbursed),
``broadband_share`` (percent of households with a fast connection),
``log_median_wage`` (log of the median weekly wage) and ``coastal`` (0/1).

Notes
-----
For region :math:`i` and year :math:`t`, with :math:`s = t - t_0` the years since
the first year :math:`t_0`:

.. math::

    d_i &\sim N(0, 1) \quad \text{(disadvantage, never observed)} \\
    \alpha_i &= -4\, d_i + 1.5\, v_i, \quad v_i \sim N(0, 1) \\
    g_t &\sim N(0, 1.5^2), \quad \lambda_t = 0.25\, s + g_t \\
    \text{subsidy\_rate}_{it} &= 14 + 2.5\, d_i + 0.3\, s - 0.6\, g_t + u_{it} \\
    \text{broadband\_share}_{it} &= 48 + 1.8\, s - 3\, d_i + 3\, z_i
        + N(0, 1.5^2) \\
    \text{log\_median\_wage}_{it} &= 6.3 + 0.02\, s - 0.1\, d_i + 0.05\, w_i
        + N(0, 0.03^2) \\
    \text{coastal}_i &\sim \text{Bernoulli}(0.4) \\
    \text{youth\_employment}_{it} &= 38 + 0.8\, \text{subsidy\_rate}_{it}
        + 0.15\, \text{broadband\_share}_{it} - 3\, \text{log\_median\_wage}_{it}
        + 2\, \text{coastal}_i + \alpha_i + \lambda_t + e_{it}

with :math:`z_i, w_i \sim N(0, 1)` and two stationary AR(1) processes within
each region, :math:`u_{it} = 0.65\, u_{i,t-1} + N(0, 1.5^2)` and
:math:`e_{it} = 0.6\, e_{i,t-1} + N(0, 1.2^2)`. The slopes are
:data:`TRUE_COEFFICIENTS`; the constant is :data:`TRUE_INTERCEPT`.

Because :math:`\alpha_i` falls as :math:`d_i` rises while the subsidy rises
with :math:`d_i`, pooled OLS (even with year effects) puts the subsidy slope at
about 0.3 to 0.45 instead of 0.8, while fixed effects stay within sampling error
of 0.8. Six region-years, drawn at random among the years before the last, are
removed.

Regenerate the shipped files with ``python -m panelpipe.demo [OUT_DIR]``.
"""

from __future__ import annotations

import argparse
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = [
    "COLUMNS",
    "DEFAULT_SEED",
    "N_MISSING_ROWS",
    "TRUE_COEFFICIENTS",
    "TRUE_INTERCEPT",
    "main",
    "simulate_regions",
    "write_demo",
]

TRUE_COEFFICIENTS: Mapping[str, float] = {
    "subsidy_rate": 0.8,
    "broadband_share": 0.15,
    "log_median_wage": -3.0,
    "coastal": 2.0,
}
"""True slopes of ``youth_employment``; ``coastal`` is absorbed by region effects."""

TRUE_INTERCEPT = 38.0
"""True constant of ``youth_employment`` (region and year effects have mean zero)."""

DEFAULT_SEED = 20261202
"""Seed of the shipped demo files."""

N_MISSING_ROWS = 6
"""Number of region-years removed when ``drop_rows`` is true."""

COLUMNS: tuple[str, ...] = (
    "region",
    "region_name",
    "year",
    "youth_employment",
    "subsidy_rate",
    "broadband_share",
    "log_median_wage",
    "coastal",
)
"""Column order of the simulated data and of the shipped files."""

# Invented names; regions beyond the fortieth reuse them with a number appended.
_REGION_NAMES: tuple[str, ...] = (
    "Ardenvale",
    "Brackmoor",
    "Caddenfold",
    "Dorrowmere",
    "Elderbrook",
    "Farrowdene",
    "Galtershaw",
    "Hollinreach",
    "Ismerholt",
    "Jorvellan",
    "Kestrelmoor",
    "Lindqvarn",
    "Marrowick",
    "Nettlecairn",
    "Orrindale",
    "Pellbridge",
    "Quillhaven",
    "Rookmere",
    "Saltreach",
    "Thistlewold",
    "Umberfell",
    "Varrowby",
    "Wendlemark",
    "Yarrowgate",
    "Zellmoor",
    "Amberhythe",
    "Blackfennel",
    "Corriemount",
    "Drovershelm",
    "Eastmarrow",
    "Fallowmere",
    "Greywater Vale",
    "Harrowdeep",
    "Ivybarrow",
    "Juniper Sands",
    "Kilnmoor",
    "Larkspur Bay",
    "Mistlebrook",
    "Northfallow",
    "Oakenridge",
)

_FLOAT_DECIMALS = 4
_DEFAULT_FIRST_YEAR = 2011
_DEFAULT_LAST_YEAR = 2025


def _region_codes(n_regions: int) -> list[str]:
    width = max(3, len(str(n_regions)))
    return [f"R{i:0{width}d}" for i in range(1, n_regions + 1)]


def _region_names(n_regions: int) -> list[str]:
    base = len(_REGION_NAMES)
    return [
        _REGION_NAMES[i % base] if i < base else f"{_REGION_NAMES[i % base]} {i // base + 1}"
        for i in range(n_regions)
    ]


def _ar1(
    rng: np.random.Generator, n_units: int, n_periods: int, rho: float, sd: float
) -> np.ndarray:
    """Stationary AR(1) paths, one row per unit, innovations with standard deviation ``sd``."""
    shocks = rng.normal(0.0, sd, size=(n_units, n_periods))
    paths = np.empty_like(shocks)
    paths[:, 0] = shocks[:, 0] / np.sqrt(1.0 - rho**2)
    for t in range(1, n_periods):
        paths[:, t] = rho * paths[:, t - 1] + shocks[:, t]
    return paths


def _coefficients(true_coefficients: Mapping[str, float] | None) -> dict[str, float]:
    coefficients = dict(TRUE_COEFFICIENTS)
    if true_coefficients is None:
        return coefficients
    unknown = sorted(set(true_coefficients) - set(coefficients))
    if unknown:
        raise ValueError(
            f"true_coefficients has {len(unknown)} unknown name(s): {', '.join(unknown)}; "
            f"expected some of {', '.join(coefficients)}."
        )
    coefficients.update({name: float(value) for name, value in true_coefficients.items()})
    return coefficients


def simulate_regions(
    *,
    n_regions: int = 40,
    first_year: int = _DEFAULT_FIRST_YEAR,
    last_year: int = _DEFAULT_LAST_YEAR,
    seed: int = DEFAULT_SEED,
    drop_rows: bool = True,
    true_coefficients: Mapping[str, float] | None = None,
) -> pd.DataFrame:
    """Simulate the regional youth-jobs panel.

    Parameters
    ----------
    n_regions
        Number of regions (at least 1).
    first_year, last_year
        The years observed, both included; at least two years.
    seed
        Seed of :func:`numpy.random.default_rng`; the same arguments always give
        the same data.
    drop_rows
        Remove :data:`N_MISSING_ROWS` region-years at random among the years before
        ``last_year``; when false the panel is balanced. The other values do not
        depend on this switch.
    true_coefficients
        Slopes to use instead of those in :data:`TRUE_COEFFICIENTS`; names not given
        keep their default.

    Returns
    -------
    pandas.DataFrame
        One row per region-year, sorted by region and year, with the columns of
        :data:`COLUMNS`.

    Raises
    ------
    ValueError
        If there are fewer than one region or two years, too few rows to drop, or
        ``true_coefficients`` names an unknown regressor.

    Notes
    -----
    The data-generating process is written out in the module docstring.
    """
    if n_regions < 1:
        raise ValueError(f"n_regions must be at least 1, got {n_regions}.")
    n_years = last_year - first_year + 1
    if n_years < 2:
        raise ValueError(
            f"need at least two years, got first_year={first_year}, last_year={last_year}."
        )
    n_droppable = n_regions * (n_years - 1)
    if drop_rows and n_droppable < N_MISSING_ROWS:
        raise ValueError(
            f"cannot drop {N_MISSING_ROWS} rows from {n_droppable} region-years "
            f"before {last_year}; use more regions or years, or drop_rows=False."
        )
    beta = _coefficients(true_coefficients)
    rng = np.random.default_rng(seed)

    # Region level: d is the unobserved disadvantage behind the region effect.
    disadvantage = rng.normal(size=n_regions)
    region_effect = -4.0 * disadvantage + 1.5 * rng.normal(size=n_regions)
    broadband_level = 3.0 * rng.normal(size=n_regions)
    wage_level = 0.05 * rng.normal(size=n_regions)
    coastal = (rng.random(n_regions) < 0.4).astype(np.int64)

    # Year level: a trend plus a business cycle shared by every region.
    since_start = np.arange(n_years, dtype=float)
    cycle = rng.normal(0.0, 1.5, size=n_years)
    year_effect = 0.25 * since_start + cycle

    # Region-year level; matrices are (region, year).
    subsidy = (
        14.0
        + 2.5 * disadvantage[:, None]
        + 0.3 * since_start[None, :]
        - 0.6 * cycle[None, :]
        + _ar1(rng, n_regions, n_years, rho=0.65, sd=1.5)
    )
    broadband = (
        48.0
        + 1.8 * since_start[None, :]
        - 3.0 * disadvantage[:, None]
        + broadband_level[:, None]
        + rng.normal(0.0, 1.5, size=(n_regions, n_years))
    )
    log_wage = (
        6.3
        + 0.02 * since_start[None, :]
        - 0.1 * disadvantage[:, None]
        + wage_level[:, None]
        + rng.normal(0.0, 0.03, size=(n_regions, n_years))
    )
    error = _ar1(rng, n_regions, n_years, rho=0.6, sd=1.2)
    employment = (
        TRUE_INTERCEPT
        + beta["subsidy_rate"] * subsidy
        + beta["broadband_share"] * broadband
        + beta["log_median_wage"] * log_wage
        + beta["coastal"] * coastal[:, None]
        + region_effect[:, None]
        + year_effect[None, :]
        + error
    )

    frame = pd.DataFrame(
        {
            "region": np.repeat(_region_codes(n_regions), n_years),
            "region_name": np.repeat(_region_names(n_regions), n_years),
            "year": np.tile(np.arange(first_year, last_year + 1, dtype=np.int64), n_regions),
            "youth_employment": employment.ravel(),
            "subsidy_rate": subsidy.ravel(),
            "broadband_share": broadband.ravel(),
            "log_median_wage": log_wage.ravel(),
            "coastal": np.repeat(coastal, n_years),
        },
        columns=list(COLUMNS),
    )
    if drop_rows:
        # Drawn last so that the values of the remaining rows do not depend on drop_rows.
        candidates = np.flatnonzero(frame["year"].to_numpy() < last_year)
        dropped = rng.choice(candidates, size=N_MISSING_ROWS, replace=False)
        frame = frame.drop(index=frame.index[dropped]).reset_index(drop=True)
    return frame


def _write_csv(frame: pd.DataFrame, path: Path) -> None:
    frame.to_csv(
        path,
        index=False,
        float_format=f"%.{_FLOAT_DECIMALS}f",
        lineterminator="\n",
        encoding="utf-8",
    )


def write_demo(out_dir: Path) -> list[Path]:
    """Write the shipped demo files into ``out_dir``.

    Parameters
    ----------
    out_dir
        Target folder; created if missing. Existing demo files are overwritten.

    Returns
    -------
    list of pathlib.Path
        The history (``regional_jobs_2011_2024.csv``, every year before the last)
        and the new year's delivery (``regional_jobs_2025.csv``), in that order.

    Notes
    -----
    The files are identical byte for byte on every run: the data come from
    :func:`simulate_regions` with its defaults, floats are written with four
    decimals and lines end in ``\\n``.
    """
    frame = simulate_regions()
    history_end = _DEFAULT_LAST_YEAR - 1
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    history = out_dir / f"regional_jobs_{_DEFAULT_FIRST_YEAR}_{history_end}.csv"
    delivery = out_dir / f"regional_jobs_{_DEFAULT_LAST_YEAR}.csv"
    _write_csv(frame[frame["year"] <= history_end], history)
    _write_csv(frame[frame["year"] == _DEFAULT_LAST_YEAR], delivery)
    return [history, delivery]


def write_delivery(out_dir: Path, year: int, *, history: bool = False) -> Path:
    """Write one yearly delivery of the demo simulation (for the yearly-update example).

    ``history=True`` writes every year up to and including ``year`` as one file
    (``regional_jobs_<first>_<year>.csv``); otherwise only that year
    (``regional_jobs_<year>.csv``). The values are those of the shipped demo.
    """
    frame = simulate_regions()
    if not _DEFAULT_FIRST_YEAR <= year <= _DEFAULT_LAST_YEAR:
        raise ValueError(
            f"year {year} is outside the simulated years {_DEFAULT_FIRST_YEAR}-{_DEFAULT_LAST_YEAR}"
        )
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    if history:
        path = out_dir / f"regional_jobs_{_DEFAULT_FIRST_YEAR}_{year}.csv"
        _write_csv(frame[frame["year"] <= year], path)
    else:
        path = out_dir / f"regional_jobs_{year}.csv"
        _write_csv(frame[frame["year"] == year], path)
    return path


def _default_out_dir() -> Path:
    # workflow/panelpipe/demo.py -> the repository root is two folders above the package.
    return Path(__file__).resolve().parents[2] / "config" / "demo"


def main(argv: Sequence[str] | None = None) -> int:
    """Regenerate the demo files: ``python -m panelpipe.demo [OUT_DIR]``."""
    parser = argparse.ArgumentParser(
        prog="python -m panelpipe.demo",
        description="Write the simulated regional youth-jobs demo data as two CSV files.",
    )
    parser.add_argument(
        "out_dir",
        nargs="?",
        type=Path,
        default=_default_out_dir(),
        help="folder to write into (default: config/demo in the repository)",
    )
    parser.add_argument(
        "--year",
        type=int,
        help="write only this year's delivery into OUT_DIR (for the yearly-update example)",
    )
    parser.add_argument(
        "--history", action="store_true", help="with --year: every year up to YEAR in one file"
    )
    args = parser.parse_args(argv)
    if args.history and args.year is None:
        parser.error("--history needs --year (the last year of the history file)")
    if args.year is not None and not _DEFAULT_FIRST_YEAR <= args.year <= _DEFAULT_LAST_YEAR:
        parser.error(
            f"--year {args.year}: the simulation has the years {_DEFAULT_FIRST_YEAR} to "
            f"{_DEFAULT_LAST_YEAR}; give one of them."
        )
    if args.year is not None:
        print(write_delivery(args.out_dir, args.year, history=args.history))
        return 0
    for path in write_demo(args.out_dir):
        print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
