"""Normalisation: every quantity of a record to its canonical UCUM unit, originals kept.

Owns: the step every reader runs on its parsed tree before the one validation of the
:class:`bridge.model.Session` (:func:`normalise_tree`): quantity fields found by their
:class:`bridge.model.Measure` annotations, unit spellings resolved through the catalogue,
values converted, and what cannot be a value of its field refused (unknown unit, wrong
dimension, negative volume). Idempotent: normalising twice changes nothing.
Also owns :func:`express`, the inverse step emitters use to show a quantity in a chosen unit.
"""

from __future__ import annotations

from dataclasses import is_dataclass
from typing import Any, get_args, get_origin

from pydantic import ValidationError

from bridge.errors import InvalidField, UnitError
from bridge.model import Measure, Quantity, Session, read_as
from bridge.science.unit_text import for_people
from bridge.science.units import UnitCatalogue, UnitDef, decimals_after_conversion
from bridge.values import field_types, measure_of, once_per_type

# A plan entry: field name, and either its Measure, a nested model class, or a tuple of them.
_Step = tuple[str, Measure | type[Any], bool]


def normalise_tree(tree: dict[str, Any], catalogue: UnitCatalogue) -> dict[str, Any]:
    """A parsed record (plain dicts and lists, as a reader builds it) with every quantity in its canonical unit.

    Every reader calls this on its tree before the one validation of the :class:`Session`.
    Each object at a quantity field is read as a :class:`Quantity` and replaced by its fields
    in the canonical unit, original value and unit kept. Anything else (not an object, a
    quantity object with a stray key or a value that is not a number) is left as it is for
    the session's validation to refuse with its usual error. Raises UnitError or InvalidField
    naming the field path. The tree given is not changed: the objects on the way are copied.
    """
    return _normalise_node(tree, Session, catalogue, "")


def _normalise_node(node: dict[str, Any], model: type[Any], units: UnitCatalogue, path: str) -> dict[str, Any]:
    copy = dict(node)
    for name, kind, is_tuple in plan_of(model):
        value = node.get(name)
        if value is None:
            continue
        where = f"{path}.{name}" if path else name
        if isinstance(kind, Measure):
            if type(value) is dict:
                try:  # the model's own reading: the step takes exactly what the model would take
                    quantity = read_as(Quantity, value)
                except ValidationError:
                    continue  # the model's validation names the problem
                copy[name] = canonical_fields(quantity, kind, units, where)
        elif is_tuple:
            if type(value) is list or type(value) is tuple:
                copy[name] = [
                    _normalise_node(item, kind, units, f"{where}[{i}]") if type(item) is dict else item
                    for i, item in enumerate(value)
                ]
        elif type(value) is dict:
            copy[name] = _normalise_node(value, kind, units, where)
    return copy


def canonical_fields(quantity: Quantity, measure: Measure, catalogue: UnitCatalogue, path: str) -> dict[str, Any]:
    """The fields of a quantity in its canonical unit, with the original value and unit (validated by the caller)."""
    unit = checked_unit(quantity.unit, quantity.value, measure, catalogue, path)
    original = quantity.original
    if original is None:
        kept = {"value": quantity.text(), "unit": quantity.unit}
    else:
        kept = {"value": original.value, "unit": original.unit}
    if quantity.unit == measure.canonical_unit and original is not None:  # already normalised
        return {"value": quantity.value, "unit": quantity.unit, "decimals": quantity.decimals, "original": kept}
    value, decimals = in_canonical_unit(quantity.value, quantity.decimals, unit, measure, catalogue)
    return {"value": value, "unit": measure.canonical_unit, "decimals": decimals, "original": kept}


