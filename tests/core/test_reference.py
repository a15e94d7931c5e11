"""GLI-2017 reference values against a published example, the package pyspiro, and their own rules."""

from __future__ import annotations

import csv
import importlib.resources
import math
from collections.abc import Callable
from pathlib import Path

import pytest
from pyspiro import GLI_2017

from bridge.errors import MappingError
from bridge.model import Sex
from bridge.science.reference import (
    COEFFICIENTS_TABLE,
    SPLINES_TABLE,
    UNITS,
    Impairment,
    Lms,
    OutsideRange,
    Parameter,
    ReferenceEquations,
    abnormal_flag,
    impairment,
)
from bridge.science.units import TRADITIONAL_PER_SI
from bridge.tables.files import load_reference_equations, mappings_dir

GLI_DIR = mappings_dir() / "gli2017"
COEFFICIENTS_TEXT = (GLI_DIR / "coefficients.csv").read_text(encoding="utf-8")
SPLINES_TEXT = (GLI_DIR / "splines.csv").read_text(encoding="utf-8")

# A grid over the equations' range: quarter-year ages and ages between the table's rows.
AGES = (5.0, 5.1, 7.63, 11.5, 17.9, 25.0, 33.33, 45.0, 45.1, 60.5, 72.77, 84.99, 85.0)
HEIGHTS = (100.0, 121.3, 150.0, 165.5, 178.0, 192.4, 215.0, 250.0)
MEASURED_FRACTIONS = (0.55, 0.93, 1.27)  # measured values as fractions of the predicted value
SEXES = (Sex.FEMALE, Sex.MALE)
PYSPIRO_PARAMETER = {
    Parameter.TLCO: GLI_2017.Parameters.TLCO.value,
    Parameter.DLCO: GLI_2017.Parameters.DLCO.value,
    Parameter.KCO_SI: GLI_2017.Parameters.KCO_SI.value,
    Parameter.KCO_TRAD: GLI_2017.Parameters.KCO_trad.value,
    Parameter.VA: GLI_2017.Parameters.VA.value,
}
PYSPIRO_SEX = {Sex.FEMALE: 0, Sex.MALE: 1}  # pyspiro: 0 = female, 1 = male
FOUR_DIGITS = 1e-4  # relative tolerance: agreement to 4 significant digits


@pytest.fixture(scope="module")
def gli() -> ReferenceEquations:
    return load_reference_equations()


@pytest.fixture(scope="module")
def pyspiro_gli() -> GLI_2017:
    return GLI_2017()


def _lms(gli: ReferenceEquations, parameter: Parameter, sex: Sex, age: float, height: float) -> Lms:
    found = gli.lms(parameter, sex, age, height)
    assert isinstance(found, Lms), found
    return found


def _number(value: float | OutsideRange) -> float:
    assert isinstance(value, float), value
    return value


# --- published and hand-computed examples ------------------------------------------------------


def test_pft_vignette_man_dlco(gli: ReferenceEquations):
    """Male, 45.0 y, 178 cm: DLCO predicted 30.3, LLN 23.4, ULN 38.3 mL/min/mmHg."""
    lms = _lms(gli, Parameter.DLCO, Sex.MALE, 45.0, 178.0)

    # source: R package pft, vignette "diffusion capacity" (pft_diffusion, GLI 2017, traditional units)
    assert (30.3, 23.4, 38.3) == (round(lms.predicted, 1), round(lms.lln, 1), round(lms.uln, 1))


