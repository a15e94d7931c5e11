"""Spirometry in the canonical record: what the export carries and what the bridge recomputes (pure).

Owns the optional ``spirometry`` section of a session (ATS/ERS 2019 spirometry standard, Graham et
al., Am J Respir Crit Care Med 2019;200:e70): the values before (``pre``) and after (``post``) a
bronchodilator, each manoeuvre with the lab's acceptability of its FEV1 and FVC, the drug and
dose; the patient's GLI-2012 :class:`Ethnicity`; and :class:`SpirometryDerived`, what
``bridge.science.spirometry_derive`` recomputes (grades, repeatability, FEV1/FVC, reference
values, the bronchodilator response). ``bridge.model`` re-exports the record's types. Imports
only the stdlib, pydantic and ``bridge.values``.
"""

from __future__ import annotations

from dataclasses import field
from enum import StrEnum
from typing import Annotated, Literal

from bridge.values import Measure, Quantity, Text, record

Volume = Annotated[Quantity, Measure("volume", "L")]
Percentage = Annotated[Quantity, Measure("fraction", "%")]
Flow = Annotated[Quantity, Measure("flow", "L/s")]
DrugDose = Annotated[Quantity, Measure("mass", "ug")]


class Ethnicity(StrEnum):
    """The groups of the GLI-2012 spirometry equations (Quanjer et al., Eur Respir J 2012): only GLI-2012 uses one."""

    CAUCASIAN = "caucasian"
    AFRICAN_AMERICAN = "african_american"
    NORTH_EAST_ASIAN = "north_east_asian"
    SOUTH_EAST_ASIAN = "south_east_asian"
    OTHER = "other"


# --- spirometry (ATS/ERS 2019): optional, beside the DLCO test of the same session ---------------

# A manoeuvre's standing for one parameter, as the lab judged it (ATS/ERS 2019): acceptable
# (also usable), usable only, or neither.
ManoeuvreStatus = Literal["acceptable", "usable", "not_usable"]


@record
class SpirometryValues:
    """The values of one set of forced expirations (before or after the bronchodilator), as the lab reports them."""

    fev1: Volume | None = None
    fvc: Volume | None = None
    fev1_fvc: Percentage | None = None  # the ratio as a percentage (75 %), or with unit "1" as a fraction (0.75)
    fef25_75: Flow | None = None
    pef: Flow | None = None


@record
class SpirometryManoeuvre:
    """One forced expiration: its values and the lab's acceptability of its FEV1 and FVC (graded separately)."""

    fev1: Volume | None = None
    fvc: Volume | None = None
    fef25_75: Flow | None = None
    pef: Flow | None = None
    fev1_status: ManoeuvreStatus | None = None  # None: the lab did not say
    fvc_status: ManoeuvreStatus | None = None


@record
class SpirometryPhase:
    """The reported values of one phase (before or after the bronchodilator) and its manoeuvres."""

    results: SpirometryValues = SpirometryValues()
    manoeuvres: tuple[SpirometryManoeuvre, ...] = ()


@record
class Bronchodilator:
    """The bronchodilator given between the two phases."""

    drug: Text
    dose: DrugDose | None = None


@record
class Spirometry:
    """Spirometry of the session: before (``pre``) and after (``post``) a bronchodilator, and the drug given."""

    # The reference set the lab's own report used for spirometry ("GLI-2012"), as the lab names it:
    # carried and shown, never charted (the bridge's reference values are the site's setting).
    reference_set: Text | None = None
    pre: SpirometryPhase | None = None
    post: SpirometryPhase | None = None
    bronchodilator: Bronchodilator | None = None


# --- what the bridge recomputes --------------------------------------------------------------

# The quantities of a phase, by the key every output and finding uses.
SPIROMETRY_KEYS = ("fev1", "fvc", "fev1_fvc", "fef25_75", "pef")


@record
class SpirometryReference:
    """One spirometry value against its reference equations (canonical units; FEV1/FVC in %)."""

    reference_set: Text
    measured: Quantity
    predicted: Quantity
    lln: Quantity
    uln: Quantity
    z_score: float
    percent_predicted: Quantity
    impairment: Literal["normal", "mild", "moderate", "severe"]
    flag: Literal["L", "N", "H"]


@record
class ParameterGrade:
    """The 2019 grade of FEV1 or FVC in one phase, from the lab's acceptability of each manoeuvre."""

    grade: str  # A-F, or U
    acceptable: int
    usable: int  # usable but not acceptable
    difference: Quantity | None = None  # largest minus next largest acceptable value (L)
    repeatable: bool | None = None  # None: fewer than two acceptable values


@record
class PhaseDerived:
    """What the bridge recomputed for one phase (pre or post)."""

    fev1_fvc: Quantity | None = None  # FEV1/FVC recomputed from the reported volumes, in %
    fev1_grade: ParameterGrade | None = None  # None: no manoeuvre with the lab's status
    fvc_grade: ParameterGrade | None = None
    references: dict[str, SpirometryReference] = field(default_factory=dict)  # by key (SPIROMETRY_KEYS)


@record
class BronchodilatorChange:
    """The change of FEV1 or FVC after the bronchodilator, relative to the predicted value (ERS/ATS 2022)."""

    change: Quantity  # post - pre, L
    percent_of_predicted: Quantity  # 100 x change / predicted, %
    significant: bool


@record
class SpirometryDerived:
    """Spirometry recomputed: per phase, the reference set used, and the bronchodilator response."""

    reference_set: Text  # the site's spirometry equations (GLI Global or GLI-2012), by title
    pre: PhaseDerived | None = None
    post: PhaseDerived | None = None
    fev1_response: BronchodilatorChange | None = None
    fvc_response: BronchodilatorChange | None = None
    reference_not_computed: str | None = None  # why there are no reference values, when there are none
