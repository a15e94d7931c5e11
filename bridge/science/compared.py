"""Which DLCO and KCO per cent predicted and the z-scores compare, and their GLI-2017 values (pure).

Owns: the setting ``reference_basis`` (its values and default, written once), choosing among the
values a result may be compared as (measured, adjusted to sea level, to standard Hb, to both)
the one the setting names -- or the measured value, with the reason, when the record cannot
give it -- and the GLI-2017 reference values of DLCO, KCO and VA for what is compared. ``derive``
computes the candidate values; this module only chooses and compares.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Literal

from bridge.model import ComparedBasis, Quantity, ReferenceValue, Session, Sex
from bridge.science.reference import UNITS, Lms, OutsideRange, Parameter, ReferenceEquations, abnormal_flag, impairment

# The name outputs give the reference set of bridge.science.reference (Stanojevic et al., ERJ 2017;50:1700010).
REFERENCE_SET = "GLI-2017"
# Which value per cent predicted and the z-scores of DLCO and KCO compare (the setting
# reference_basis): adjusted to sea level (the default: ERS/ATS 2017 DLCO standard; Stanojevic
# et al. 2017 recommend TLCO adjusted to standard pressure and not for Hb), as measured, or
# adjusted to standard Hb (Cotes) and, where the pressure adjustment applies, to sea level too.
ReferenceBasis = Literal["pressure_adjusted", "measured", "hb_adjusted"]
REFERENCE_BASES: tuple[ReferenceBasis, ...] = ("pressure_adjusted", "measured", "hb_adjusted")
DEFAULT_REFERENCE_BASIS: ReferenceBasis = "pressure_adjusted"
# How people read a compared basis (check, the outputs' notes, findings).
BASIS_WORDS: Mapping[ComparedBasis, str] = MappingProxyType(
    {
        "measured": "measured",
        "pressure_adjusted": "adjusted to sea level",
        "hb_adjusted": "adjusted to standard Hb",
        "hb_and_pressure_adjusted": "adjusted to standard Hb and to sea level",
    }
)


# The key of a value compared on each basis: the Derived field that holds it and the key of the
# result that carries it in the outputs (``dlco`` as measured, ``dlco_pressure_adjusted``, ...).
_SUFFIX: Mapping[ComparedBasis, str] = MappingProxyType(
    {
        "measured": "",
        "pressure_adjusted": "_pressure_adjusted",
        "hb_adjusted": "_hb_adjusted",
        "hb_and_pressure_adjusted": "_hb_pressure_adjusted",
    }
)
# What is left of a basis when the predicted value it is compared with already allows for altitude.
_AT_ALTITUDE: Mapping[ComparedBasis, ComparedBasis] = MappingProxyType(
    {"pressure_adjusted": "measured", "hb_and_pressure_adjusted": "hb_adjusted"}
)


def basis_key(name: str, basis: ComparedBasis) -> str:
    """``dlco`` compared as ``pressure_adjusted`` -> ``dlco_pressure_adjusted`` (see ``_SUFFIX``)."""
    return name + _SUFFIX[basis]


def at_altitude(basis: ComparedBasis) -> ComparedBasis:
    """The basis without the adjustment to sea level: for a lab's predicted value already altitude-adjusted."""
    return _AT_ALTITUDE.get(basis, basis)


@dataclass(frozen=True, slots=True)
class Candidates:
    """The values one result may be compared as (None where that value does not exist or does not apply)."""

    measured: Quantity | None
    at_sea_level: Quantity | None  # whenever a pressure or an altitude is given
    hb_adjusted: Quantity | None  # only with an Hb factor
    hb_and_sea_level: Quantity | None  # only with both

    def value(self, basis: ComparedBasis) -> Quantity | None:
        """The value compared as ``basis``."""
        return {
            "measured": self.measured,
            "pressure_adjusted": self.at_sea_level,
            "hb_adjusted": self.hb_adjusted,
            "hb_and_pressure_adjusted": self.hb_and_sea_level,
        }[basis]


@dataclass(frozen=True, slots=True)
class Compared:
    """The DLCO and KCO that per cent predicted and the z-scores compare, and on what basis."""

    dlco: Quantity | None
    dlco_basis: ComparedBasis | None
    kco: Quantity | None
    kco_basis: ComparedBasis | None
    fallback: str | None  # why the asked adjustment could not be made