def test_same_man_kco_and_va_computed(gli: ReferenceEquations):
    """The same man's KCO and VA predicted values and LLNs, computed by hand from the equations."""
    # Computed, not published: the GLI-2017 equations with the coefficients of Stanojevic et al.
    # 2017 (corrected 2020) and pyspiro's spline row at age 45 (kco_trad male Mspline 0.01547999,
    # Sspline -0.04933869; va male Mspline 0.02311227, Sspline -0.01205318):
    #   KCO M = exp(4.088408 - 0.415334 ln 178 - 0.113166 ln 45 + 0.01547999) = 4.5765
    #       S = exp(-1.98186 + 0.01460 ln 45 - 0.04933869) = 0.138675
    #       LLN = M (1 - 1.645 x 0.67330 S)^(1/0.67330) = 3.5725
    #   VA  M = exp(-11.086573 + 2.430021 ln 178 + 0.097047 ln 45 + 0.02311227) = 6.6713
    #       S = exp(-2.20953 + 0.01937 ln 45 - 0.01205318) = 0.116735
    #       LLN = M (1 - 1.645 x 0.62559 S)^(1/0.62559) = 5.4370
    kco = _lms(gli, Parameter.KCO_TRAD, Sex.MALE, 45.0, 178.0)
    va = _lms(gli, Parameter.VA, Sex.MALE, 45.0, 178.0)

    assert (4.576, 3.572) == (round(kco.predicted, 3), round(kco.lln, 3))
    assert (6.671, 5.437) == (round(va.predicted, 3), round(va.lln, 3))


def test_z_score_and_percent_at_the_limits(gli: ReferenceEquations):
    """A value at the LLN has z -1.645, at the ULN +1.645, at the predicted value z 0 and 100 %."""
    lms = _lms(gli, Parameter.DLCO, Sex.FEMALE, 33.33, 165.5)

    # LMS method: z = ((x/M)^L - 1)/(L S) inverts x = M (1 + z L S)^(1/L)
    assert -1.645 == pytest.approx(_number(lms.z_score(lms.lln)), abs=1e-12)
    assert 1.645 == pytest.approx(_number(lms.z_score(lms.uln)), abs=1e-12)
    assert 0.0 == pytest.approx(_number(lms.z_score(lms.predicted)), abs=1e-12)
    assert 100.0 == pytest.approx(_number(lms.percent_predicted(lms.predicted)))


# --- agreement with pyspiro --------------------------------------------------------------------


def test_carried_tables_equal_pyspiro_data_files():
    """The coefficients are pyspiro's exactly, the splines pyspiro's to 8 decimals (rows 5-85 y)."""
    data = importlib.resources.files("pyspiro.data")
    coefficients = list(csv.reader(data.joinpath("gli_2017_coefficients.csv").read_text().splitlines(), delimiter=";"))
    splines = list(csv.DictReader(data.joinpath("gli_2017_splines.csv").read_text().splitlines(), delimiter=";"))
    ours = ReferenceEquations.from_text(COEFFICIENTS_TEXT, SPLINES_TEXT)
    names = {p: GLI_2017.Parameters(v).name for p, v in PYSPIRO_PARAMETER.items()}
    mismatches = []
    for equation in ours.equations:
        column = f"{names[equation.parameter]}_{equation.sex}s"
        index = coefficients[0].index(column)
        theirs = {row[0]: float(row[index]) for row in coefficients[1:]}
        mine = {n: getattr(equation, n) for n in ("a0", "a1", "a2", "p0", "p1", "q0")}
        if mine != theirs:
            mismatches.append((column, mine, theirs))
        rows = [r for r in splines if float(r["age"]) <= 85.0]
        for kind, carried in (("M", equation.m_spline), ("S", equation.s_spline)):
            published = [float(r[f"{column}_{kind}spline"]) for r in rows]
            worst = max(abs(a - b) for a, b in zip(carried, published, strict=True))
            if worst > 5e-9:
                mismatches.append((column, kind, worst))
        assert {0.0} == {float(r[f"{column}_Lspline"]) for r in splines}  # why Lspline is not carried

    assert [] == mismatches


