"""Reference equations for spirometry and static lung volumes: GLI Global, GLI-2012, GLI-2021.

Owns: which equation sets exist, what each covers (quantities, units, ages, ethnic groups),
which is the default, and the reference values of one person: predicted, LLN, ULN, z-score,
per cent predicted and the severity band (:func:`compare`).

- GLI Global (race-neutral spirometry): Bowerman C et al., Am J Respir Crit Care Med
  2023;207:768-774. FEV1, FVC, FEV1/FVC; 3-95 y. The default for spirometry: the ATS statement
  on race and ethnicity in pulmonary function test interpretation (Bhakta NR et al., Am J Respir
  Crit Care Med 2023;207:978-995) recommends race-neutral average equations such as GLI Global.
- GLI-2012 (multi-ethnic spirometry): Quanjer PH et al., Eur Respir J 2012;40:1324-1343. FEV1,
  FVC, FEV1/FVC, FEF25-75; 3-95 y (FEF25-75 to 90 y); five groups (Caucasian, African-American,
  North East Asian, South East Asian, Other/mixed).
- GLI-2021 (static lung volumes, European ancestry): Hall GL et al., Eur Respir J
  2021;57:2000289. TLC, FRC, RV, RV/TLC, ERV, IC, VC; 5-80 y.

The tables are data in ``mappings/<folder>/`` (parsed by ``bridge.science.equation_tables``,
read by the shell); the LMS arithmetic is ``bridge.science.lms``, shared with GLI-2017. Pure.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from types import MappingProxyType
from typing import Literal

from bridge.errors import MappingError
from bridge.model import Sex
from bridge.science.equation_tables import SEXES, parse_coefficients, parse_groups, parse_splines
from bridge.science.lms import Curve, Lms, OutsideRange
from bridge.science.reference import AbnormalFlag, Impairment, abnormal_flag, impairment


class EquationSetName(StrEnum):
    """An equation set, by the name a site's settings would use."""

    GLI_GLOBAL = "gli-global"
    GLI_2012 = "gli-2012"
    GLI_2021 = "gli-2021"


class Quantity(StrEnum):
    """A quantity with reference equations (spirometry, then static lung volumes)."""

    FEV1 = "fev1"
    FVC = "fvc"
    FEV1_FVC = "fev1_fvc"  # a fraction (0.75), not a percentage
    FEF25_75 = "fef25_75"
    TLC = "tlc"
    FRC = "frc"
    RV = "rv"
    RV_TLC = "rv_tlc"  # a percentage (35), as GLI-2021 models it
    ERV = "erv"
    IC = "ic"
    VC = "vc"


class Group(StrEnum):
    """The GLI-2012 groups (Quanjer et al. 2012); GLI Global and GLI-2021 take none."""

    CAUCASIAN = "caucasian"
    AFRICAN_AMERICAN = "african_american"
    NORTH_EAST_ASIAN = "north_east_asian"
    SOUTH_EAST_ASIAN = "south_east_asian"
    OTHER = "other"


@dataclass(frozen=True, slots=True)
class SetInfo:
    """What an equation set covers and where its tables are."""

    name: EquationSetName
    title: str
    folder: str  # under mappings/
    quantities: tuple[Quantity, ...]
    age_range_y: tuple[float, float]
    takes_group: bool

    @property
    def coefficients_table(self) -> str:
        return f"{self.folder}/coefficients.csv"

    @property
    def splines_table(self) -> str:
        return f"{self.folder}/splines.csv"

    @property
    def groups_table(self) -> str | None:
        return f"{self.folder}/groups.csv" if self.takes_group else None


_SPIROMETRY = (Quantity.FEV1, Quantity.FVC, Quantity.FEV1_FVC)
_VOLUMES = (Quantity.TLC, Quantity.FRC, Quantity.RV, Quantity.RV_TLC, Quantity.ERV, Quantity.IC, Quantity.VC)
SETS: Mapping[EquationSetName, SetInfo] = MappingProxyType(
    {
        # source: Bowerman et al. 2023, abstract: equations for ages 3-95 years.
        EquationSetName.GLI_GLOBAL: SetInfo(
            EquationSetName.GLI_GLOBAL, "GLI Global (Bowerman 2023)", "gliglobal", _SPIROMETRY, (3.0, 95.0), False
        ),
        # source: Quanjer et al. 2012, title: "for the 3-95-yr age range".
        EquationSetName.GLI_2012: SetInfo(
            EquationSetName.GLI_2012,
            "GLI-2012 (Quanjer 2012)",
            "gli2012",
            (*_SPIROMETRY, Quantity.FEF25_75),
            (3.0, 95.0),
            True,
        ),
        # source: Hall et al. 2021, abstract: reference values for ages 5-80 years.
        EquationSetName.GLI_2021: SetInfo(
            EquationSetName.GLI_2021, "GLI-2021 (Hall 2021)", "gli2021", _VOLUMES, (5.0, 80.0), False
        ),
    }
)
# The site setting ``spirometry_reference``: the spirometry equations a site compares with.
SpirometrySet = Literal["gli-global", "gli-2012"]
SPIROMETRY_SETS: tuple[SpirometrySet, ...] = ("gli-global", "gli-2012")
DEFAULT_SPIROMETRY_SET: SpirometrySet = "gli-global"
DEFAULT_SPIROMETRY = EquationSetName(DEFAULT_SPIROMETRY_SET)
DEFAULT_LUNG_VOLUMES = EquationSetName.GLI_2021
# The rule for height, of this project and not of the publications: the equations are evaluated
# between 80 cm (a small 3-year-old) and 250 cm; anything else is taken as a wrong unit or typo.
HEIGHT_RANGE_CM = (80.0, 250.0)


