"""Derivation: the values the bridge recomputes from a normalised session.

Owns: turning the record's quantities into the plain numbers ``physiology`` and ``quality``
work on, and their answers back into quantities (canonical units, see ``bridge.model``):
KCO, Hb-, COHb- and pressure-adjusted DLCO (and KCO), per-manoeuvre VA and DLCO from the gas
data, grades and the reported mean (repeatable by the criterion the caller names), and the
values DLCO and KCO may be compared as, from which ``bridge.science.compared`` chooses what the
caller's ``reference_basis`` names and computes the GLI-2017 reference values (the equations are
``tables.reference``). Which values exist depends on which inputs are present, never on the
numbers: the value at sea level whenever a pressure or altitude is given. Inputs must be
normalised first. Pure.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from bridge.model import (
    ComparedBasis,
    Derived,
    Manoeuvre,
    ManoeuvreAssessment,
    Quantity,
    Session,
    Sex,
)
from bridge.science import physiology as phys
from bridge.science.compared import (
    DEFAULT_REFERENCE_BASIS,
    Candidates,
    ReferenceBasis,
    at_altitude,
    compare,
    no_hb_adjustment,
    references,
)
from bridge.science.equation_sets import DEFAULT_SPIROMETRY_SET, SpirometrySet
from bridge.science.lung_volume_derive import derive_lung_volumes
from bridge.science.quality import (
    DEFAULT_REPEATABILITY,
    Grade,
    ManoeuvreFacts,
    Selection,
    grade_manoeuvres,
    select_reported,
)
from bridge.science.spirometry_derive import derive_spirometry
from bridge.science.table_values import Tables

DeadSpaceSource = Literal["stated", "estimated", "unknown"]
DLCO_UNIT = "mL/min/mm[Hg]"
KCO_UNIT = "mL/min/mm[Hg]/L"
# Room temperature assumed for ATPD gas when the export does not say.  # common practice
DEFAULT_ROOM_TEMPERATURE_C = 23.0


@dataclass(frozen=True, slots=True)
class GasConditions:
    """The ambient conditions the equations need, and whether they were assumed."""

    pb_mmhg: float
    pb_assumed: bool
    room_temperature_c: float
    temperature_assumed: bool


def age_in_years(session: Session) -> float:
    """Age on the day of the test, in decimal years."""
    days = (session.performed_at.date() - session.patient.birth_date).days
    return days / 365.25


def gas_conditions(session: Session) -> GasConditions:
    c = session.conditions
    if c.barometric_pressure is not None:
        pb, pb_assumed = c.barometric_pressure.value, False
    elif c.altitude is not None:
        pb, pb_assumed = phys.barometric_pressure_from_altitude_mmhg(c.altitude.value), True
    else:
        pb, pb_assumed = phys.STANDARD_PB_MMHG, True
    if c.room_temperature is not None:
        return GasConditions(pb, pb_assumed, c.room_temperature.value, False)
    return GasConditions(pb, pb_assumed, DEFAULT_ROOM_TEMPERATURE_C, True)


def derive(
    session: Session,
    tables: Tables,
    *,
    repeatability: str = DEFAULT_REPEATABILITY,
    reference_basis: ReferenceBasis = DEFAULT_REFERENCE_BASIS,
    spirometry_reference: SpirometrySet = DEFAULT_SPIROMETRY_SET,
) -> Derived:
    """Everything recomputable from a normalised session.

    ``repeatability``: the name of the repeatability criterion (mappings/quality_grades.toml);
    ``reference_basis``: which value per cent predicted and the z-scores compare;
    ``spirometry_reference``: the spirometry equations (GLI Global or GLI-2012).
    """
    age = age_in_years(session)
    gas = gas_conditions(session)
    measured = session.results.dlco
    pressure = _pressure_factor(session, gas)
    hb = hb_factor(session, age)
    kco = _kco(session)
    dlco_values = _candidates(measured, hb, pressure)
    kco_values = _candidates(session.results.kco or kco, hb, pressure)
    dlco_from: Quantity | None = None
    va_from: Quantity | None = None
    assessments: tuple[ManoeuvreAssessment, ...] = ()
    selection: Selection | None = None
    not_evaluated: tuple[str, ...] = ()
    if session.manoeuvres:  # without manoeuvres: no grades, nothing selected, no means
        computed = [_recompute(session, m, gas) for m in session.manoeuvres]
        grades = _grades(session, computed, tables, gas)
        assessments = tuple(
            ManoeuvreAssessment(
                index=i,
                va=_q(va, "L", 2) if va is not None else None,
                dlco=_q(dlco, DLCO_UNIT, 2) if dlco is not None else None,
                grade=g.grade,
                grade_reasons=g.reasons,
            )
            for i, ((va, dlco), g) in enumerate(zip(computed, grades, strict=True))
        )
        selection = _selection(computed, grades, tables, repeatability)
        not_evaluated = _not_evaluated(grades, selection.indices)
        dlco_from = _mean_of(computed, selection.indices, 1, DLCO_UNIT)
        va_from = _mean_of(computed, selection.indices, 0, "L")
    compared = compare(
        reference_basis,
        dlco_values,
        kco_values,
        None if hb is not None else no_hb_adjustment(session),
        has_pressure=pressure is not None,
    )
    predicted = session.results.predicted
    lab_basis: ComparedBasis | None = None
    if predicted is not None:
        basis = compared.dlco_basis or compared.kco_basis or "measured"
        lab_basis = at_altitude(basis) if predicted.altitude_adjusted else basis
    gli = references(session, age, tables.reference, compared)
    return Derived(
        age_years=round(age, 2),
        kco=kco,
        dlco_hb_adjusted=dlco_values.hb_adjusted,
        dlco_pressure_adjusted=dlco_values.at_sea_level,
        kco_pressure_adjusted=kco_values.at_sea_level,
        kco_hb_adjusted=kco_values.hb_adjusted,
        dlco_hb_pressure_adjusted=dlco_values.hb_and_sea_level,
        kco_hb_pressure_adjusted=kco_values.hb_and_sea_level,
        dlco_cohb_adjusted=_scaled(measured, _cohb_factor(session)),
        dlco_from_manoeuvres=dlco_from,
        va_from_manoeuvres=va_from,
        manoeuvres=assessments,
        session_grade=selection.session_grade if selection else None,
        reported_manoeuvres=selection.indices if selection else (),
        grade_not_evaluated=not_evaluated,
        repeatable=selection.repeatable if selection else None,
        repeatability_criterion=repeatability if selection else None,
        quality_caution=selection.caution if selection else None,
        dlco_percent_predicted=_percent(dlco_values.value(lab_basis) if lab_basis else None, _pred(session, "dlco")),
        kco_percent_predicted=_percent(kco_values.value(lab_basis) if lab_basis else None, _pred(session, "kco")),
        va_percent_predicted=_percent(session.results.va, _pred(session, "va")),
        dlco_basis=compared.dlco_basis,
        kco_basis=compared.kco_basis,
        lab_basis=lab_basis,
        reference_basis_fallback=compared.fallback,
        reference_dlco=gli.dlco,
        reference_kco=gli.kco,
        reference_va=gli.va,
        reference_not_computed=gli.not_computed,
        spirometry=derive_spirometry(session, age, tables, spirometry_reference),
        lung_volumes=derive_lung_volumes(session, age, tables.lung_volume_equations),
    )


def _candidates(measured: Quantity | None, hb: float | None, pressure: float | None) -> Candidates:
    """The values a result may be compared as: adjusted to sea level whenever there is a pressure factor."""
    both = hb * pressure if hb is not None and pressure is not None else None
    return Candidates(measured, _scaled(measured, pressure), _scaled(measured, hb), _scaled(measured, both))


def _q(value: float, unit: str, decimals: int) -> Quantity | None:
    """The computed value as a quantity; None when it cannot be carried (an infinity or NaN)."""
    if not math.isfinite(value):
        return None
    return Quantity(value=value, unit=unit, decimals=decimals)


def anatomic_dead_space(session: Session, m: Manoeuvre) -> tuple[float, DeadSpaceSource]:
    """The manoeuvre's anatomic dead space in L, and where it comes from.

    ``stated``: the export's; ``estimated``: 2.2 mL per kg of the patient's weight (the export
    omits it); ``unknown``: neither is given, nothing is subtracted (VA comes out too large).
    """
    if m.anatomic_dead_space is not None:
        return m.anatomic_dead_space.value, "stated"
    weight = session.patient.weight
    if weight is not None and weight.value > 0:
        return phys.anatomic_dead_space_estimate_l(weight.value), "estimated"
    return 0.0, "unknown"


def _recompute(session: Session, m: Manoeuvre, gas: GasConditions) -> tuple[float | None, float | None]:
    """(VA BTPS in L, DLCO in mL/min/mmHg) from one manoeuvre's gas data; None where impossible.

    Each guard keeps an equation inside its domain (a divisor above zero, a logarithm of a
    ratio above one); a value that overflows is dropped, not carried.
    """
    if (
        m.inspired_tracer_fraction <= 0
        or m.alveolar_tracer_fraction <= 0
        or gas.pb_mmhg <= phys.PH2O_BODY_MMHG
        or gas.room_temperature_c <= -phys.ZERO_CELSIUS_K
    ):
        return None, None
    vi = m.inspired_volume.value
    if session.method.inspired_volume_condition == "BTPS":
        vi = phys.atpd_from_btps_l(vi, gas.pb_mmhg, gas.room_temperature_c)
    va = phys.alveolar_volume_btps_l(
        vi,
        m.inspired_tracer_fraction,
        m.alveolar_tracer_fraction,
        gas.pb_mmhg,
        gas.room_temperature_c,
        instrument_dead_space_l=m.instrument_dead_space.value if m.instrument_dead_space else 0.0,
        anatomic_dead_space_l=anatomic_dead_space(session, m)[0],
        handling=session.method.sample_gas,
        fa_co2=session.conditions.alveolar_co2_fraction or phys.DEFAULT_ALVEOLAR_CO2_FRACTION,
    )
    fa_co0 = phys.initial_alveolar_co_fraction(
        m.inspired_co_fraction, m.inspired_tracer_fraction, m.alveolar_tracer_fraction
    )
    if not 0 < va < math.inf:
        return None, None
    bht = m.breath_hold_time.value
    if bht <= 0 or m.alveolar_co_fraction <= 0 or not m.alveolar_co_fraction < fa_co0 < math.inf:
        return va, None
    dlco = phys.dlco_single_breath(
        phys.stpd_from_btps_l(va, gas.pb_mmhg), bht, gas.pb_mmhg, fa_co0, m.alveolar_co_fraction
    )
    return va, (dlco if math.isfinite(dlco) else None)


def _grades(
    session: Session, computed: Sequence[tuple[float | None, float | None]], tables: Tables, gas: GasConditions
) -> tuple[Grade, ...]:
    if not session.manoeuvres:
        return ()
    capacities = [m.vital_capacity.value for m in session.manoeuvres if m.vital_capacity]
    # Without a measured VC, VI/VC is not evaluated (an inspired volume standing in for the VC
    # would make VI/VC 100 % by construction).
    largest_vc = max(capacities) if capacities else None
    facts = [
        ManoeuvreFacts(
            inspired_volume_l=_inspired_volume_btps(session, m, gas),
            breath_hold_s=m.breath_hold_time.value,
            sample_collection_s=m.sample_collection_time.value if m.sample_collection_time else None,
            va_l=va,
        )
        for m, (va, _) in zip(session.manoeuvres, computed, strict=True)
    ]
    return grade_manoeuvres(facts, largest_vc, tables.grades)


def _inspired_volume_btps(session: Session, m: Manoeuvre, gas: GasConditions) -> float:
    """VI in the vital capacity's conditions (BTPS), so VI/VC compares like with like.

    An inspired volume measured ATPD (dry spirometer gas at room temperature, the export's
    default) is about 12 % smaller than the same gas in the lung; compared with a BTPS vital
    capacity as it stands it would lower VI/VC and the grade.
    """
    vi = m.inspired_volume.value
    if session.method.inspired_volume_condition == "BTPS":
        return vi
    if gas.pb_mmhg <= phys.PH2O_BODY_MMHG or gas.room_temperature_c <= -phys.ZERO_CELSIUS_K:
        return vi  # no gas-condition factor exists; the equations refuse these conditions too
    return phys.btps_from_atpd_l(vi, gas.pb_mmhg, gas.room_temperature_c)


def _not_evaluated(grades: Sequence[Grade], indices: Sequence[int]) -> tuple[str, ...]:
    """The criteria the session grade does not rest on: the caveats of the manoeuvres it uses."""
    return tuple(dict.fromkeys(c for i in indices for c in grades[i].not_evaluated))


def _selection(
    computed: Sequence[tuple[float | None, float | None]], grades: Sequence[Grade], tables: Tables, criterion: str
) -> Selection:
    usable = [i for i, (_, dlco) in enumerate(computed) if dlco is not None]
    dlcos = [dlco if dlco is not None else 0.0 for _, dlco in computed]
    masked = [g if i in usable else Grade("F", ("no DLCO from gas data",)) for i, g in enumerate(grades)]
    return select_reported(masked, dlcos, tables.grades, criterion)


def _mean_of(
    computed: Sequence[tuple[float | None, float | None]],
    indices: Sequence[int],
    slot: int,
    unit: str,
) -> Quantity | None:
    values = [computed[i][slot] for i in indices]
    present = [v for v in values if v is not None]
    if not present:
        return None
    return _q(math.fsum(present) / len(present), unit, 2)


def _kco(session: Session) -> Quantity | None:
    r = session.results
    if r.dlco is None or r.va is None or r.va.value <= 0:
        return None
    return _q(phys.transfer_coefficient(r.dlco.value, r.va.value), KCO_UNIT, 3)


def hb_factor(session: Session, age: float | None = None) -> float | None:
    """The Cotes factor for this session, or None when Hb or a usable sex is missing.

    ``age``: :func:`age_in_years` of the session when the caller has it already.
    """
    hb = session.conditions.hemoglobin
    if hb is None or hb.value <= 0 or session.patient.sex not in (Sex.MALE, Sex.FEMALE):
        return None
    years = age_in_years(session) if age is None else age
    return phys.hb_adjustment_factor(hb.value, session.patient.sex is Sex.MALE, years)


def _pressure_factor(session: Session, gas: GasConditions) -> float | None:
    if session.conditions.barometric_pressure is None and session.conditions.altitude is None:
        return None
    fio2 = session.conditions.inspired_o2_fraction or phys.FIO2_AIR
    return phys.pressure_adjustment_factor(gas.pb_mmhg, fio2)


def _cohb_factor(session: Session) -> float | None:
    cohb = session.conditions.carboxyhemoglobin
    if cohb is None or not 0 <= cohb.value < phys.COHB_FULL_PERCENT:
        return None
    return phys.cohb_adjustment_factor(cohb.value)


def _scaled(quantity: Quantity | None, factor: float | None) -> Quantity | None:
    if quantity is None or factor is None or not factor > 0:
        return None
    return _q(quantity.value * factor, quantity.unit, max(quantity.decimals or 0, 1))


def _pred(session: Session, name: str) -> Quantity | None:
    predicted = session.results.predicted
    return getattr(predicted, name) if predicted is not None else None


def _percent(measured: Quantity | None, predicted: Quantity | None) -> Quantity | None:
    if measured is None or predicted is None or predicted.value <= 0:
        return None
    return _q(100.0 * measured.value / predicted.value, "%", 0)
