"""Parsing the CSV tables of the spirometry and lung-volume equation sets (``mappings/gli2012/``,
``mappings/gliglobal/``, ``mappings/gli2021/``) into :class:`bridge.science.lms.Curve` objects.

Owns: the layout of ``coefficients.csv`` (one row per quantity and sex), ``splines.csv`` (one
row per quarter year of age; columns ``<quantity>_<sex>_m``, ``_s``, ``_l``; an ``_s`` or ``_l``
column left out is 0 throughout; empty cells end a quantity's table early) and ``groups.csv``
(the ethnic-group terms of GLI-2012). Every defect is a :class:`MappingError` naming the table
and where in it. Pure: the shell reads the files (``bridge.tables.files``) and passes the text.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from types import MappingProxyType

from bridge.errors import MappingError
from bridge.model import Sex
from bridge.science.lms import Curve, Scale, Splines

SEXES = (Sex.FEMALE, Sex.MALE)
SPLINE_STEP_Y = 0.25  # source: GLI look-up tables (Quanjer et al. 2012, online supplement): quarter years
COEFFICIENT_COLUMNS = (
    "quantity",
    "sex",
    "unit",
    "m_intercept",
    "m_height",
    "m_height_scale",
    "m_age",
    "m_age_scale",
    "s_intercept",
    "s_age",
    "s_age_scale",
    "l_intercept",
    "l_ln_age",
)
GROUP_COLUMNS = ("quantity", "sex", "group", "m_offset", "s_offset")

Key = tuple[str, Sex]  # (quantity, sex)


def rows(text: str) -> list[tuple[int, list[str]]]:
    """(line number, cells) of every line that is not blank or a '#' comment."""
    found = []
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if stripped and not stripped.startswith("#"):
            found.append((number, [cell.strip() for cell in stripped.split(",")]))
    return found


def number(table: str, where: str, cell: str) -> float:
    """A finite number, or a MappingError naming where."""
    try:
        value = float(cell)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise MappingError(table, where, f"a finite number, not {cell!r}")
    return value


def _sex(table: str, line: int, cell: str) -> Sex:
    if cell not in SEXES:
        raise MappingError(table, f"line {line}", "sex female or male")
    return Sex(cell)


def _scale(table: str, where: str, cell: str) -> Scale:
    try:
        return Scale(cell)
    except ValueError:
        raise MappingError(table, where, "ln or linear") from None


def _table_rows(table: str, text: str, columns: tuple[str, ...]) -> list[tuple[int, list[str]]]:
    found = rows(text)
    if not found or tuple(found[0][1]) != columns:
        raise MappingError(table, "header", "the columns " + ",".join(columns))
    for line, cells in found[1:]:
        if len(cells) != len(columns):
            raise MappingError(table, f"line {line}", f"{len(columns)} comma-separated cells")
    return found[1:]


@dataclass(frozen=True, slots=True)
class CoefficientRow:
    """One row of coefficients.csv: the unit, the numbers and the scales, by column name."""

    unit: str
    numbers: Mapping[str, float]
    scales: Mapping[str, Scale]

    def curve(self, splines: Splines) -> Curve:
        """The row's equation with its splines."""
        n, s = self.numbers, self.scales
        return Curve(
            n["m_intercept"],
            n["m_height"],
            s["m_height_scale"],
            n["m_age"],
            s["m_age_scale"],
            n["s_intercept"],
            n["s_age"],
            s["s_age_scale"],
            n["l_intercept"],
            n["l_ln_age"],
            splines,
        )


def parse_coefficients(table: str, text: str, quantities: Iterable[str]) -> dict[Key, CoefficientRow]:
    """(quantity, sex) -> its row; every quantity for female and male, once, one unit per quantity."""
    known = tuple(quantities)
    found: dict[Key, CoefficientRow] = {}
    for line, cells in _table_rows(table, text, COEFFICIENT_COLUMNS):
        if cells[0] not in known:
            raise MappingError(table, f"line {line}", "a quantity among " + ", ".join(known))
        key = (cells[0], _sex(table, line, cells[1]))
        if key in found:
            raise MappingError(table, f"line {line}", f"one row for {key[0]} {key[1]}, not two")
        numbers: dict[str, float] = {}
        scales: dict[str, Scale] = {}
        for name, cell in zip(COEFFICIENT_COLUMNS[3:], cells[3:], strict=True):
            where = f"line {line}, column {name}"
            if name.endswith("_scale"):
                scales[name] = _scale(table, where, cell)
            else:
                numbers[name] = number(table, where, cell)
        found[key] = CoefficientRow(cells[2], MappingProxyType(numbers), MappingProxyType(scales))
    missing = [f"{q} {s}" for q in known for s in SEXES if (q, s) not in found]
    if missing:
        raise MappingError(table, "rows", "a row for " + ", ".join(missing))
    for quantity in known:
        if found[(quantity, Sex.FEMALE)].unit != found[(quantity, Sex.MALE)].unit:
            raise MappingError(table, f"{quantity} unit", "the same unit for female and male")
    return found


