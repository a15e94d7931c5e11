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
    """A blood value the export carried with the test (Hb, COHb): context for a result, never a result itself.

    The PFT lab did not measure it at the time of the test, so it is not emitted as an
    observation of its own: FHIR carries it as a ``component`` of the result it qualifies,
    HL7 v2 as an NTE after that result's OBX (see :func:`supporting_text`).
    """

    key: str  # "hemoglobin" or "carboxyhemoglobin"
    code: Code
    quantity: Quantity


@dataclass(frozen=True, slots=True)
class ResultItem:
    """One quantity to emit, in the destination's units."""

    key: str  # stable key, e.g. "dlco"; also part of the observation identifier
    code: Code
    quantity: Quantity
    low: Quantity | None = None  # lower limit of normal, same unit
    flag: Flag | None = None
    high: Quantity | None = None  # upper limit of normal (GLI-2017 only), same unit
    range_text: str | None = None  # what the range is and which reference set it comes from
    # The lab's own lower limit from another reference set, kept beside the GLI-2017 range: (LLN, text).
    other_ranges: tuple[tuple[Quantity, str], ...] = ()
    derived_from: tuple[str, ...] = ()
    computed_here: bool = False  # True: recomputed by the bridge, not reported by the lab
    notes: tuple[str, ...] = ()
    supporting: tuple[Supporting, ...] = ()  # blood values that qualify this result (not results)
    # True: an ERROR finding the site allowed through (``allow``) concerns this value or one it
    # was derived from; the emitters then send it as preliminary, never as final.
    questionable: bool = False


@dataclass(frozen=True, slots=True)
class ReportContent:
    """Everything an emitter renders for one outcome."""

    items: tuple[ResultItem, ...]
    notes: tuple[str, ...] = field(default=())

    @property
    def questionable(self) -> bool:
        """Whether any item carries an allowed ERROR finding (the report is then not final)."""
        return any(item.questionable for item in self.items)
