"""``mappings/quality_grades.toml`` -> :class:`bridge.science.quality.GradeTable` (pure)."""

from __future__ import annotations

from collections.abc import Mapping

from bridge.errors import MappingError
from bridge.science.quality import GradeRule, GradeTable
from bridge.tables.toml import read_toml


def grade_table(text: str, name: str = "quality_grades.toml") -> GradeTable:
    """The grade rules and the repeatability rule; a broken table is a MappingError."""
    data = read_toml(text, name)
    try:
        rules = tuple(_rule(entry) for entry in data["grade"])
        repeat = data["repeatability"]
        return GradeTable(rules, float(repeat["max_dlco_difference_ml_min_mmhg"]), tuple(repeat["acceptable_grades"]))
    except (KeyError, TypeError, ValueError) as exc:
        raise MappingError(name, "grade table", f"grades and repeatability as documented ({exc})") from exc


def _rule(entry: Mapping[str, object]) -> GradeRule:
    bht = entry.get("breath_hold_s")
    return GradeRule(
        grade=str(entry["grade"]),
        vi_vc_min_percent=float(entry["vi_vc_min_percent"]),  # type: ignore[arg-type]
        sample_collection_max_s=float(entry["sample_collection_max_s"]),  # type: ignore[arg-type]
        breath_hold_s=(float(bht[0]), float(bht[1])) if isinstance(bht, list) else None,
        vi_vc_min_percent_if_va_close=_optional_float(entry.get("vi_vc_min_percent_if_va_close")),
        va_close_ml=float(entry.get("va_close_ml", 0.0)),  # type: ignore[arg-type]
        va_close_percent=float(entry.get("va_close_percent", 0.0)),  # type: ignore[arg-type]
    )


def _optional_float(value: object) -> float | None:
    return float(value) if isinstance(value, int | float) else None
