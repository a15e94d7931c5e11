"""Building findings: sentences with quantities, and the comparisons every rule shares (pure).

Owns: the :class:`Finding` constructors the rules in ``consistency`` and ``checks`` use (a
sentence whose numbers are quantities, so ``Finding.text`` can say them in any unit), and the
relative difference and unit-factor tests they compare values with.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator

from bridge.model import Derived, Finding, Quantity, Session, Severity
from bridge.science.table_values import Tables
from bridge.science.unit_text import for_people

Rule = Callable[[Session, Derived, Tables], Iterator[Finding]]
DLCO_UNIT, KCO_UNIT, HB_UNIT, PRESSURE_UNIT = "mL/min/mm[Hg]", "mL/min/mm[Hg]/L", "g/dL", "mm[Hg]"


def finding(code: str, severity: Severity, path: str, message: str) -> Finding:
    return Finding(code=code, severity=severity, path=path, message=message)


def finding_with_values(code: str, severity: Severity, path: str, template: str, **values: Quantity) -> Finding:
    """A finding whose sentence carries quantities: ``{name}`` places in ``template``, one per value.

    ``message`` says them in the canonical units, spelt as people read them (``mL/min/mmHg``: it is
    what a refusal line and the audit's report show); ``Finding.text`` in any other (see bridge.model).
    """
    message = template.format_map({name: f"{q.text()} {for_people(q.unit)}" for name, q in values.items()})
    return Finding(code=code, severity=severity, path=path, message=message, template=template, values=values)


def literal(text: str) -> str:
    """Free text (a path, a unit as the lab wrote it) made safe inside a template."""
    return text.replace("{", "{{").replace("}", "}}")


def message_quantity(value: float, unit: str, decimals: int) -> Quantity:
    """A number of a message as a quantity, with the digits the message shows."""
    return Quantity(value=value, unit=unit, decimals=decimals)


def bound_quantity(value: float, unit: str) -> Quantity:
    """A plausibility bound as written in its table (0.5 keeps one decimal)."""
    return message_quantity(value, unit, len(f"{value:g}".partition(".")[2]))


def relative_difference(a: float, b: float) -> float:
    return abs(a - b) / max(abs(b), 1e-12)


def ratio_of(a: float, b: float) -> float | None:
    """``a / b``; None when there is no finite ratio (a zero divisor, an overflow)."""
    if b == 0:
        return None
    ratio = a / b
    return ratio if math.isfinite(ratio) else None


def near_factor(ratio: float | None, factor: float, tolerance: float) -> bool:
    """True when ``ratio`` is about ``factor`` or ``1/factor``."""
    if ratio is None or ratio <= 0:
        return False
    return abs(abs(math.log(ratio)) - math.log(factor)) <= math.log(1.0 + tolerance)
