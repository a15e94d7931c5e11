"""``mappings/quality_grades.toml`` -> :class:`bridge.science.quality.GradeTable` (pure)."""

from __future__ import annotations

from collections.abc import Mapping

from bridge.errors import MappingError
from bridge.science.quality import DEFAULT_REPEATABILITY, GradeRule, GradeTable, RepeatabilityCriterion
from bridge.tables.toml import read_toml


def grade_table(text: str, name: str = "quality_grades.toml") -> GradeTable:
    """The grade rules and the named repeatability criteria; a broken table is a MappingError."""
    data = read_toml(text, name)
    try:
        rules = tuple(_rule(entry) for entry in data["grade"])
        repeat = data["repeatability"]
        criteria = tuple(_criterion(key, entry) for key, entry in repeat["criteria"].items())
        table = GradeTable(rules, criteria, tuple(repeat["acceptable_grades"]))
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise MappingError(name, "grade table", f"grades and repeatability as documented ({exc})") from exc
    if DEFAULT_REPEATABILITY not in table.criterion_names:
        raise MappingError(name, "repeatability.criteria", f'the default criterion "{DEFAULT_REPEATABILITY}"')
    return table


def _criterion(name: str, entry: Mapping[str, object]) -> RepeatabilityCriterion:
    absolute = float(entry["max_dlco_difference_ml_min_mmhg"])  # type: ignore[arg-type]
    percent = _optional_float(entry.get("max_percent_of_highest"))
    if absolute < 0 or (percent is not None and not 0 < percent < 100):
        raise ValueError(f"criterion {name}: a limit >= 0 mL/min/mmHg and a per cent between 0 and 100")
    return RepeatabilityCriterion(name, str(entry["standard"]), absolute, percent)


def _rule(entry: Mapping[str, object]) -> GradeRule:
    bht = entry.get("breath_hold_s")
    return GradeRule(
        grade=str(entry["grade"]),
        vi_vc_min_percent=float(entry["vi_vc_min_percent"]),  # type: ignore[arg-type]
        sample_collection_below_s=float(entry["sample_collection_below_s"]),  # type: ignore[arg-type]
        breath_hold_s=(float(bht[0]), float(bht[1])) if isinstance(bht, list) else None,
        vi_vc_min_percent_if_va_close=_optional_float(entry.get("vi_vc_min_percent_if_va_close")),
        va_close_ml=float(entry.get("va_close_ml", 0.0)),  # type: ignore[arg-type]
        va_close_percent=float(entry.get("va_close_percent", 0.0)),  # type: ignore[arg-type]
    )


def _optional_float(value: object) -> float | None:
    return float(value) if isinstance(value, int | float) else None
