"""The canonical record: one single-breath DLCO test session of one patient.

Owns the shape of the data every reader produces and every emitter consumes. Every quantity
is a :class:`Quantity` (value + unit, with the value and unit it arrived with). Every part is
plain immutable data (:func:`bridge.values.record`: a frozen dataclass with slots), validated once
where it comes in (:func:`bridge.values.read_as`, also the JSON Schema's source) and never again;
steps return new values with ``dataclasses.replace``. Imports only the stdlib and pydantic: no
I/O, no clock.

Each quantity field declares its *dimension* and *canonical unit* with a :class:`Measure`
annotation; ``bridge.science.normalise`` reads these to convert every quantity to the canonical unit.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import field
from enum import StrEnum
from typing import Annotated, Literal

from pydantic import Field

from bridge.lung_volume_record import LungVolumes as LungVolumes
from bridge.lung_volume_record import LungVolumesDerived as LungVolumesDerived
from bridge.spirometry_record import Ethnicity as Ethnicity
from bridge.spirometry_record import Spirometry as Spirometry
from bridge.spirometry_record import SpirometryDerived as SpirometryDerived
from bridge.values import DATE_PATTERN as DATE_PATTERN
from bridge.values import DATE_TIME_PATTERN as DATE_TIME_PATTERN
from bridge.values import Filled as Filled
from bridge.values import IsoDate as IsoDate
from bridge.values import IsoDateTime as IsoDateTime
from bridge.values import Measure as Measure
from bridge.values import Original as Original
from bridge.values import Quantity as Quantity
from bridge.values import Text as Text
from bridge.values import Uri as Uri
from bridge.values import filled_fields as filled_fields
from bridge.values import number_text as number_text
from bridge.values import read_as as read_as
from bridge.values import record as record

# Annotated quantity kinds: the dimension and the unit the core keeps each one in.
# The core computes in traditional units because the equations of the standards are written so.
DiffusingCapacity = Annotated[Quantity, Measure("diffusing_capacity", "mL/min/mm[Hg]")]
TransferCoefficient = Annotated[Quantity, Measure("transfer_coefficient", "mL/min/mm[Hg]/L")]
Volume = Annotated[Quantity, Measure("volume", "L")]
Duration = Annotated[Quantity, Measure("time", "s")]
Pressure = Annotated[Quantity, Measure("pressure", "mm[Hg]")]
Altitude = Annotated[Quantity, Measure("length", "m", signed=True)]
BodyHeight = Annotated[Quantity, Measure("length", "cm")]
BodyWeight = Annotated[Quantity, Measure("mass", "kg")]
Haemoglobin = Annotated[Quantity, Measure("mass_concentration", "g/dL")]
Percentage = Annotated[Quantity, Measure("fraction", "%")]
Temperature = Annotated[Quantity, Measure("temperature", "Cel", signed=True)]

GasFraction = Annotated[float, Field(ge=0.0, le=1.0, allow_inf_nan=False, strict=True)]


class Sex(StrEnum):
    FEMALE = "female"
    MALE = "male"
    OTHER = "other"
    UNKNOWN = "unknown"


@record
class Lab:
    name: Text
    site: Text | None = None


@record
class Patient:
    id: Text
    id_system: Uri
    family: Text | None = None
    given: Text | None = None
    sex: Sex
    birth_date: IsoDate
    height: BodyHeight
    weight: BodyWeight | None = None
    ethnicity: Ethnicity | None = None  # for GLI-2012 only; GLI Global (the default) takes none


class SampleGasHandling(StrEnum):
    """How the analyser treats water vapour and CO2 in the alveolar sample (S05 Table 5)."""

    H2O_REMOVED = "h2o_removed"
    H2O_AND_CO2_REMOVED = "h2o_and_co2_removed"
    ROOM_EQUILIBRATED = "room_equilibrated"
    HEATED_WET = "heated_wet"


@record
class Method:
    """Device-neutral description of how the test was done."""

    analyser: Literal["classical", "rapid"] = "classical"
    tracer_gas: Text | None = None
    sample_gas: SampleGasHandling = SampleGasHandling.H2O_REMOVED
    inspired_volume_condition: Literal["ATPD", "BTPS"] = "ATPD"


@record
class Conditions:
    barometric_pressure: Pressure | None = None
    altitude: Altitude | None = None
    hemoglobin: Haemoglobin | None = None
    carboxyhemoglobin: Percentage | None = None
    room_temperature: Temperature | None = None
    inspired_o2_fraction: GasFraction | None = None
    alveolar_co2_fraction: GasFraction | None = None


@record
class ManoeuvreReport:
    """What the device itself computed for one manoeuvre."""

    dlco: DiffusingCapacity | None = None
    va: Volume | None = None


@record
class Manoeuvre:
    inspired_volume: Volume
    vital_capacity: Volume | None = None
    breath_hold_time: Duration
    sample_collection_time: Duration | None = None
    inspired_co_fraction: GasFraction
    inspired_tracer_fraction: GasFraction
    alveolar_co_fraction: GasFraction
    alveolar_tracer_fraction: GasFraction
    instrument_dead_space: Volume | None = None
    anatomic_dead_space: Volume | None = None
    reported: ManoeuvreReport = ManoeuvreReport()


@record
class ReferenceLimits:
    dlco: DiffusingCapacity | None = None
    kco: TransferCoefficient | None = None
    va: Volume | None = None


@record
class Predicted:
    """Predicted values as the lab reported them, and the reference set they came from."""

    reference_set: Text | None = None
    # True: the lab's predicted values (and limits) are already adjusted to the altitude of the
    # test, so they are compared with the DLCO and KCO as measured there, never with the values
    # adjusted to sea level (the adjustment is not applied twice). False (the default): they are
    # sea-level values, like GLI-2017's.
    altitude_adjusted: bool = False
    dlco: DiffusingCapacity | None = None
    kco: TransferCoefficient | None = None
    va: Volume | None = None
    lower_limits: ReferenceLimits | None = None


@record
class Results:
    dlco: DiffusingCapacity | None = None
    va: Volume | None = None
    kco: TransferCoefficient | None = None
    dlco_hb_adjusted: DiffusingCapacity | None = None
    tlc: Volume | None = None
    predicted: Predicted | None = None


# A path to one value of the record, as findings name it, and an HL7 table 0085 code.
StatusPath = Annotated[str, Field(pattern=r"^[a-z_]+(\[\d+\])?(\.[a-z][a-z0-9_]*(\[\d+\])?)+$")]
StatusCode = Annotated[str, Field(pattern=r"^[A-Z]$")]


@record
class Session:
    """One DLCO test session: the hub every reader produces and every emitter consumes."""

    format: Literal["dlco-result/1"]
    test_id: Annotated[Text, Field(max_length=64)]
    placer_order_number: Annotated[Text, Field(max_length=64)] | None = None  # the requester's order, if exported
    performed_at: IsoDateTime
    lab: Lab
    patient: Patient
    method: Method = Method()
    conditions: Conditions = Conditions()
    manoeuvres: tuple[Manoeuvre, ...] = ()
    results: Results = Results()
    spirometry: Spirometry | None = None
    lung_volumes: LungVolumes | None = None  # static lung volumes (TLC, FRC, RV ...) and their method
    # The lab's own status of single values: an HL7 v2.5.1 table 0085 code (as in OBX-11) by the
    # value's path (``results.dlco``, ``manoeuvres[0].reported.dlco``); a value without one is final.
    # mappings/result_status.toml says what each code does (bridge.science.lab_status).
    lab_status: Annotated[
        dict[StatusPath, StatusCode],
        Field(
            description="The lab's status of single values, by path (results.dlco): a code of HL7 v2.5.1 table 0085 "
            "(OBX-11); a value without one is final. docs/format.md says what each code does.",
            json_schema_extra={"additionalProperties": False},
        ),
    ] = field(default_factory=dict)


class Severity(StrEnum):
    INFO = "info"
    WARNING = "warning"
    ERROR = "error"


@record
class Finding:
    """A data-quality or consistency observation: collected, never raised.

    ``code`` is stable (documented in docs/findings.md), ``path`` points into the record,
    ``message`` is a sentence a person can act on, with its numbers in the canonical units.
    A finding whose sentence carries quantities also keeps them (``values``) and the sentence
    with a ``{name}`` place for each (``template``), so that :meth:`text` can say it in the
    units of whoever reads it (an SI destination gets SI numbers).
    """

    code: str
    severity: Severity
    path: str
    message: str
    template: str | None = None
    values: dict[str, Quantity] = field(default_factory=dict)

    def text(self, show: Callable[[Quantity], str] | None = None) -> str:
        """The message with each quantity written by ``show`` (value and unit); ``message`` without it."""
        if self.template is None or show is None:
            return self.message
        return self.template.format_map({name: show(q) for name, q in self.values.items()})


@record
class ManoeuvreAssessment:
    """What the bridge recomputed for one manoeuvre."""

    index: int
    va: Quantity | None = None
    dlco: Quantity | None = None
    grade: str
    grade_reasons: tuple[str, ...] = ()


# Which value a per cent predicted or z-score compares: the measured one, or adjusted to sea level,
# to standard haemoglobin, or both.
ComparedBasis = Literal["measured", "pressure_adjusted", "hb_adjusted", "hb_and_pressure_adjusted"]


@record
class ReferenceValue:
    """One result compared with a reference set: predicted, limits of normal, z-score, band (canonical units).

    ``compared`` is the value the z-score and per cent predicted rest on: the measured value, or
    the value adjusted as the site's ``reference_basis`` asks, where that adjustment applies
    (``basis`` says which).
    """

    reference_set: Text
    basis: ComparedBasis
    compared: Quantity
    predicted: Quantity
    lln: Quantity
    uln: Quantity
    z_score: float
    percent_predicted: Quantity
    impairment: Literal["normal", "mild", "moderate", "severe"]
    flag: Literal["L", "N", "H"]

    @property
    def band(self) -> str:
        """The band as people read it: the impairment, or "above the ULN" (the bands grade low values only)."""
        return "above the ULN" if self.flag == "H" else self.impairment


@record
class Derived:
    """Values the bridge recomputed from the record, in canonical units."""

    age_years: float
    kco: Quantity | None = None
    dlco_hb_adjusted: Quantity | None = None
    # Adjusted to sea level (PIO2 150 mmHg) whenever a barometric pressure or an altitude is
    # given, whatever the numbers; to standard Hb (Cotes) whenever there is an Hb factor; both
    # when both apply. Each name is the key of the result that carries it (compared.basis_key).
    dlco_pressure_adjusted: Quantity | None = None
    kco_pressure_adjusted: Quantity | None = None
    kco_hb_adjusted: Quantity | None = None
    dlco_hb_pressure_adjusted: Quantity | None = None
    kco_hb_pressure_adjusted: Quantity | None = None
    dlco_cohb_adjusted: Quantity | None = None
    dlco_from_manoeuvres: Quantity | None = None
    va_from_manoeuvres: Quantity | None = None
    manoeuvres: tuple[ManoeuvreAssessment, ...] = ()
    session_grade: str | None = None
    # The one repeatability decision (quality.select_reported): which manoeuvres make the
    # reported value, whether they agree within the standard's limit, and the caution to show.
    reported_manoeuvres: tuple[int, ...] = ()
    repeatable: bool | None = None  # None: fewer than two manoeuvres to compare
    # The criterion ``repeatable`` was decided by (a name in mappings/quality_grades.toml), with manoeuvres.
    repeatability_criterion: str | None = None
    # Criteria the session grade does not rest on (no VC: "VI/VC not evaluated: no vital capacity").
    grade_not_evaluated: tuple[str, ...] = ()
    quality_caution: str | None = None
    # Per cent of the lab's own predicted values, of the DLCO and KCO compared as ``lab_basis`` says.
    dlco_percent_predicted: Quantity | None = None
    kco_percent_predicted: Quantity | None = None
    va_percent_predicted: Quantity | None = None
    # The value per cent predicted and the GLI-2017 z-scores of DLCO and KCO compare (None: no such
    # result); one basis for both (compared.compare).
    dlco_basis: ComparedBasis | None = None
    kco_basis: ComparedBasis | None = None
    # The value the lab's own predicted values compare: the same, but as measured at altitude when
    # the lab's predicted values are already altitude-adjusted (None: no predicted values from the lab).
    lab_basis: ComparedBasis | None = None
    # Why the adjustment the site's reference_basis asks for could not be made (the measured value is compared).
    reference_basis_fallback: str | None = None
    # GLI-2017 reference values of the results (bridge.science.reference); None where there is no
    # result, and all None with ``reference_not_computed`` saying why when the equations do not apply.
    reference_dlco: ReferenceValue | None = None
    reference_kco: ReferenceValue | None = None
    reference_va: ReferenceValue | None = None
    reference_not_computed: str | None = None
    spirometry: SpirometryDerived | None = None  # None: the session has no spirometry
    lung_volumes: LungVolumesDerived | None = None  # None: the session has no lung volumes


# "ndjson" is the audit's hand-over (the resources of one outcome, one per line): a route of the
# pipeline like the others, but not a message a destination or convert sends (OUTPUT_KINDS).
OutputKind = Literal["fhir", "hl7", "ndjson"]
OUTPUT_KINDS: tuple[OutputKind, ...] = ("fhir", "hl7")


@record
class Carried:
    """One resource (FHIR) or OBX segment (HL7 v2) of a payload, as sent: what the ledger keeps of it.

    ``value`` is the value's text exactly as sent, ``status`` the status as sent (FHIR
    ``final``, ``corrected``, ``entered-in-error`` ...; an OBX-11 letter), ``digest`` the
    SHA-256 (hex) of the resource's compact JSON or of the segment's text.
    """

    resource_type: str  # FHIR resource type, or "OBX"
    identifier_system: str
    identifier_value: str
    code_system: str | None = None
    code: str | None = None
    value: str | None = None
    unit: str | None = None
    status: str = ""
    digest: str


@record
class Payload:
    """One message built for one outcome: its kind, units, stable id and bytes.

    What it carries, resource by resource, is read from the bytes when the ledger records it
    (``bridge.emit.manifest.carried``); ``identifiers`` is the one thing the bytes do not say:
    the identifier of the result each OBX of an ORU^R01 carries, in OBX order.
    """

    kind: OutputKind
    units: Literal["si", "traditional"]
    message_id: str  # stable: the same content gives the same id
    content_type: str
    data: bytes
    identifiers: tuple[str, ...] = ()


@record
class Outcome:
    """The result of the pipeline for one input: the record, what was derived and found, the payloads."""

    source: str
    source_sha256: str
    session: Session
    derived: Derived
    findings: tuple[Finding, ...] = ()
    payloads: tuple[Payload, ...] = ()
    correction: bool = False  # the payloads replace a result already sent for this test id
