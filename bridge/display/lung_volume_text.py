"""The lung-volume part of the ``check`` report: each volume against GLI-2021, the method, what was recomputed (pure).

Owns the lines ``bridge.display.check_report`` shows for a session's static lung volumes: the
method (and the lab's own reference set, when the record names one), the values the lab reported
(as sent, when the unit differs), each compared with GLI-2021 (predicted, LLN, ULN, z-score and
band, per cent predicted), and RV/TLC, IC and ERV recomputed from the volumes.
"""

from __future__ import annotations

from collections.abc import Callable
from types import MappingProxyType

from bridge.display.spirometry_text import reference_text
from bridge.lung_volume_record import LUNG_VOLUME_KEYS
from bridge.model import Outcome, Quantity

_LABELS = MappingProxyType(
    {"tlc": "TLC", "frc": "FRC", "rv": "RV", "vc": "VC", "rv_tlc": "RV/TLC", "ic": "IC", "erv": "ERV"}
)
_METHODS = MappingProxyType(
    {
        "plethysmography": "body plethysmography",
        "nitrogen_washout": "nitrogen washout",
        "helium_dilution": "helium dilution",
    }
)
_RECOMPUTED = (("rv_tlc", "RV/TLC recomputed"), ("ic", "IC = TLC - FRC"), ("erv", "ERV = FRC - RV"))


def lung_volume_lines(outcome: Outcome, text: Callable[[Quantity], str], brief: Callable[[Quantity], str]) -> list[str]:
    """The report's lung-volume lines; none when the session has no lung volumes.

    ``text``: a quantity as shown with its value as sent; ``brief``: the quantity alone.
    """
    volumes, derived = outcome.session.lung_volumes, outcome.derived.lung_volumes
    if volumes is None or derived is None:
        return []
    method = _METHODS[volumes.method] if volumes.method is not None else "method not given"
    lab = f"; the lab's report used {volumes.reference_set}" if volumes.reference_set is not None else ""
    lines = [f"  lung volumes ({method}; reference values {derived.reference_set}, computed by dlco-bridge{lab})"]
    for key in LUNG_VOLUME_KEYS:
        value: Quantity | None = getattr(volumes, key)
        if value is None:
            continue
        lines.append(f"    {_LABELS[key]:<32}{text(value)}")
        ref = derived.references.get(key)
        if ref is not None:
            lines.append(f"    {'':<32}{reference_text(ref, brief)}")
    for key, label in _RECOMPUTED:
        recomputed: Quantity | None = getattr(derived, key)
        if recomputed is not None:
            lines.append(f"    {label:<32}{brief(recomputed)}")
    if derived.reference_not_computed is not None:
        lines.append(f"    lung-volume reference values not computed: {derived.reference_not_computed}")
    return lines