@pytest.mark.parametrize("sex", SEXES, ids=str)
@pytest.mark.parametrize("parameter", list(Parameter), ids=str)
def test_agrees_with_pyspiro_on_a_grid(gli: ReferenceEquations, pyspiro_gli: GLI_2017, parameter, sex):
    """Predicted, LLN, ULN and z-score agree with pyspiro 1.0.0 to 4 significant digits over ages 5-85 y."""
    mismatches = []
    p, s = PYSPIRO_PARAMETER[parameter], PYSPIRO_SEX[sex]
    for age in AGES:
        for height in HEIGHTS:
            lms = _lms(gli, parameter, sex, age, height)
            theirs_m = float(pyspiro_gli.lms(s, age, height, p, None)[1])
            pairs = [
                ("predicted", lms.predicted, theirs_m),
                ("lln", lms.lln, float(pyspiro_gli.lln(s, age, height, p, None))),
                ("uln", lms.uln, float(pyspiro_gli.uln(s, age, height, p, None))),
            ]
            for fraction in MEASURED_FRACTIONS:
                measured = fraction * theirs_m
                theirs_z = float(pyspiro_gli.zscore(s, age, height, p, measured))
                pairs.append((f"z at {fraction}", _number(lms.z_score(measured)), theirs_z))
            for name, ours, theirs in pairs:
                if not math.isclose(ours, theirs, rel_tol=FOUR_DIGITS, abs_tol=FOUR_DIGITS if "z" in name else 0.0):
                    mismatches.append((age, height, name, ours, theirs))

    assert [] == mismatches


@pytest.mark.parametrize("sex", SEXES, ids=str)
@pytest.mark.parametrize(
    ("traditional", "si"), [(Parameter.DLCO, Parameter.TLCO), (Parameter.KCO_TRAD, Parameter.KCO_SI)], ids=str
)
def test_traditional_over_si_is_2_987_everywhere(gli: ReferenceEquations, traditional, si, sex):
    """Traditional / SI predicted values and LLNs are 2.987 on the whole grid; L is shared, S nearly so."""
    ratios, s_ratios, l_pairs = set(), [], set()
    for age in AGES:
        for height in HEIGHTS:
            trad, metric = _lms(gli, traditional, sex, age, height), _lms(gli, si, sex, age, height)
            ratios.update({round(trad.predicted / metric.predicted, 3), round(trad.lln / metric.lln, 3)})
            s_ratios.append(trad.S / metric.S)
            l_pairs.add((trad.L, metric.L))

    # source: GLI 2017 intercepts: exp(a0 trad - a0 SI) = exp(1.094269) = 2.98700 (DLCO), exp(1.094271) (KCO)
    assert {2.987} == ratios
    assert {TRADITIONAL_PER_SI} == ratios  # the project's default factor (bridge.science.units)
    assert 0.0 == pytest.approx(max(abs(r - 1.0) for r in s_ratios), abs=1e-5)  # KCO's differ in the 6th decimal
    assert {True} == {trad_l == si_l for trad_l, si_l in l_pairs}


# --- inputs the equations do not cover ---------------------------------------------------------


@pytest.mark.parametrize(
    ("sex", "age", "height", "words"),
    [
        (Sex.MALE, 4.99, 110.0, ["age 4.99 y"]),
        (Sex.MALE, 85.01, 170.0, ["age 85.01 y"]),
        (Sex.FEMALE, math.nan, 170.0, ["age nan y"]),
        (Sex.FEMALE, 30.0, 99.9, ["height 99.9 cm"]),
        (Sex.FEMALE, 30.0, 250.1, ["height 250.1 cm"]),
        (Sex.MALE, 30.0, math.inf, ["height inf cm"]),
        (Sex.OTHER, 30.0, 170.0, ["sex other"]),
        (Sex.UNKNOWN, 3.0, 300.0, ["sex unknown", "age 3 y", "height 300 cm"]),
    ],
)
def test_outside_range_gives_the_reason_not_a_number(gli: ReferenceEquations, sex, age, height, words):
    """Age outside 5-85 y, height outside 100-250 cm or sex not female/male: every reason, no number."""
    found = gli.lms(Parameter.DLCO, sex, age, height)

    assert isinstance(found, OutsideRange)
    assert [True] * len(words) == [w in found.reason for w in words]
    assert len(words) == found.reason.count(";") + 1