def one_basis(asked: ReferenceBasis, has_pressure: bool, no_hb: str | None) -> tuple[ComparedBasis, str | None]:
    """The one basis DLCO and KCO of a record are compared on, and why the asked one could not be had.

    It depends on the setting and on which inputs the record has (a pressure or altitude, an Hb
    factor), never on the values, so DLCO and KCO of one record always share it.
    """
    if asked == "pressure_adjusted":
        return ("pressure_adjusted" if has_pressure else "measured"), None
    if asked == "hb_adjusted":
        if no_hb is not None:
            return "measured", no_hb
        return ("hb_and_pressure_adjusted" if has_pressure else "hb_adjusted"), None
    return "measured", None


def compare(
    basis: ReferenceBasis, dlco: Candidates, kco: Candidates, no_hb: str | None, *, has_pressure: bool
) -> Compared:
    """The DLCO and KCO to compare as ``basis`` asks, both on one basis (:func:`one_basis`).

    ``no_hb``: why there is no Hb factor (None: there is one). With "hb_adjusted" and no factor the
    measured values are compared -- not the sea-level ones: the site asked for a comparison the
    record cannot give, and ``fallback`` says so rather than a silent half-adjustment. Without a
    pressure or altitude the pressure adjustment does not apply, silently.
    """
    chosen, fallback = one_basis(basis, has_pressure, no_hb)
    something = dlco.measured is not None or kco.measured is not None
    return Compared(*_chosen(chosen, dlco), *_chosen(chosen, kco), fallback if something else None)


def _chosen(basis: ComparedBasis, values: Candidates) -> tuple[Quantity | None, ComparedBasis | None]:
    if values.measured is None:
        return None, None
    value = values.value(basis)
    if value is None:  # an adjusted value that cannot be carried (an overflow): the measured one
        return values.measured, "measured"
    return value, basis


def no_hb_adjustment(session: Session) -> str:
    """Why a session has no Hb factor (see ``derive.hb_factor``), as the end of a sentence."""
    if session.conditions.hemoglobin is None:
        return "no haemoglobin was reported"
    if session.patient.sex not in (Sex.MALE, Sex.FEMALE):
        return f"the Hb adjustment depends on sex, and sex is {session.patient.sex.value!r}"
    return "the haemoglobin reported is not a positive number"


@dataclass(frozen=True, slots=True)
class References:
    """The ``reference_*`` fields of :class:`Derived`: GLI-2017 values of DLCO, KCO and VA, or why none."""

    dlco: ReferenceValue | None = None
    kco: ReferenceValue | None = None
    va: ReferenceValue | None = None
    not_computed: str | None = None


def references(session: Session, age: float, equations: ReferenceEquations, compared: Compared) -> References:
    """GLI-2017 values of DLCO, KCO and VA, or why none.

    DLCO and KCO are compared as ``compared`` holds them (the site's reference_basis); VA as measured.
    """
    r = session.results
    va_basis: ComparedBasis | None = "measured" if r.va is not None else None
    wanted = (
        ("dlco", Parameter.DLCO, "DLCO", compared.dlco, compared.dlco_basis),
        ("kco", Parameter.KCO_TRAD, "KCO", compared.kco, compared.kco_basis),
        ("va", Parameter.VA, "VA", r.va, va_basis),
    )
    found_values: dict[str, ReferenceValue] = {}
    reasons: list[str] = []
    for name, parameter, label, value, basis in wanted:
        if value is None or basis is None:
            continue
        lms = equations.lms(parameter, session.patient.sex, age, session.patient.height.value)
        if isinstance(lms, OutsideRange):  # the person is outside the equations: the same reason for each
            reasons.append(lms.reason)
            continue
        found = _reference(parameter, lms, value, basis)
        if isinstance(found, OutsideRange):
            reasons.append(f"{label}: {found.reason}")
        else:
            found_values[name] = found
    not_computed = "; ".join(dict.fromkeys(reasons)) if reasons else None
    return References(**found_values, not_computed=not_computed)


def _reference(
    parameter: Parameter, lms: Lms, compared: Quantity, basis: ComparedBasis
) -> ReferenceValue | OutsideRange:
    z = lms.z_score(compared.value)
    percent = lms.percent_predicted(compared.value)
    if isinstance(z, OutsideRange):
        return z
    if isinstance(percent, OutsideRange):
        return percent
    unit = UNITS[parameter]
    decimals = 1 if parameter is Parameter.DLCO else 2
    return ReferenceValue(
        reference_set=REFERENCE_SET,
        basis=basis,
        compared=compared,
        predicted=Quantity(value=lms.predicted, unit=unit, decimals=decimals),
        lln=Quantity(value=lms.lln, unit=unit, decimals=decimals),
        uln=Quantity(value=lms.uln, unit=unit, decimals=decimals),
        z_score=z,
        percent_predicted=Quantity(value=percent, unit="%", decimals=0),
        impairment=impairment(z).value,
        flag=abnormal_flag(z),
    )
