"""Loading the tables in ``mappings/`` from disk (shell).

Owns: finding the mappings folder (the installed copy inside the package, or the source
tree's top-level ``mappings/``) and parsing each table once into :class:`bridge.tables.Tables`;
reading the GLI-2017 reference tables (``mappings/gli2017/``) into
:class:`bridge.science.reference.ReferenceEquations`; reading the field maps the settings name;
and the HL7 tables, once per process (``load_hl7_tables``).
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import cache
from pathlib import Path
from types import MappingProxyType
from zoneinfo import ZoneInfo

from bridge.errors import MappingError
from bridge.hl7.tables import NAME as HL7_TABLES
from bridge.hl7.tables import Hl7Tables, hl7_tables
from bridge.science.equation_sets import DEFAULT_LUNG_VOLUMES, SETS, EquationSet, EquationSetName
from bridge.science.reference import COEFFICIENTS_TABLE, SPLINES_TABLE, ReferenceEquations
from bridge.science.spirometry import SpirometryRules
from bridge.science.units import TRADITIONAL_PER_SI
from bridge.tables import Tables
from bridge.tables.codes import code_table
from bridge.tables.field_map_model import FieldMap, MapChoice
from bridge.tables.field_map_parser import field_map
from bridge.tables.finding_codes import TABLE as FINDING_CODES_TABLE
from bridge.tables.finding_codes import FindingCodes
from bridge.tables.grades import grade_table
from bridge.tables.plausibility import plausibility
from bridge.tables.result_status import result_status_table
from bridge.tables.spirometry_grades import NAME as SPIROMETRY_GRADES_TABLE
from bridge.tables.spirometry_grades import spirometry_rules
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
        plausibility=plausibility(_text(folder, "plausibility.toml"), units),
        codes=code_table(_text(folder, "codes.toml")),
        reference=load_reference_equations(folder),
        result_status=result_status_table(_text(folder, "result_status.toml")),
        hl7=load_hl7_tables(folder),
        spirometry=load_spirometry_rules(folder),
        spirometry_equations=MappingProxyType(
            {name: load_equation_set(name, folder) for name in (EquationSetName.GLI_GLOBAL, EquationSetName.GLI_2012)}
        ),
        lung_volume_equations=load_equation_set(DEFAULT_LUNG_VOLUMES, folder),
    )


@cache
def load_hl7_tables(folder: Path | None = None) -> Hl7Tables:
    """HL7 tables 0001, 0008, 0074 and 0103 (``hl7_tables.toml``), parsed once per folder.

    The shell's modules that need a code at start-up (settings, the MLLP transport, the
    stand-in) read it here; the core gets the same value as ``Tables.hl7``.
    """
    return hl7_tables(_text(folder or mappings_dir(), HL7_TABLES), HL7_TABLES)


def load_reference_equations(folder: Path | None = None) -> ReferenceEquations:
    """Parse the GLI-2017 reference equations from ``gli2017/`` in the mappings folder."""
    folder = folder or mappings_dir()
    return ReferenceEquations.from_text(_text(folder, COEFFICIENTS_TABLE), _text(folder, SPLINES_TABLE))


def repeatability_criteria(folder: Path | None = None) -> tuple[str, ...]:
    """The names of the repeatability criteria in ``quality_grades.toml`` (what settings may select)."""
    return grade_table(_text(folder or mappings_dir(), "quality_grades.toml")).criterion_names


def finding_codes(folder: Path | None = None) -> FindingCodes:
    """Every finding code the bridge can report (what the settings ``allow`` and ``blocking`` may name)."""
    return FindingCodes.from_toml(_text(folder or mappings_dir(), FINDING_CODES_TABLE))


def load_field_map(path: Path, tables: Tables) -> FieldMap:
    """One field map file (``mappings/maps/*.toml`` or a site's own), checked; errors name the file."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise MappingError(str(path), "(file)", f"a readable field map ({exc.strerror})") from exc
    return field_map(
        text, str(path), tables.units, ZoneInfo, tables.grades.criterion_names, sex_codes=tables.hl7.sex_of_code
    )


def load_map_choice(default: Path | None, by_pattern: Sequence[tuple[str, Path]], tables: Tables) -> MapChoice:
    """The maps the settings name (``map``, and ``[maps]`` per file pattern), each read once."""
    loaded: dict[Path, FieldMap] = {}

    def read(path: Path) -> FieldMap:
        if path not in loaded:
            loaded[path] = load_field_map(path, tables)
        return loaded[path]

    return MapChoice(
        default=read(default) if default is not None else None,
        by_pattern=tuple((pattern, read(path)) for pattern, path in by_pattern),
    )


def load_equation_set(name: EquationSetName, folder: Path | None = None) -> EquationSet:
    """Parse one spirometry or lung-volume equation set (GLI Global, GLI-2012, GLI-2021) from the mappings folder."""
    folder = folder or mappings_dir()
    info = SETS[name]
    groups = _text(folder, info.groups_table) if info.groups_table else None
    return EquationSet.from_text(
        name, _text(folder, info.coefficients_table), _text(folder, info.splines_table), groups
    )


def load_spirometry_rules(folder: Path | None = None) -> SpirometryRules:
    """Parse ``spirometry_grades.toml``: the 2019 grades, repeatability and the spirometry checks' limits."""
    return spirometry_rules(_text(folder or mappings_dir(), SPIROMETRY_GRADES_TABLE))
