"""Findings: the small typed messages every stage reports."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Literal

__all__ = ["Finding", "PanelpipeError", "Severity", "worst_status"]

Severity = Literal["error", "warning", "info"]


@dataclass(frozen=True)
class Finding:
    """One thing a stage noticed about the data or a model.

    Parameters
    ----------
    code
        A stable identifier (``duplicate_keys``, ``time_invariant_regressor`` ...)
        that scripts may match on; never reworded once published.
    severity
        ``error`` stops the run, ``warning`` is shown prominently, ``info`` is context.
    message
        One or two plain sentences: what is wrong, where, and what to do.
    where
        Optional structured location: file, rows, columns, keys.
    """

    code: str
    severity: Severity
    message: str
    where: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        if not self.where:
            del out["where"]
        return out


class PanelpipeError(Exception):
    """An error the user can fix; its message names what and where.

    The command line prints the message without a traceback.
    """

    def __init__(self, message: str, findings: Sequence[Finding] = ()) -> None:
        super().__init__(message)
        self.findings = tuple(findings)


def worst_status(findings: Iterable[Finding]) -> Literal["pass", "warn", "fail"]:
    """Summarise findings as the ``validation.status`` of ``results.json``."""
    severities = {f.severity for f in findings}
    if "error" in severities:
        return "fail"
    if "warning" in severities:
        return "warn"
    return "pass"
