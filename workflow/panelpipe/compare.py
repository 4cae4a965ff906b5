"""Compare: tests that weigh one estimator against another.

A test result is an object with its statistic, degrees of freedom, p-value and
null hypothesis, or an explicit invalid result with the reason; never a bare
tuple and never NaN without a reason.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from .estimate import ModelResult

__all__ = ["TestResult", "hausman"]


@dataclass(frozen=True)
class TestResult:
    """A hypothesis test, or the reason it could not be computed."""

    name: str
    null: str
    statistic: float | None = None
    df: int | None = None
    p_value: float | None = None
    note: str = ""
    invalid_reason: str = ""

    @property
    def valid(self) -> bool:
        return not self.invalid_reason

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "null": self.null}
        if self.valid:
            out.update(statistic=self.statistic, df=self.df, p_value=self.p_value)
        else:
            out["invalid_reason"] = self.invalid_reason
        if self.note:
            out["note"] = self.note
        return out


def hausman(fe: ModelResult, re: ModelResult) -> TestResult:
    """Classical Hausman test of fixed against random effects.

    Compares the slopes common to both models with their classical covariances.

    Notes
    -----
    :math:`H = (b_{FE}-b_{RE})'[V_{FE}-V_{RE}]^{-1}(b_{FE}-b_{RE}) \\sim \\chi^2_k`
    under the null that the unit effects are uncorrelated with the regressors
    (Hausman 1978). When :math:`V_{FE}-V_{RE}` is not positive definite, a
    Moore–Penrose inverse is used and the degrees of freedom are its rank.
    """
    name = "Hausman (classical)"
    null = "unit effects are uncorrelated with the regressors (random effects consistent)"
    if "classical" not in fe.inference or "classical" not in re.inference:
        return TestResult(name, null, invalid_reason="classical standard errors were not computed")
    common = [t for t in fe.terms if t in re.terms]
    if not common:
        return TestResult(name, null, invalid_reason="the two models share no slope coefficient")
    diff = (fe.params[common] - re.params[common]).to_numpy()
    v = (
        fe.inference["classical"].cov.loc[common, common]
        - re.inference["classical"].cov.loc[common, common]
    ).to_numpy()
    eig = np.linalg.eigvalsh(v)
    tol = max(eig.max(initial=0.0), 1e-300) * len(common) * 1e-10
    note = ""
    if eig.min() > tol:
        stat = float(diff @ np.linalg.solve(v, diff))
        df = len(common)
    else:
        rank = int((eig > tol).sum())
        if rank == 0:
            return TestResult(
                name,
                null,
                invalid_reason="the covariance difference has no positive eigenvalue, so the "
                "classical test is undefined here; rely on the cluster-robust comparison",
            )
        stat = float(diff @ np.linalg.pinv(v, rcond=1e-10, hermitian=True) @ diff)
        df = rank
        note = (
            f"the covariance difference is not positive definite ({len(common) - rank} "
            f"non-positive eigenvalue(s)); a generalised inverse with df = rank = {rank} "
            "was used"
        )
    return TestResult(name, null, stat, df, float(stats.chi2.sf(stat, df)), note)