@dataclass(frozen=True, slots=True)
class EquationSet:
    """One parsed equation set: a curve per quantity and sex, and GLI-2012's group terms."""

    info: SetInfo
    units: Mapping[Quantity, str]
    curves: Mapping[tuple[Quantity, Sex], Curve]
    group_terms: Mapping[tuple[Quantity, Sex, Group], tuple[float, float]] = field(
        default_factory=lambda: MappingProxyType({})
    )

    @classmethod
    def from_text(
        cls, name: EquationSetName, coefficients_text: str, splines_text: str, groups_text: str | None = None
    ) -> EquationSet:
        """Parse a set's tables (raises MappingError); GLI-2012 needs its groups.csv."""
        info = SETS[name]
        rows = parse_coefficients(info.coefficients_table, coefficients_text, info.quantities)
        keys = tuple((str(q), s) for q in info.quantities for s in SEXES)
        splines = parse_splines(info.splines_table, splines_text, keys)
        curves: dict[tuple[Quantity, Sex], Curve] = {}
        terms: dict[tuple[Quantity, Sex, Group], tuple[float, float]] = {}
        if info.groups_table is not None:
            if groups_text is None:
                raise MappingError(info.groups_table, "(file)", "the ethnic-group terms of " + info.title)
            parsed = parse_groups(info.groups_table, groups_text, keys, [g for g in Group if g is not Group.CAUCASIAN])
            terms = {(Quantity(q), s, Group(g)): v for (q, s, g), v in parsed.items()}
        for (quantity, sex), row in rows.items():
            curve = row.curve(splines[(quantity, sex)])
            s_offsets = (
                (0.0, *(terms[(Quantity(quantity), sex, g)][1] for g in Group if g is not Group.CAUCASIAN))
                if terms
                else (0.0,)
            )
            undefined = curve.first_undefined_limit(s_offsets)
            if undefined is not None:
                where = f"{quantity}_{sex}_s at age {undefined:g}"
                raise MappingError(info.splines_table, where, "L > 0 and 1.645 L S below 1")
            curves[(Quantity(quantity), sex)] = curve
        if curves[(info.quantities[0], Sex.FEMALE)].splines.last_age < info.age_range_y[1]:
            raise MappingError(info.splines_table, "rows", f"rows up to age {info.age_range_y[1]:g}")
        units = {q: rows[(str(q), Sex.FEMALE)].unit for q in info.quantities}
        return cls(info, MappingProxyType(units), MappingProxyType(curves), MappingProxyType(terms))

    def lms(
        self, quantity: Quantity, sex: Sex, age_years: float, height_cm: float, group: Group | None = None
    ) -> Lms | OutsideRange:
        """L, M and S of one person for one quantity, or every reason why there are none.

        GLI-2012 needs a group; the other sets ignore one."""
        title = self.info.title
        reasons = []
        curve = self.curves.get((quantity, sex))
        if quantity not in self.info.quantities:
            reasons.append(f"{title} has no equation for {quantity}")
        elif curve is None:
            reasons.append(f"the {title} equations exist for female and male only, not for sex {sex!s}")
        low, high = self.info.age_range_y
        if curve is not None:
            high = min(high, curve.splines.last_age)
        if not low <= age_years <= high:  # also refuses NaN
            reasons.append(f"age {age_years:g} y is outside {low:g}-{high:g} y, the range of {title} for {quantity}")
        low, high = HEIGHT_RANGE_CM
        if not low <= height_cm <= high:
            reasons.append(
                f"height {height_cm:g} cm is outside {low:g}-{high:g} cm, the range the equations are used for"
            )
        if self.info.takes_group and group is None:
            reasons.append(f"{title} needs an ethnic group (one of {', '.join(Group)})")
        if reasons or curve is None:
            return OutsideRange("; ".join(reasons))
        m_offset, s_offset = self.group_terms.get((quantity, sex, group), (0.0, 0.0)) if group else (0.0, 0.0)
        return curve.lms(age_years, height_cm, m_offset, s_offset)


@dataclass(frozen=True, slots=True)
class Compared:
    """A measured value against its reference: the numbers a report shows, and the band."""

    measured: float
    predicted: float
    lln: float
    uln: float
    z: float
    percent_predicted: float
    band: Impairment  # ERS/ATS 2022 severity by z-score (bridge.science.reference.impairment)
    flag: AbnormalFlag


def compare(lms: Lms, measured: float) -> Compared | OutsideRange:
    """Predicted, LLN, ULN, z, per cent predicted, severity band and flag of a measured value."""
    z = lms.z_score(measured)
    percent = lms.percent_predicted(measured)
    if isinstance(z, OutsideRange):
        return z
    if isinstance(percent, OutsideRange):
        return percent
    return Compared(measured, lms.predicted, lms.lln, lms.uln, z, percent, impairment(z), abnormal_flag(z))
