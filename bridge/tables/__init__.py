"""The tables in ``mappings/`` as typed values: what every core step receives (pure).

Owns: the :class:`Tables` bundle. Each table's text is parsed by one module here (``units``,
``grades``, ``plausibility``, ``codes``, ``result_status``, through the one TOML error path in
``toml``; the GLI-2017 reference equations by ``bridge.science.reference``); reading the files from disk is
``bridge.tables.files``, the only module of this package that does I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

from bridge.hl7.tables import Hl7Tables
from bridge.science.lab_status import ResultStatusTable
from bridge.science.quality import GradeTable
from bridge.science.reference import ReferenceEquations
from bridge.science.units import UnitCatalogue
from bridge.tables.codes import Code, CodeTable
from bridge.tables.plausibility import Bound, Plausibility

__all__ = ["Bound", "Code", "CodeTable", "Plausibility", "Tables"]


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