@pytest.mark.parametrize(("age", "height"), [(5.0, 100.0), (85.0, 250.0), (5.0, 250.0), (85.0, 100.0)])
def test_range_boundaries_are_inside(gli: ReferenceEquations, age, height):
    """5 y, 85 y, 100 cm and 250 cm are inside the range."""
    assert [True] * 10 == [isinstance(gli.lms(p, s, age, height), Lms) for p in Parameter for s in SEXES]


@pytest.mark.parametrize("measured", [0.0, -3.0, math.nan, math.inf])
def test_measured_value_must_be_positive(gli: ReferenceEquations, measured):
    """A measured value that is not a positive number gives a reason, not a z-score or a percentage."""
    lms = _lms(gli, Parameter.VA, Sex.FEMALE, 50.0, 160.0)

    assert [True, True] == [
        isinstance(r, OutsideRange) for r in (lms.z_score(measured), lms.percent_predicted(measured))
    ]


# --- interpretation ----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("z", "band", "flag"),
    [
        (2.0, Impairment.NORMAL, "H"),
        (1.6451, Impairment.NORMAL, "H"),
        (1.645, Impairment.NORMAL, "N"),
        (0.0, Impairment.NORMAL, "N"),
        (-1.645, Impairment.NORMAL, "N"),
        (-1.6451, Impairment.MILD, "L"),
        (-2.5, Impairment.MILD, "L"),
        (-2.5001, Impairment.MODERATE, "L"),
        (-4.0, Impairment.MODERATE, "L"),
        (-4.0001, Impairment.SEVERE, "L"),
        (-9.0, Impairment.SEVERE, "L"),
    ],
)
def test_bands_and_flags_at_their_boundaries(z, band, flag):
    """Bands: normal from -1.645 up, mild to -2.5, moderate to -4, severe below; flag H above +1.645."""
    # from memory: ERS/ATS 2022 interpretive standard (Stanojevic et al., ERJ 2022;60:2101499) severity bands
    # source: HL7 v2 table 0078 and FHIR ObservationInterpretation codes L, N, H
    assert (band, flag) == (impairment(z), abnormal_flag(z))


@pytest.mark.parametrize("z", [math.nan, math.inf, -math.inf])
def test_bands_refuse_a_z_score_that_is_not_a_number(z):
    """impairment() and abnormal_flag() raise on a non-finite z-score (a defect in the caller)."""
    for function in (impairment, abnormal_flag):
        with pytest.raises(ValueError, match="finite"):
            function(z)


# --- the tables ---------------------------------------------------------------------------------


def _line_of(text: str, start: str) -> int:
    return next(n for n, line in enumerate(text.splitlines(), start=1) if line.startswith(start))


def _replace(text: str, old: str, new: str) -> str:
    assert old in text
    return text.replace(old, new, 1)