def checked_unit(unit_text: str, value: float, measure: Measure, catalogue: UnitCatalogue, path: str) -> UnitDef:
    """The catalogue entry of a quantity's unit; refuses what cannot be a value of the field.

    Raises UnitError (unknown unit, wrong dimension) or InvalidField (negative where the
    field is unsigned, or beyond the catalogue's limit for the dimension).
    """
    unit = catalogue.resolve(unit_text)
    if unit is None:
        raise UnitError(f"{path}.unit", unit_text, f"is not a known unit for {_dimension(measure)}")
    if unit.dimension != measure.dimension:
        expected = f"is a {unit.dimension.replace('_', ' ')} unit; expected one for {_dimension(measure)}"
        raise UnitError(f"{path}.unit", unit_text, expected)
    if value < 0 and not measure.signed:
        raise InvalidField(f"{path}.value", f"a value >= 0, got {value:g} {unit_text}")
    if not catalogue.within_limits(value, unit):
        # Both numbers in the unit the file used (a pressure in kPa is not compared with 2000 mmHg).
        limit = catalogue.limits[unit.dimension] / unit.factor
        expected = f"a finite value of at most {limit:.4g} {unit_text} in magnitude, got {value:g} {unit_text}"
        raise InvalidField(f"{path}.value", expected)
    return unit


def in_canonical_unit(
    value: float, decimals: int | None, unit: UnitDef, measure: Measure, catalogue: UnitCatalogue
) -> tuple[float, int | None]:
    """Value and reported decimals in the canonical unit (unchanged when only the spelling differs)."""
    if unit.code == measure.canonical_unit:
        return value, decimals
    factor = catalogue.factor_between(unit.code, measure.canonical_unit)
    return value * factor, decimals_after_conversion(decimals, factor)


def express(quantity: Quantity, unit: str, catalogue: UnitCatalogue) -> Quantity:
    """The quantity shown in ``unit``; the lab's own digits when it reported in that unit.

    A value the lab reported in a third unit is converted from what the lab wrote, not from the
    canonical value: each conversion rounds to a step no coarser than its source's (NIST SP 811
    B.7.2), so going through the canonical unit could only add digits the lab never measured
    (1008 hPa -> 756.1 mm[Hg] -> 100.80 kPa; from the lab's value, 100.8 kPa).
    """
    if quantity.unit == unit:
        return quantity
    original = quantity.original
    if original is not None:
        source = catalogue.resolve(original.unit)
        if source is not None and source.code == unit:
            return Quantity(value=float(original.value), unit=unit, decimals=_decimals_in(original.value))
        if source is not None and source.dimension == catalogue.units[unit].dimension:
            factor = catalogue.factor_between(source.code, unit)
            decimals = decimals_after_conversion(_decimals_in(original.value), factor)
            return Quantity(value=float(original.value) * factor, unit=unit, decimals=decimals, original=original)
    factor = catalogue.factor_between(quantity.unit, unit)
    value = quantity.value * factor
    decimals = decimals_after_conversion(quantity.decimals, factor)
    return Quantity(value=value, unit=unit, decimals=decimals, original=original)


def _decimals_in(text: str) -> int:
    _, _, fraction = text.partition(".")
    return len(fraction)


def _dimension(measure: Measure) -> str:
    return measure.dimension.replace("_", " ") + f" (e.g. {for_people(measure.canonical_unit)})"


@once_per_type
def plan_of(cls: type[Any]) -> tuple[_Step, ...]:
    """Which fields of a record type hold quantities or nested records (computed once per class)."""
    steps: list[_Step] = []
    for name, hint in field_types(cls).items():
        measure = measure_of(hint)
        if measure is not None:
            steps.append((name, measure, False))
            continue
        nested, is_tuple = _nested_model(hint)
        if nested is not None:
            steps.append((name, nested, is_tuple))
    return tuple(steps)


def _nested_model(annotation: Any) -> tuple[type[Any] | None, bool]:
    if isinstance(annotation, type) and is_dataclass(annotation):
        return (annotation, False) if annotation is not Quantity else (None, False)
    args = get_args(annotation)
    if get_origin(annotation) is tuple and args:
        inner, _ = _nested_model(args[0])
        return inner, True
    for arg in args:  # Optional[Model]
        inner, is_tuple = _nested_model(arg)
        if inner is not None:
            return inner, is_tuple
    return None, False