def parse_splines(table: str, text: str, keys: Iterable[Key]) -> dict[Key, Splines]:
    """(quantity, sex) -> its splines; every key needs an _m column, _s and _l are optional."""
    found_rows = rows(text)
    header = found_rows[0][1] if found_rows else []
    wanted = {f"{q}_{s}_{k}" for q, s in keys for k in ("m", "s", "l")}
    if not header or header[0] != "age" or len(set(header)) != len(header) or not set(header[1:]) <= wanted:
        raise MappingError(table, "header", "age, then <quantity>_<sex>_m/_s/_l columns, each once")
    columns: dict[str, list[float | None]] = {name: [] for name in header}
    first_age = None
    for i, (line, cells) in enumerate(found_rows[1:]):
        if len(cells) != len(header):
            raise MappingError(table, f"line {line}", f"{len(header)} comma-separated cells")
        age = number(table, f"line {line}, column age", cells[0])
        first_age = age if first_age is None else first_age
        if abs(age - (first_age + i * SPLINE_STEP_Y)) > 1e-9:
            raise MappingError(
                table, f"line {line}", f"age {first_age + i * SPLINE_STEP_Y:g} (quarter years, in order)"
            )
        for name, cell in zip(header[1:], cells[1:], strict=True):
            columns[name].append(None if cell == "" else number(table, f"line {line}, column {name}", cell))
    if first_age is None:
        raise MappingError(table, "rows", "one row per quarter year of age")
    return {key: _splines(table, key, columns, first_age) for key in keys}


def _splines(table: str, key: Key, columns: dict[str, list[float | None]], first_age: float) -> Splines:
    prefix = f"{key[0]}_{key[1]}"
    if f"{prefix}_m" not in columns:
        raise MappingError(table, "header", f"a column {prefix}_m")
    m = _filled(table, f"{prefix}_m", columns[f"{prefix}_m"])
    parts = []
    for kind in ("s", "l"):
        cells = columns.get(f"{prefix}_{kind}")
        values = (0.0,) * len(m) if cells is None else _filled(table, f"{prefix}_{kind}", cells)
        if len(values) != len(m):
            raise MappingError(table, f"{prefix}_{kind}", f"as many rows as {prefix}_m")
        parts.append(values)
    return Splines(first_age, SPLINE_STEP_Y, m, parts[0], parts[1])


def _filled(table: str, column: str, cells: list[float | None]) -> tuple[float, ...]:
    """The numbers of a column up to its first empty cell; after that, only empty cells."""
    end = cells.index(None) if None in cells else len(cells)
    if end == 0 or any(cell is not None for cell in cells[end:]):
        raise MappingError(table, column, "numbers from the first row, empty cells only at the end")
    return tuple(cell for cell in cells[:end] if cell is not None)


def parse_groups(
    table: str, text: str, keys: Iterable[Key], groups: Iterable[str]
) -> dict[tuple[str, Sex, str], tuple[float, float]]:
    """(quantity, sex, group) -> (M term, S term); every quantity, sex and group once."""
    known_groups, known_keys = tuple(groups), tuple(keys)
    found: dict[tuple[str, Sex, str], tuple[float, float]] = {}
    for line, cells in _table_rows(table, text, GROUP_COLUMNS):
        sex = _sex(table, line, cells[1])
        if (cells[0], sex) not in known_keys or cells[2] not in known_groups:
            raise MappingError(table, f"line {line}", "a known quantity and a group among " + ", ".join(known_groups))
        key = (cells[0], sex, cells[2])
        if key in found:
            raise MappingError(table, f"line {line}", "one row per quantity, sex and group")
        found[key] = (
            number(table, f"line {line}, column m_offset", cells[3]),
            number(table, f"line {line}, column s_offset", cells[4]),
        )
    missing = [" ".join(map(str, (q, s, g))) for q, s in known_keys for g in known_groups if (q, s, g) not in found]
    if missing:
        raise MappingError(table, "rows", "a row for " + ", ".join(missing))
    return found
