"""Loading the tables in ``mappings/`` from disk (shell).

Owns: finding the mappings folder (the installed copy inside the package, or the source
tree's top-level ``mappings/``) and parsing each table once into :class:`bridge.tables.Tables`;
and reading the GLI-2017 reference tables (``mappings/gli2017/``) into
:class:`bridge.science.reference.ReferenceEquations`.
"""

from __future__ import annotations

from pathlib import Path

from bridge.errors import MappingError
from bridge.science.reference import COEFFICIENTS_TABLE, SPLINES_TABLE, ReferenceEquations
from bridge.science.units import TRADITIONAL_PER_SI
from bridge.tables import CodeTable, Plausibility, Tables
from bridge.tables.grades import grade_table
from bridge.tables.units import unit_catalogue

_PACKAGE_DIR = Path(__file__).resolve().parent.parent  # bridge/


def mappings_dir() -> Path:
    """The folder holding the bundled tables (wheel: bridge/mappings; source tree: mappings/)."""
    for candidate in (_PACKAGE_DIR / "mappings", _PACKAGE_DIR.parent / "mappings"):
        if (candidate / "units.toml").is_file():
            return candidate
    raise MappingError("mappings", str(_PACKAGE_DIR), "a mappings folder with units.toml")


def samples_dir() -> Path:
    """The bundled invented scenario (wheel: bridge/samples; source tree: samples/)."""
    for candidate in (_PACKAGE_DIR / "samples", _PACKAGE_DIR.parent / "samples"):
        if candidate.is_dir():
            return candidate
    raise MappingError("samples", str(_PACKAGE_DIR), "the bundled samples folder")


def _text(folder: Path, name: str) -> str:
    try:
        return (folder / name).read_text(encoding="utf-8")
    except OSError as exc:
        raise MappingError(name, str(folder), f"a readable file ({exc.strerror})") from exc


def load_tables(folder: Path | None = None, traditional_per_si: float = TRADITIONAL_PER_SI) -> Tables:
    """Parse every table the core needs."""
    folder = folder or mappings_dir()
    units = unit_catalogue(_text(folder, "units.toml"), traditional_per_si)
    return Tables(
        units=units,
        grades=grade_table(_text(folder, "quality_grades.toml")),
        plausibility=Plausibility.from_toml(_text(folder, "plausibility.toml"), units),
        codes=CodeTable.from_toml(_text(folder, "codes.toml")),
        reference=load_reference_equations(folder),
    )


def load_reference_equations(folder: Path | None = None) -> ReferenceEquations:
    """Parse the GLI-2017 reference equations from ``gli2017/`` in the mappings folder."""
    folder = folder or mappings_dir()
    return ReferenceEquations.from_text(_text(folder, COEFFICIENTS_TABLE), _text(folder, SPLINES_TABLE))
