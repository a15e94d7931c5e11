"""``mappings/spirometry_grades.toml`` -> :class:`bridge.science.spirometry.SpirometryRules` (pure)."""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType

from bridge.errors import MappingError
from bridge.science.spirometry import GradeRule, SpirometryRules
from bridge.tables.toml import read_toml

NAME = "spirometry_grades.toml"
GRADES = ("A", "B", "C", "D", "E", "U")  # in this order; F is what meets none


def spirometry_rules(text: str, name: str = NAME) -> SpirometryRules:
    """Every limit of the table; a broken table is a MappingError naming what is wrong."""
    data = read_toml(text, name)
    try:
        grades = tuple(_rule(entry) for entry in data["grade"])
        repeat, bdr = data["repeatability"], data["bronchodilator"]
        plausible = {str(k): (float(v[0]), float(v[1])) for k, v in data["plausible"].items()}
        rules = SpirometryRules(
            grades=grades,
            child_max_age_y=float(data["child_max_age_y"]),
            child_percent_of_highest=float(data["child_percent_of_highest"]),
            repeatability_l=float(repeat["max_difference_l"]),
            repeatability_l_child=float(repeat["max_difference_l_child"]),
            bronchodilator_percent_of_predicted=float(bdr["min_change_percent_of_predicted"]),
            ratio_max_difference=float(data["ratio"]["max_difference"]),
            rv_tlc_max_difference_percent=float(data["lung_volumes"]["max_rv_tlc_difference_percent"]),
            lung_volume_sum_max_difference_l=float(data["lung_volumes"]["max_sum_difference_l"]),
            plausible=MappingProxyType(plausible),
        )
    except (KeyError, TypeError, ValueError, IndexError, AttributeError) as exc:
        raise MappingError(
            name, "table", f"grades, repeatability, bronchodilator, ratio, lung_volumes, plausible ({exc})"
        ) from exc
    if tuple(g.grade for g in grades) != GRADES:
        raise MappingError(name, "grade", "the grades " + ", ".join(GRADES) + " in this order")
    if any(not 0.0 <= low < high for low, high in plausible.values()):
        raise MappingError(name, "plausible", "[low, high] with 0 <= low < high")
    return rules


def _rule(entry: Mapping[str, object]) -> GradeRule:
    adult, child = entry.get("max_difference_l"), entry.get("max_difference_l_child")
    return GradeRule(
        grade=str(entry["grade"]),
        min_acceptable=int(entry["min_acceptable"]),  # type: ignore[call-overload]
        min_usable=int(entry.get("min_usable", 0)),  # type: ignore[call-overload]
        max_difference_l=float(adult) if isinstance(adult, int | float) else None,
        max_difference_l_child=float(child) if isinstance(child, int | float) else None,
    )
