"""The lung-volume items of a report: one group, each volume with its GLI-2021 reference values (pure).

Owns which static lung volumes are emitted and how: one :class:`ResultGroup` (``lung_volumes``: a
FHIR panel with ``hasMember``, an HL7 OBR of its own), the lab's TLC, FRC, RV, VC, RV/TLC, IC and
ERV with the range (LLN-ULN) and flag of GLI-2021 on the value and the record's method as the
coded method (FHIR ``Observation.method``, HL7 v2 OBX-17; ``[methods]`` of ``mappings/codes.toml``);
the predicted value, per cent predicted and z-score as results computed here (stated absences
when GLI-2021 gives no value for the person, so which results exist never depends on the
numbers). Item keys are ``lv_<quantity>`` (``tlc`` is the DLCO test's single-breath TLC). Codes
come from ``mappings/codes.toml``; ``bridge.emit.observations`` calls :func:`add_lung_volumes`.
"""

from __future__ import annotations

from dataclasses import replace
from types import MappingProxyType

from bridge.emit.content import ResultGroup
from bridge.emit.spirometry_items import Builder, ranged, reference_items
from bridge.lung_volume_record import LUNG_VOLUME_KEYS
from bridge.model import Outcome, Quantity
from bridge.tables import Tables

GROUP = "lung_volumes"
PREFIX = "lv_"
_LABELS = MappingProxyType(
    {"tlc": "TLC", "frc": "FRC", "rv": "RV", "vc": "VC", "rv_tlc": "RV/TLC", "ic": "IC", "erv": "ERV"}
)
_WORDS = "of the lung-volume test"


def add_lung_volumes(b: Builder, outcome: Outcome, tables: Tables) -> None:
    """The items of the lung volumes present, in a group of their own, the method on each measured value."""
    volumes, derived = outcome.session.lung_volumes, outcome.derived.lung_volumes
    if volumes is None or derived is None:
        return
    covered = {str(q) for q in tables.lung_volume_equations.info.quantities}
    method = tables.codes.methods.get(volumes.method) if volumes.method is not None else None
    start = len(b.items)
    for key in LUNG_VOLUME_KEYS:
        value: Quantity | None = getattr(volumes, key)
        if value is None:
            continue
        item_key, label = PREFIX + key, _LABELS[key]
        b.add(item_key, value, path=f"lung_volumes.{key}")
        item = b.items[-1]
        if method is not None:
            item = replace(item, code=replace(item.code, method=method))
        reference = derived.references.get(key)
        if reference is not None:
            item = ranged(b, item, reference, label, _WORDS)
        b.items[-1] = item
        if key in covered:
            reference_items(
                b, item_key, label, _WORDS, reference, derived.reference_set, derived.reference_not_computed
            )
    if len(b.items) > start:
        b.items[start:] = [replace(item, group=GROUP) for item in b.items[start:]]
        b.groups.append(ResultGroup(GROUP, b.codes[GROUP]))
