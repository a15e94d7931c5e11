"""The LMS method of the Global Lung Function Initiative equations, once for every equation set.

Owns: the L (skewness), M (median) and S (coefficient of variation) of one person from one
equation (:class:`Curve`), with its age splines interpolated linearly between the rows of a
look-up table; and what follows from L, M and S: predicted value, lower and upper limits of
normal, z-score and per cent predicted (:class:`Lms`). The GLI-2017 transfer factor
(``bridge.science.reference``), GLI-2012 and GLI Global spirometry and GLI-2021 static lung
volumes (``bridge.science.equation_sets``) all evaluate through :meth:`Curve.lms`.

One equation, for one quantity and one sex::

    M = exp(m0 + mh H + ma A + group m + Mspline(age))
    S = exp(s0 + sa A' + group s + Sspline(age))
    L = l0 + l1 ln(age) + Lspline(age)
    z = ((measured / M)^L - 1) / (L S)
    LLN, ULN = M (1 -/+ 1.645 L S)^(1/L)

where H is ln(height) or height and A, A' are ln(age) or age, as the equation says (GLI-2021
uses linear terms for some volumes). Pure: no I/O, no clock, no logging.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import StrEnum

# The 5th and 95th centiles of the standard normal distribution: LLN and ULN are z = -/+1.645.
LIMIT_Z = 1.645


@dataclass(frozen=True, slots=True)
class OutsideRange:
    """No reference value: the inputs are outside what the equations cover; ``reason`` says why."""

    reason: str


@dataclass(frozen=True, slots=True)
class Lms:
    """The L (skewness), M (median = predicted) and S (coefficient of variation) of one person."""

    L: float
    M: float
    S: float

    @property
    def predicted(self) -> float:
        """The predicted (median) value."""
        return self.M

    @property
    def lln(self) -> float:
        """Lower limit of normal, the 5th centile."""
        return self._centile(-LIMIT_Z)

    @property
    def uln(self) -> float:
        """Upper limit of normal, the 95th centile."""
        return self._centile(LIMIT_Z)

    def _centile(self, z: float) -> float:
        # M (1 + z L S)^(1/L); the parsers guarantee L > 0 and 1 - 1.645 L S > 0 at every table row.
        return self.M * math.pow(max(0.0, 1.0 + z * self.L * self.S), 1.0 / self.L)

    def z_score(self, measured: float) -> float | OutsideRange:
        """The z-score of a measured value, in the quantity's unit."""
        refused = _refuse_measured(measured)
        if refused is not None:
            return refused
        return (math.pow(measured / self.M, self.L) - 1.0) / (self.L * self.S)

    def percent_predicted(self, measured: float) -> float | OutsideRange:
        """The measured value as a percentage of the predicted value."""
        refused = _refuse_measured(measured)
        if refused is not None:
            return refused
        return 100.0 * measured / self.M


def _refuse_measured(measured: float) -> OutsideRange | None:
    if math.isfinite(measured) and measured > 0.0:
        return None
    return OutsideRange(f"the measured value {measured:g} is not a positive number")


class Scale(StrEnum):
    """How a predictor enters an equation: as its natural logarithm or as itself."""

    LN = "ln"
    LINEAR = "linear"

    def of(self, value: float) -> float:
        """The predictor's term: ln(value) or value."""
        return math.log(value) if self is Scale.LN else value


@dataclass(frozen=True, slots=True)
class Splines:
    """Mspline, Sspline and Lspline by age: one value per ``step`` years from ``first_age``."""

    first_age: float
    step: float
    m: tuple[float, ...]
    s: tuple[float, ...]  # all 0.0 where the equation has no S spline
    l: tuple[float, ...]  # noqa: E741 - the L of LMS; all 0.0 where the equation has no L spline

    @property
    def last_age(self) -> float:
        """The age of the last row."""
        return self.first_age + (len(self.m) - 1) * self.step

    def at(self, age_years: float) -> tuple[float, float, float]:
        """(Mspline, Sspline, Lspline) at an age inside the table, interpolated linearly between rows."""
        position = (age_years - self.first_age) / self.step
        row = int(position)  # position >= 0 here, so int() is floor()
        weight = position - row
        m, s, l = self.m[row], self.s[row], self.l[row]  # noqa: E741
        if weight > 0.0:
            m += weight * (self.m[row + 1] - m)
            s += weight * (self.s[row + 1] - s)
            l += weight * (self.l[row + 1] - l)  # noqa: E741
        return m, s, l


@dataclass(frozen=True, slots=True)
class Curve:
    """The equation of one quantity for one sex; ``lms`` assumes age and height already checked."""

    m0: float
    m_height: float
    m_height_scale: Scale
    m_age: float
    m_age_scale: Scale
    s0: float
    s_age: float
    s_age_scale: Scale
    l0: float
    l_ln_age: float
    splines: Splines

    def lms(self, age_years: float, height_cm: float, m_offset: float = 0.0, s_offset: float = 0.0) -> Lms:
        """L, M and S at this age (decimal years, inside the spline table) and height (cm)."""
        m_spline, s_spline, l_spline = self.splines.at(age_years)
        ln_age = math.log(age_years)
        m_age = ln_age if self.m_age_scale is Scale.LN else age_years
        s_age = ln_age if self.s_age_scale is Scale.LN else age_years
        m_height = self.m_height_scale.of(height_cm)
        # Adding the 0.0 offsets and splines of equations without them leaves every sum unchanged.
        m = math.exp(self.m0 + self.m_height * m_height + self.m_age * m_age + m_offset + m_spline)
        s = math.exp(self.s0 + self.s_age * s_age + s_offset + s_spline)
        return Lms(self.l0 + self.l_ln_age * ln_age + l_spline, m, s)

    def first_undefined_limit(self, s_offsets: tuple[float, ...] = (0.0,)) -> float | None:
        """The first table age where 1 - 1.645 L S <= 0 or L <= 0 (the LLN undefined), or None."""
        for i, (s_spline, l_spline) in enumerate(zip(self.splines.s, self.splines.l, strict=True)):
            age = self.splines.first_age + i * self.splines.step
            s_age = math.log(age) if self.s_age_scale is Scale.LN else age
            el = self.l0 + self.l_ln_age * math.log(age) + l_spline
            for offset in s_offsets:
                s = math.exp(self.s0 + self.s_age * s_age + offset + s_spline)
                if el <= 0.0 or LIMIT_Z * el * s >= 1.0:
                    return age
        return None
