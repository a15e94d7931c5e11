"""Statistics the report draws, as numpy arrays from the reduced rows (pure).

Owns the Bland–Altman agreement of reported against recomputed DLCO, reported KCO against
DLCO/VA, the %-predicted distribution per source and the findings per month.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from bridge.audit.reduce import Plots

Floats = npt.NDArray[np.float64]
LOA_SD = 1.96  # limits of agreement: bias ± 1.96 SD  # source: Bland & Altman, Lancet 1986;1:307-10


@dataclass(frozen=True, slots=True)
class Agreement:
    """Bland–Altman: per pair the mean and the difference (a − b), the bias and limits of agreement."""

    mean: Floats
    difference: Floats
    bias: float
    lower: float
    upper: float

    @property
    def n(self) -> int:
        return int(self.mean.size)


def bland_altman(a: Floats, b: Floats) -> Agreement | None:
    """The agreement of ``a`` with ``b`` (None for fewer than two pairs: no spread to speak of)."""
    if a.size < 2:
        return None
    mean, difference = (a + b) / 2, a - b
    bias, sd = float(difference.mean()), float(difference.std(ddof=1))
    return Agreement(mean, difference, bias, bias - LOA_SD * sd, bias + LOA_SD * sd)


def dlco_agreement(plots: Plots) -> Agreement | None:
    """Reported DLCO against DLCO recomputed from the manoeuvres' gas data (mL/min/mmHg)."""
    return bland_altman(np.frombuffer(plots.dlco_reported), np.frombuffer(plots.dlco_recomputed))


def kco_pairs(plots: Plots) -> tuple[Floats, Floats]:
    """Reported KCO and DLCO/VA (mL/min/mmHg/L), pair by pair."""
    return np.frombuffer(plots.kco_reported), np.frombuffer(plots.dlco_over_va)


def percent_predicted(plots: Plots) -> dict[str, Floats]:
    """DLCO in % of the lab's predicted value, per source, sources sorted."""
    return {source: np.frombuffer(values) for source, values in sorted(plots.percent_predicted.items())}


def findings_by_month(plots: Plots) -> tuple[list[str], Mapping[str, Floats]]:
    """Months in order, and per severity the findings counted in each month."""
    months = sorted({month for month, _ in plots.findings_by_month})
    severities = sorted({severity for _, severity in plots.findings_by_month})
    counts = {
        severity: np.array([plots.findings_by_month[(m, severity)] for m in months], dtype=np.float64)
        for severity in severities
    }
    return months, counts