C, S = COEFFICIENTS_TEXT, SPLINES_TEXT
Mutation = Callable[[], tuple[str, str, str, str]]
BROKEN: dict[str, Mutation] = {
    "coefficients header": lambda: (_replace(C, "p1,q0", "p1,L"), S, COEFFICIENTS_TABLE, "header"),
    "a coefficient not a number": lambda: (
        _replace(C, "-8.129189", "x"),
        S,
        COEFFICIENTS_TABLE,
        f"line {_line_of(C, 'tlco,male')}, column a0",
    ),
    "unknown parameter": lambda: (
        _replace(C, "va,male", "fev1,male"),
        S,
        COEFFICIENTS_TABLE,
        f"line {_line_of(C, 'va,male')}",
    ),
    "unknown sex": lambda: (
        _replace(C, "va,male", "va,other"),
        S,
        COEFFICIENTS_TABLE,
        f"line {_line_of(C, 'va,male')}",
    ),
    "a row twice": lambda: (
        C + C.splitlines()[_line_of(C, "va,male") - 1] + "\n",
        S,
        COEFFICIENTS_TABLE,
        f"line {len(C.splitlines()) + 1}",
    ),
    "a row missing": lambda: (
        "\n".join(line for line in C.splitlines() if not line.startswith("va,female")),
        S,
        COEFFICIENTS_TABLE,
        "rows",
    ),
    "L not positive": lambda: (
        _replace(C, "0.62559", "0"),
        S,
        COEFFICIENTS_TABLE,
        f"line {_line_of(C, 'va,male')}, column q0",
    ),
    "traditional and SI differ beyond a0": lambda: (
        _replace(C, "dlco,male,-7.03492,2.018368", "dlco,male,-7.03492,2.018369"),
        S,
        COEFFICIENTS_TABLE,
        "dlco male a1",
    ),
    "splines header": lambda: (C, _replace(S, "va_male_s", "va_male_l"), SPLINES_TABLE, "header"),
    "a spline not a number": lambda: (
        C,
        _replace(S, "\n5,-0.18090124,", "\n5,nan,"),
        SPLINES_TABLE,
        f"line {_line_of(S, '5,')}, column tlco_female_m",
    ),
    "ages out of order": lambda: (C, _replace(S, "\n5.25,", "\n5.5,"), SPLINES_TABLE, f"line {_line_of(S, '5.25,')}"),
    "rows stop before 85": lambda: (C, S.rsplit("\n85,", 1)[0] + "\n", SPLINES_TABLE, "rows"),
    "LLN undefined": lambda: (C, _replace(S, ",0.25543370,", ",4.0,"), SPLINES_TABLE, "va_female_s at age 5"),
}


@pytest.mark.parametrize("case", list(BROKEN))
def test_malformed_table_raises_mapping_error(case):
    """A broken table raises MappingError naming the table and where in it."""
    coefficients, splines, table, where = BROKEN[case]()

    with pytest.raises(MappingError) as caught:
        ReferenceEquations.from_text(coefficients, splines)

    assert (table, where) == (caught.value.table, caught.value.where)


def test_loader_reads_the_bundled_folder_and_names_a_missing_file(tmp_path: Path):
    """load_reference_equations() parses mappings/gli2017/; a folder without it raises MappingError."""
    loaded = load_reference_equations(mappings_dir())

    assert len(Parameter) * 2 == len(loaded.equations)
    with pytest.raises(MappingError) as caught:
        load_reference_equations(tmp_path)
    assert COEFFICIENTS_TABLE == caught.value.table


def test_every_parameter_has_a_ucum_unit():
    """Each parameter names the UCUM unit of its predicted value."""
    # source: GLI 2017 (Stanojevic et al.), units of TLCO/DLCO, KCO and VA in SI and traditional form
    assert {
        "tlco": "mmol/min/kPa",
        "dlco": "mL/min/mm[Hg]",
        "kco_si": "mmol/min/kPa/L",
        "kco_trad": "mL/min/mm[Hg]/L",
        "va": "L",
    } == {str(p): u for p, u in UNITS.items()}


def test_data_files_are_small_and_name_their_sources():
    """The carried tables stay small, cite the publication and its correction, and carry pyspiro's licence."""
    sizes = {p.name: p.stat().st_size for p in GLI_DIR.iterdir()}
    licence = (GLI_DIR / "LICENSE-pyspiro.txt").read_text(encoding="utf-8")

    assert {"coefficients.csv", "splines.csv", "LICENSE-pyspiro.txt"} == set(sizes)
    assert sum(sizes.values()) < 200_000
    for text in (COEFFICIENTS_TEXT, SPLINES_TEXT):
        header = "\n".join(line for line in text.splitlines() if line.startswith("#"))
        assert [True] * 4 == [w in header for w in ("Eur Respir J 2017;50:1700010", "1750010", "pyspiro", "MIT")]
    assert [True, True] == [w in licence for w in ("MIT License", "Copyright (c) 2024 OnlineArts")]
