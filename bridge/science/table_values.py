"""The table value types every core step receives: the :class:`Tables` bundle (pure).

Owns: :class:`Tables` and the value types of the tables that carry no science of their own
(:class:`CodeTable` and its :class:`Code`, :class:`Plausibility` and its :class:`Bound`). The
tables with science of their own keep their types beside it (``units``, ``quality``,
``reference``, ``lab_status``). Parsing the text of ``mappings/`` into these values is the job of
``bridge.tables``, the layer above science; this module is here so that science's rules can take
the bundle without importing the parsers.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

from bridge.hl7.tables import Hl7Tables
from bridge.science.equation_sets import EquationSet, EquationSetName
from bridge.science.lab_status import ResultStatusTable
from bridge.science.quality import GradeTable
from bridge.science.reference import ReferenceEquations
from bridge.science.spirometry import SpirometryRules
from bridge.science.units import UnitCatalogue


@dataclass(frozen=True, slots=True)
class Code:
    """One coded concept: ``system`` is "loinc", "snomed" or "local" (resolved per destination).

    ``standard``: the same concept in a published system, sent beside a local code; ``method``:
    the technique of the measurement.
    """

    system: str
    code: str
    display: str
    standard: Code | None = None
    method: Code | None = None


@dataclass(frozen=True, slots=True)
class CodeTable:
    """Observation codes per quantity key, the panel code and the URI of each published code system.

    ``systems`` has no "local" entry: the site's settings name the system of local codes
    (``emit.local_code_system``, else under ``emit.system_base``).
    """

    codes: Mapping[str, Code]
    panel: Code
    systems: Mapping[str, str]
    methods: Mapping[str, Code] = field(default_factory=lambda: MappingProxyType({}))  # by name ([methods])


@dataclass(frozen=True, slots=True)
class Bound:
    low: float
    high: float
    unit: str


@dataclass(frozen=True, slots=True)
class Plausibility:
    """The bounds outside which a value gets an OUT_OF_RANGE finding, and the unit-mislabel tolerance."""

    bounds: Mapping[str, Bound]
    mislabel_tolerance: float


@dataclass(frozen=True, slots=True)
class Tables:
    """Every code table and rule table the pure core needs, parsed once by the shell."""

    units: UnitCatalogue
    grades: GradeTable
    plausibility: Plausibility
    codes: CodeTable
    reference: ReferenceEquations  # GLI-2017: predicted, LLN, ULN, z-scores of DLCO, KCO and VA
    result_status: ResultStatusTable  # HL7 table 0085: what the lab's status of a value does
    hl7: Hl7Tables  # HL7 tables 0001, 0008, 0074, 0103 (mappings/hl7_tables.toml, parsed by bridge.hl7.tables)
    spirometry: SpirometryRules  # the 2019 grades and the spirometry checks' limits (spirometry_grades.toml)
    spirometry_equations: Mapping[EquationSetName, EquationSet]  # GLI Global and GLI-2012
    lung_volume_equations: EquationSet  # GLI-2021 static lung volumes (Hall 2021)
