"""Spirometry recomputed from a session: grades, repeatability, FEV1/FVC, reference values, bronchodilator response.

Owns the step from the record's ``spirometry`` section to :class:`bridge.model.SpirometryDerived`:
the plain-number functions of ``bridge.science.spirometry`` (ATS/ERS 2019 grades and
repeatability, the ERS/ATS 2022 bronchodilator response) and the equations of the site's
spirometry set (``spirometry_reference``: GLI Global by default, or GLI-2012 with the patient's
ethnicity; ``bridge.science.equation_sets``), applied to each phase. Canonical units: litres,
L/s, FEV1/FVC in per cent (the equations model it as a fraction). Pure.
"""

from __future__ import annotations

from types import MappingProxyType

from bridge.model import Quantity, Session, Spirometry
from bridge.science.equation_sets import (
    DEFAULT_SPIROMETRY_SET,
    EquationSet,
    EquationSetName,
    Group,
    SpirometrySet,
    compare,
)
from bridge.science.equation_sets import Quantity as EquationQuantity
from bridge.science.lms import Lms, OutsideRange
from bridge.science.spirometry import SpirometryRules, Status, bronchodilator_response, grade, repeatability
from bridge.science.table_values import Tables
from bridge.spirometry_record import (
    BronchodilatorChange,
    ParameterGrade,
    PhaseDerived,
    SpirometryDerived,
    SpirometryPhase,
    SpirometryReference,
)

# The quantities with reference equations, and the unit each is compared in (FEV1/FVC: a fraction).
_REFERENCED = ("fev1", "fvc", "fev1_fvc", "fef25_75")
_UNITS = MappingProxyType({"fev1": "L", "fvc": "L", "fev1_fvc": "%", "fef25_75": "L/s"})


def derive_spirometry(
    session: Session, age_years: float, tables: Tables, spirometry_set: SpirometrySet = DEFAULT_SPIROMETRY_SET
) -> SpirometryDerived | None:
    """What the bridge recomputes of the session's spirometry; None when the session has none."""
    spiro = session.spirometry
    if spiro is None:
        return None
    equations = tables.spirometry_equations[EquationSetName(spirometry_set)]
    group = Group(session.patient.ethnicity.value) if session.patient.ethnicity is not None else None
    reasons: list[str] = []
    lms_of = _LmsOf(session, age_years, equations, group, reasons)
    pre = _phase(spiro.pre, age_years, tables.spirometry, lms_of) if spiro.pre is not None else None
    post = _phase(spiro.post, age_years, tables.spirometry, lms_of) if spiro.post is not None else None
    return SpirometryDerived(
        reference_set=equations.info.title,
        pre=pre,
        post=post,
        fev1_response=_response(spiro, "fev1", lms_of, tables.spirometry),
        fvc_response=_response(spiro, "fvc", lms_of, tables.spirometry),
        reference_not_computed="; ".join(dict.fromkeys(reasons)) or None,
    )


class _LmsOf:
    """The reference values of one person, by quantity; the reasons where there are none."""

    def __init__(
        self, session: Session, age: float, equations: EquationSet, group: Group | None, reasons: list[str]
    ) -> None:
        self.session, self.age, self.equations, self.group, self.reasons = session, age, equations, group, reasons

    def has(self, key: str) -> bool:
        return EquationQuantity(key) in self.equations.info.quantities

    def predicted(self, key: str) -> float | None:
        lms = self._lms(key)
        return None if lms is None else lms.predicted

    def compared(self, key: str, measured: Quantity) -> SpirometryReference | None:
        lms = self._lms(key)
        if lms is None:
            return None
        scale = 100.0 if key == "fev1_fvc" else 1.0  # the equations' fraction, shown in per cent
        result = compare(lms, measured.value / scale)
        if isinstance(result, OutsideRange):
            self.reasons.append(f"{key}: {result.reason}")
            return None
        unit = _UNITS[key]
        return SpirometryReference(
            reference_set=self.equations.info.title,
            measured=measured,
            predicted=_q(result.predicted * scale, unit),
            lln=_q(result.lln * scale, unit),
            uln=_q(result.uln * scale, unit),
            z_score=round(result.z, 2),
            percent_predicted=Quantity(value=round(result.percent_predicted, 0), unit="%", decimals=0),
            impairment=result.band.value,
            flag=result.flag,
        )

    def _lms(self, key: str) -> Lms | None:
        patient = self.session.patient
        found = self.equations.lms(EquationQuantity(key), patient.sex, self.age, patient.height.value, self.group)
        if isinstance(found, OutsideRange):
            self.reasons.append(found.reason)
            return None
        return found


def _q(value: float, unit: str) -> Quantity:
    decimals = 1 if unit == "%" else 2
    return Quantity(value=round(value, decimals), unit=unit, decimals=decimals)


def _phase(phase: SpirometryPhase, age: float, rules: SpirometryRules, lms_of: _LmsOf) -> PhaseDerived:
    results = phase.results
    ratio = None
    if results.fev1 is not None and results.fvc is not None and results.fvc.value > 0:
        ratio = _q(100.0 * results.fev1.value / results.fvc.value, "%")
    references = {}
    for key in _REFERENCED:
        measured = getattr(results, key)
        if measured is not None and lms_of.has(key):
            found = lms_of.compared(key, measured)
            if found is not None:
                references[key] = found
    return PhaseDerived(
        fev1_fvc=ratio,
        fev1_grade=_grade(phase, "fev1", age, rules),
        fvc_grade=_grade(phase, "fvc", age, rules),
        references=references,
    )


def _grade(phase: SpirometryPhase, key: str, age: float, rules: SpirometryRules) -> ParameterGrade | None:
    """The 2019 grade of FEV1 or FVC from the manoeuvres the lab judged; None when it judged none."""
    measurements = []
    for m in phase.manoeuvres:
        value: Quantity | None = getattr(m, key)
        status = getattr(m, f"{key}_status")
        if value is not None and status is not None:
            measurements.append((value.value, Status(status)))
    if not measurements:
        return None
    graded = grade(measurements, age, rules)
    repeated = repeatability([v for v, s in measurements if s is Status.ACCEPTABLE], age, rules)
    difference = None if graded.difference_l is None else _q(graded.difference_l, "L")
    return ParameterGrade(
        grade=graded.grade,
        acceptable=graded.acceptable,
        usable=graded.usable,
        difference=difference,
        repeatable=None if repeated is None else repeated.met,
    )


def _response(spiro: Spirometry, key: str, lms_of: _LmsOf, rules: SpirometryRules) -> BronchodilatorChange | None:
    """ERS/ATS 2022: 100 (post - pre) / predicted; None without both values or a predicted value."""
    if spiro.pre is None or spiro.post is None:
        return None
    pre: Quantity | None = getattr(spiro.pre.results, key)
    post: Quantity | None = getattr(spiro.post.results, key)
    if pre is None or post is None:
        return None
    predicted = lms_of.predicted(key)
    if predicted is None:
        return None
    found = bronchodilator_response(pre.value, post.value, predicted, rules)
    if found is None:
        return None
    return BronchodilatorChange(
        change=_q(found.change, "L"),
        percent_of_predicted=_q(found.percent_of_predicted, "%"),
        significant=found.significant,
    )
