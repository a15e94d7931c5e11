"""What both emitters render for one outcome: the result items and the report's notes (pure).

Owns the shapes :func:`bridge.emit.observations.build_content` fills and the FHIR and HL7 v2
emitters read: :class:`ResultItem` (one quantity to emit, in the destination's units, with
its range, flag, what it was derived from and its notes), :class:`Supporting` (a blood value
that qualifies a result) and :class:`ReportContent`. No logic beyond what a shape says of itself.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from bridge.model import Quantity
from bridge.tables import Code

Flag = Literal["L", "H", "N"]


@dataclass(frozen=True, slots=True)
class Supporting:
    """A blood value the export carried with the test and a result was computed from (the Hb of the Hb adjustment).

    The PFT lab did not measure it at the time of the test and the export gives it no time of
    its own, so it is never a result of its own (a stand-alone blood result timed at the test
    would duplicate the blood lab's result in the chart): FHIR carries it as a contained
    Observation of the result computed from it, named in that result's ``derivedFrom``
    (``#hb``); HL7 v2 as an NTE after that result's OBX (see ``notes.supporting_text``).
    """

    key: str  # "hemoglobin"
    code: Code
    quantity: Quantity
    local_id: str  # the contained resource's id in FHIR ("hb")


@dataclass(frozen=True, slots=True)
class ResultItem:
    """One quantity to emit, in the destination's units."""

    key: str  # stable key, e.g. "dlco"; also part of the observation identifier
    code: Code
    # None: a stated absence (``absent`` says why): the result is sent without a value, as FHIR
    # dataAbsentReason and HL7 OBX-11 X, so the set of results never depends on the numbers.
    quantity: Quantity | None
    # The range and flag sit on the value they describe (the one per cent predicted and the
    # z-score compare), never on another basis of the same quantity.
    low: Quantity | None = None  # lower limit of normal, same unit
    flag: Flag | None = None
    high: Quantity | None = None  # upper limit of normal (GLI-2017 only), same unit
    range_text: str | None = None  # what the range is and which reference set it comes from
    derived_from: tuple[str, ...] = ()
    computed_here: bool = False  # True: recomputed by the bridge, not reported by the lab
    notes: tuple[str, ...] = ()
    supporting: tuple[Supporting, ...] = ()  # blood values this result was computed from (not results)
    absent: str | None = None  # why there is no value (with ``quantity`` None)
    # True: an ERROR finding the site allowed through (``allow``) concerns this value or one it
    # was derived from; the emitters then send it as preliminary, never as final.
    questionable: bool = False
    # The test group the item belongs to (a ResultGroup's key: "spirometry_pre"); None: the DLCO test.
    group: str | None = None


@dataclass(frozen=True, slots=True)
class ResultGroup:
    """One test group of the report besides the DLCO test (a spirometry phase): a FHIR panel, an HL7 OBR."""

    key: str  # "spirometry_pre"; also part of the panel Observation's identifier
    code: Code


@dataclass(frozen=True, slots=True)
class ReportContent:
    """Everything an emitter renders for one outcome."""

    items: tuple[ResultItem, ...]
    notes: tuple[str, ...] = field(default=())
    summary_key: str = "dlco"  # the DLCO result the reference range is on (the report's one-line summary)
    groups: tuple[ResultGroup, ...] = ()  # in order; their items carry ``group``

    @property
    def questionable(self) -> bool:
        """Whether any item carries an allowed ERROR finding (the report is then not final)."""
        return any(item.questionable for item in self.items)
