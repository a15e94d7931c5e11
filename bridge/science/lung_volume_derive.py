"""Static lung volumes recomputed from a session: RV/TLC, IC, ERV and the GLI-2021 reference values.

Owns the step from the record's ``lung_volumes`` section to :class:`bridge.model.LungVolumesDerived`:
RV/TLC (100 x RV / TLC), IC (TLC - FRC) and ERV (FRC - RV) from the reported volumes, and each
reported value against the GLI-2021 equations (Hall GL et al., Eur Respir J 2021;57:2000289;
``bridge.science.equation_sets``): predicted, LLN, ULN, z-score, per cent predicted and the
ERS/ATS 2022 severity band, exactly as for spirometry. Canonical units: litres, RV/TLC in per
cent (as GLI-2021 models it). Pure.
"""

from __future__ import annotations

from bridge.lung_volume_record import LUNG_VOLUME_KEYS, LungVolumesDerived
from bridge.model import Quantity, Session
from bridge.science.equation_sets import EquationSet, compare
from bridge.science.equation_sets import Quantity as EquationQuantity
from bridge.science.lms import OutsideRange
from bridge.spirometry_record import SpirometryReference


def derive_lung_volumes(session: Session, age_years: float, equations: EquationSet) -> LungVolumesDerived | None:
    """What the bridge recomputes of the session's lung volumes; None when the session has none."""
    volumes = session.lung_volumes
    if volumes is None:
        return None
    tlc, frc, rv = volumes.tlc, volumes.frc, volumes.rv
    rv_tlc = _q(100.0 * rv.value / tlc.value, "%") if rv is not None and tlc is not None and tlc.value > 0 else None
    ic = _q(tlc.value - frc.value, "L") if tlc is not None and frc is not None else None
    erv = _q(frc.value - rv.value, "L") if frc is not None and rv is not None else None
    references: dict[str, SpirometryReference] = {}
    reasons: list[str] = []
    patient = session.patient
    for key in LUNG_VOLUME_KEYS:
        measured: Quantity | None = getattr(volumes, key)
        quantity = EquationQuantity(key)
        if measured is None or quantity not in equations.info.quantities:
            continue
        lms = equations.lms(quantity, patient.sex, age_years, patient.height.value)
        result = lms if isinstance(lms, OutsideRange) else compare(lms, measured.value)
        if isinstance(result, OutsideRange):
            reasons.append(result.reason if isinstance(lms, OutsideRange) else f"{key}: {result.reason}")
            continue
        unit = "%" if key == "rv_tlc" else "L"
        references[key] = SpirometryReference(
            reference_set=equations.info.title,
            measured=measured,
            predicted=_q(result.predicted, unit),
            lln=_q(result.lln, unit),
            uln=_q(result.uln, unit),
            z_score=round(result.z, 2),
            percent_predicted=Quantity(value=round(result.percent_predicted, 0), unit="%", decimals=0),
            impairment=result.band.value,
            flag=result.flag,
        )
    return LungVolumesDerived(
        reference_set=equations.info.title,
        rv_tlc=rv_tlc,
        ic=ic,
        erv=erv,
        references=references,
        reference_not_computed="; ".join(dict.fromkeys(reasons)) or None,
    )


def _q(value: float, unit: str) -> Quantity:
    decimals = 1 if unit == "%" else 2
    return Quantity(value=round(value, decimals), unit=unit, decimals=decimals)
