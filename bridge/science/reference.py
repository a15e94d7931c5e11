"""GLI-2017 reference values for TLCO/DLCO, KCO and VA: predicted, limits of normal, z-scores.

Owns: the reference equations of Stanojevic et al. (Official ERS technical standards: Global
Lung Function Initiative reference values for the carbon monoxide transfer factor for
Caucasians, Eur Respir J 2017;50:1700010, as corrected in Eur Respir J 2020;56:1750010),
parsed from the text of ``mappings/gli2017/`` (reading the files is the shell's job, see
``bridge.tables.files.load_reference_equations``), and the interpretation of a z-score.

The equations use the LMS method (evaluated by ``bridge.science.lms``, shared with the
spirometry and lung-volume equation sets)::

    M = exp(a0 + a1 ln(height_cm) + a2 ln(age_y) + Mspline(age))
    S = exp(p0 + p1 ln(age_y) + Sspline(age))
    L = q0
    z = ((measured / M)^L - 1) / (L S)
    LLN, ULN = M (1 -/+ 1.645 L S)^(1/L)

The splines are tabulated by quarter year of age from 5 y and interpolated linearly between
rows, as the authors' calculator does. Inputs the equations do not cover (sex other than
female or male, age outside 5-85 y, height outside 100-250 cm, a measured value that is not a
positive number) give an :class:`OutsideRange` with a reason, never a number.

Pure: no I/O, no clock, no logging; everything is parsed once into frozen tuples so that one
prediction is a few multiplications, one interpolation and three logarithms.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from types import MappingProxyType
from typing import Literal

from bridge.errors import MappingError
from bridge.model import Sex
from bridge.science.lms import LIMIT_Z, Curve, Lms, OutsideRange, Scale, Splines

__all__ = ["LIMIT_Z", "Lms", "OutsideRange"]  # re-exported: they lived here before bridge.science.lms


class Parameter(StrEnum):
    """A quantity the GLI-2017 equations predict, in one unit system."""

    TLCO = "tlco"  # transfer factor, SI (mmol/min/kPa)
    DLCO = "dlco"  # the same quantity, traditional units (mL/min/mmHg)
    KCO_SI = "kco_si"  # transfer coefficient, SI (mmol/min/kPa/L)
    KCO_TRAD = "kco_trad"  # transfer coefficient, traditional (mL/min/mmHg/L)
    VA = "va"  # alveolar volume (L, BTPS)


# The UCUM unit each parameter's predicted value, LLN and ULN are in.
UNITS: Mapping[Parameter, str] = MappingProxyType(
    {
        Parameter.TLCO: "mmol/min/kPa",
        Parameter.DLCO: "mL/min/mm[Hg]",
        Parameter.KCO_SI: "mmol/min/kPa/L",
        Parameter.KCO_TRAD: "mL/min/mm[Hg]/L",
        Parameter.VA: "L",
    }
)

# source: Stanojevic et al., ERJ 2017;50:1700010, abstract: reference values "for Caucasians aged
# 5-85 years". The look-up tables run on to 90 y; the equations are not used past 85.
AGE_RANGE_Y = (5.0, 85.0)
# The rule for height: the equations are evaluated between 1.0 and 2.5 m, the bounds outside
# which the R package rspiro (rspiro_check_somat) warns that a height is implausible. The height
# range of the GLI-2017 data set itself is not carried here.
HEIGHT_RANGE_CM = (100.0, 250.0)
# source: Stanojevic et al. 2017, online supplement look-up tables: one row per quarter year from 5 y.
SPLINE_FIRST_AGE_Y = 5.0
SPLINE_STEP_Y = 0.25

COEFFICIENTS_TABLE = "gli2017/coefficients.csv"
SPLINES_TABLE = "gli2017/splines.csv"

_SEXES = (Sex.FEMALE, Sex.MALE)
_COEFFICIENT_NAMES = ("a0", "a1", "a2", "p0", "p1", "q0")
_COEFFICIENT_COLUMNS = ("parameter", "sex", *_COEFFICIENT_NAMES)
# Traditional and SI equations of one quantity differ in the intercept a0 only (by ln 2.987).
_TRADITIONAL_AND_SI = ((Parameter.DLCO, Parameter.TLCO), (Parameter.KCO_TRAD, Parameter.KCO_SI))
_SHARED_NAMES = ("a1", "a2", "p0", "p1", "q0")


@dataclass(frozen=True, slots=True)
class Equation:
    """The equation of one parameter for one sex: six coefficients and two age splines."""

    parameter: Parameter
    sex: Sex
    a0: float
    a1: float
    a2: float
    p0: float
    p1: float
    q0: float
    m_spline: tuple[float, ...]  # Mspline at SPLINE_FIRST_AGE_Y + i * SPLINE_STEP_Y
    s_spline: tuple[float, ...]

    _curve: Curve = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        zeros = (0.0,) * len(self.m_spline)
        splines = Splines(SPLINE_FIRST_AGE_Y, SPLINE_STEP_Y, self.m_spline, self.s_spline, zeros)
        ln = Scale.LN
        curve = Curve(self.a0, self.a1, ln, self.a2, ln, self.p0, self.p1, ln, self.q0, 0.0, splines)
        object.__setattr__(self, "_curve", curve)

    def lms(self, age_years: float, height_cm: float) -> Lms | OutsideRange:
        """L, M and S at this age (decimal years) and height (cm), or why there are none."""
        reasons = _range_reasons(age_years, height_cm)
        if reasons:
            return OutsideRange("; ".join(reasons))
        return self._curve.lms(age_years, height_cm)


def _range_reasons(age_years: float, height_cm: float) -> list[str]:
    reasons = []
    low, high = AGE_RANGE_Y
    if not low <= age_years <= high:  # also refuses NaN
        reasons.append(f"age {age_years:g} y is outside {low:g}-{high:g} y, the range of the GLI-2017 equations")
    low, high = HEIGHT_RANGE_CM
    if not low <= height_cm <= high:
        reasons.append(f"height {height_cm:g} cm is outside {low:g}-{high:g} cm, the range the equations are used for")
    return reasons


@dataclass(frozen=True, slots=True)
class ReferenceEquations:
    """Every GLI-2017 equation: each parameter for female and male."""

    equations: tuple[Equation, ...]
    _index: Mapping[tuple[Parameter, Sex], Equation] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        index = {(e.parameter, e.sex): e for e in self.equations}
        wanted = {(p, s) for p in Parameter for s in _SEXES}
        if set(index) != wanted or len(index) != len(self.equations):
            raise MappingError(COEFFICIENTS_TABLE, "equations", "exactly one equation per parameter and sex")
        object.__setattr__(self, "_index", MappingProxyType(index))

    @classmethod
    def from_text(cls, coefficients_text: str, splines_text: str) -> ReferenceEquations:
        """Parse ``gli2017/coefficients.csv`` and ``gli2017/splines.csv`` (raises MappingError)."""
        coefficients = _parse_coefficients(coefficients_text)
        splines = _parse_splines(splines_text)
        equations = []
        for (parameter, sex), (a0, a1, a2, p0, p1, q0) in coefficients.items():
            m_spline, s_spline = splines[(parameter, sex)]
            equation = Equation(parameter, sex, a0, a1, a2, p0, p1, q0, m_spline, s_spline)
            _check_limits_defined(equation)
            equations.append(equation)
        return cls(tuple(equations))

    def equation(self, parameter: Parameter, sex: Sex) -> Equation | OutsideRange:
        """The equation of a parameter for a sex; none for sex other than female or male."""
        found = self._index.get((parameter, sex))
        if found is None:
            return OutsideRange(f"the GLI-2017 equations exist for female and male only, not for sex {sex!s}")
        return found

    def lms(self, parameter: Parameter, sex: Sex, age_years: float, height_cm: float) -> Lms | OutsideRange:
        """L, M and S of one person for one parameter, or every reason why there are none."""
        found = self.equation(parameter, sex)
        if isinstance(found, OutsideRange):
            reasons = [found.reason, *_range_reasons(age_years, height_cm)]
            return OutsideRange("; ".join(reasons))
        return found.lms(age_years, height_cm)


# --- interpretation ---------------------------------------------------------------------------


class Impairment(StrEnum):
    """Severity of a low value by its z-score."""

    NORMAL = "normal"
    MILD = "mild"
    MODERATE = "moderate"
    SEVERE = "severe"


# from memory: ERS/ATS 2022 interpretive standard (Stanojevic et al., ERJ 2022;60:2101499),
# severity by z-score: mild from -1.645 to -2.5, moderate from -2.5 to -4, severe below -4.
# The boundaries are recalled, not read in the standard.
MILD_FROM_Z = -LIMIT_Z
MODERATE_FROM_Z = -2.5
SEVERE_BELOW_Z = -4.0

AbnormalFlag = Literal["L", "N", "H"]


def impairment(z: float) -> Impairment:
    """The band of a z-score: z >= -1.645 normal; down to -2.5 mild; down to -4 moderate; below severe."""
    _require_finite(z)
    if z >= MILD_FROM_Z:
        return Impairment.NORMAL
    if z >= MODERATE_FROM_Z:
        return Impairment.MILD
    if z >= SEVERE_BELOW_Z:
        return Impairment.MODERATE
    return Impairment.SEVERE


def abnormal_flag(z: float) -> AbnormalFlag:
    """HL7 v2 abnormal flag (table 0078) and FHIR interpretation code: L below the LLN, H above the ULN, else N."""
    _require_finite(z)
    if z < -LIMIT_Z:
        return "L"
    if z > LIMIT_Z:
        return "H"
    return "N"


def _require_finite(z: float) -> None:
    if not math.isfinite(z):
        raise ValueError(f"a z-score must be a finite number, got {z!r}")


# --- parsing ----------------------------------------------------------------------------------


def _rows(text: str) -> list[tuple[int, list[str]]]:
    """(line number, cells) of every line that is not blank or a '#' comment."""
    rows = []
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if stripped and not stripped.startswith("#"):
            rows.append((number, [cell.strip() for cell in stripped.split(",")]))
    return rows


def _number(table: str, line: int, column: str, cell: str) -> float:
    try:
        value = float(cell)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise MappingError(table, f"line {line}, column {column}", f"a finite number, not {cell!r}")
    return value


def _parse_coefficients(text: str) -> dict[tuple[Parameter, Sex], tuple[float, ...]]:
    table = COEFFICIENTS_TABLE
    rows = _rows(text)
    if not rows or tuple(rows[0][1]) != _COEFFICIENT_COLUMNS:
        raise MappingError(table, "header", "the columns " + ",".join(_COEFFICIENT_COLUMNS))
    found: dict[tuple[Parameter, Sex], tuple[float, ...]] = {}
    for line, cells in rows[1:]:
        if len(cells) != len(_COEFFICIENT_COLUMNS):
            raise MappingError(table, f"line {line}", f"{len(_COEFFICIENT_COLUMNS)} comma-separated cells")
        try:
            parameter = Parameter(cells[0])
        except ValueError:
            raise MappingError(table, f"line {line}", "a parameter among " + ", ".join(Parameter)) from None
        if cells[1] not in _SEXES:
            raise MappingError(table, f"line {line}", "sex female or male")
        sex = Sex(cells[1])
        if (parameter, sex) in found:
            raise MappingError(table, f"line {line}", f"one row for {parameter} {sex}, not two")
        values = tuple(_number(table, line, n, c) for n, c in zip(_COEFFICIENT_NAMES, cells[2:], strict=True))
        if values[-1] <= 0.0:
            raise MappingError(table, f"line {line}, column q0", "L > 0 (the limits are computed for positive L)")
        found[(parameter, sex)] = values
    missing = [f"{p} {s}" for p in Parameter for s in _SEXES if (p, s) not in found]
    if missing:
        raise MappingError(table, "rows", "a row for " + ", ".join(missing))
    for traditional, si in _TRADITIONAL_AND_SI:
        for sex in _SEXES:
            trad, si_values = found[(traditional, sex)], found[(si, sex)]
            for name in _SHARED_NAMES:
                i = _COEFFICIENT_NAMES.index(name)
                if trad[i] != si_values[i]:
                    raise MappingError(table, f"{traditional} {sex} {name}", f"the same value as {si} {sex}")
    return found


def _spline_columns() -> list[str]:
    return [f"{p}_{s}_{k}" for p in Parameter for s in _SEXES for k in ("m", "s")]


def _parse_splines(text: str) -> dict[tuple[Parameter, Sex], tuple[tuple[float, ...], tuple[float, ...]]]:
    table = SPLINES_TABLE
    rows = _rows(text)
    wanted = ["age", *_spline_columns()]
    header = rows[0][1] if rows else []
    if sorted(header) != sorted(wanted):
        raise MappingError(table, "header", "the columns age and <parameter>_<sex>_m/_s, each once")
    columns: dict[str, list[float]] = {name: [] for name in header}
    for i, (line, cells) in enumerate(rows[1:]):
        if len(cells) != len(header):
            raise MappingError(table, f"line {line}", f"{len(header)} comma-separated cells")
        for name, cell in zip(header, cells, strict=True):
            columns[name].append(_number(table, line, name, cell))
        age = columns["age"][-1]
        expected_age = SPLINE_FIRST_AGE_Y + i * SPLINE_STEP_Y
        if abs(age - expected_age) > 1e-9:
            raise MappingError(table, f"line {line}", f"age {expected_age:g} (quarter years from 5, in order)")
    ages = columns["age"]
    if not ages or ages[-1] < AGE_RANGE_Y[1]:
        raise MappingError(table, "rows", f"rows up to age {AGE_RANGE_Y[1]:g}")
    return {(p, s): (tuple(columns[f"{p}_{s}_m"]), tuple(columns[f"{p}_{s}_s"])) for p in Parameter for s in _SEXES}


def _check_limits_defined(e: Equation) -> None:
    """1 - 1.645 L S > 0 at every table row, so that the LLN is a positive number."""
    age = e._curve.first_undefined_limit()
    if age is not None:
        raise MappingError(SPLINES_TABLE, f"{e.parameter}_{e.sex}_s at age {age:g}", "1.645 L S below 1")
