"""GLI Global, GLI-2012 and GLI-2021 reference values against pyspiro 1.0.0, a hand computation and their own rules."""

from __future__ import annotations

import csv
import importlib.resources
import math
from collections.abc import Iterator
from pathlib import Path

import pytest
from pyspiro import BOWERMAN_2022, GLI_2012, GLI_2021

from bridge.errors import MappingError
from bridge.model import Sex
from bridge.science.equation_sets import (
    DEFAULT_LUNG_VOLUMES,
    DEFAULT_SPIROMETRY,
    SETS,
    Compared,
    EquationSet,
    EquationSetName,
    Group,
    Quantity,
    compare,
)
from bridge.science.lms import Lms, OutsideRange
from bridge.science.reference import Impairment
from bridge.tables.files import load_equation_set, mappings_dir

PYSPIRO_VERSION = "1.0.0"  # the package version every comparison below was written against
SEXES = (Sex.FEMALE, Sex.MALE)
PYSPIRO_SEX = {Sex.FEMALE: 0, Sex.MALE: 1}  # pyspiro: 0 = female, 1 = male
FOUR_DIGITS = 1e-4
TOLERANCE = {"z": FOUR_DIGITS, "%": 0.011}  # absolute, besides 4 digits: z near 0; pyspiro's rounded %
HEIGHTS = (95.0, 121.3, 150.0, 171.1, 192.4, 215.0)
MEASURED_FRACTIONS = (0.55, 0.93, 1.27)
# pyspiro's classes, parameter numbers and group codes for each of our names.
PYSPIRO_CLASS = {
    EquationSetName.GLI_GLOBAL: BOWERMAN_2022,
    EquationSetName.GLI_2012: GLI_2012,
    EquationSetName.GLI_2021: GLI_2021,
}
PYSPIRO_NAME = {
    Quantity.FEV1: "FEV1",
    Quantity.FVC: "FVC",
    Quantity.FEV1_FVC: "FEV1FVC",
    Quantity.FEF25_75: "FEF25_75",
    Quantity.TLC: "TLC",
    Quantity.FRC: "FRC",
    Quantity.RV: "RV",
    Quantity.RV_TLC: "RV_TLC",
    Quantity.ERV: "ERV",
    Quantity.IC: "IC",
    Quantity.VC: "VC",
}
PYSPIRO_GROUP = {
    Group.CAUCASIAN: 1,
    Group.AFRICAN_AMERICAN: 2,
    Group.NORTH_EAST_ASIAN: 3,
    Group.SOUTH_EAST_ASIAN: 4,
    Group.OTHER: 5,
}
# Ages over each set's whole range: its ends, quarter-year rows and ages between the rows.
AGES = {
    EquationSetName.GLI_GLOBAL: (3.0, 3.1, 5.63, 8.0, 11.5, 17.9, 25.0, 33.33, 45.1, 60.5, 72.77, 88.2, 94.99, 95.0),
    EquationSetName.GLI_2012: (3.0, 3.1, 5.63, 8.0, 11.5, 17.9, 25.0, 33.33, 45.1, 60.5, 72.77, 88.2, 94.99, 95.0),
    EquationSetName.GLI_2021: (5.0, 5.1, 7.63, 11.5, 17.9, 25.0, 33.33, 45.1, 60.5, 72.77, 79.99, 80.0),
}


@pytest.fixture(scope="module")
def sets() -> dict[EquationSetName, EquationSet]:
    return {name: load_equation_set(name) for name in EquationSetName}


def _cases(name: EquationSetName) -> Iterator[tuple[Quantity, Sex, Group | None]]:
    groups: tuple[Group | None, ...] = tuple(Group) if SETS[name].takes_group else (None,)
    for quantity in SETS[name].quantities:
        for sex in SEXES:
            for group in groups:
                yield quantity, sex, group


_INSTANCES: dict[EquationSetName, object] = {}


def _instance(name: EquationSetName):
    if name not in _INSTANCES:
        _INSTANCES[name] = PYSPIRO_CLASS[name]()
    return _INSTANCES[name]


@pytest.mark.parametrize("name", list(EquationSetName), ids=str)
def test_agrees_with_pyspiro_over_the_age_range(sets, name):
    """L, M, S, LLN, ULN, z and % agree with pyspiro 1.0.0: every quantity, sex, group and age."""
    # source: pyspiro 1.0.0, classes BOWERMAN_2022 (GLI Global), GLI_2012 and GLI_2021 (volumes)
    mismatches = []
    for quantity, sex, group in _cases(name):
        cls = PYSPIRO_CLASS[name]
        parameter = cls.Parameters[PYSPIRO_NAME[quantity]].value
        theirs_obj = _instance(name)
        extra = () if group is None else (PYSPIRO_GROUP[group],)
        for age in AGES[name]:
            if quantity is Quantity.FEF25_75 and age > 90.0:
                continue  # tabulated to 90 y only; refusal is checked below
            for height in HEIGHTS:
                ours = sets[name].lms(quantity, sex, age, height, group)
                assert isinstance(ours, Lms), (quantity, sex, group, age, height, ours)
                args = (PYSPIRO_SEX[sex], age, height, *extra, parameter)
                l_, m_, s_ = (float(v) for v in theirs_obj.lms(*args, None))
                pairs = [
                    ("L", ours.L, l_),
                    ("predicted", ours.predicted, m_),
                    ("S", ours.S, s_),
                    ("lln", ours.lln, float(theirs_obj.lln(*args, None))),
                    ("uln", ours.uln, float(theirs_obj.uln(*args, None))),
                ]
                for fraction in MEASURED_FRACTIONS:
                    measured = fraction * m_
                    pairs.append(
                        (f"z at {fraction}", ours.z_score(measured), float(theirs_obj.zscore(*args, measured)))
                    )
                    percent = ours.percent_predicted(measured)  # pyspiro rounds it to 2 decimals
                    assert isinstance(percent, float)
                    pairs.append((f"% at {fraction}", round(percent, 2), float(theirs_obj.percent(*args, measured))))
                for what, mine, their in pairs:
                    assert isinstance(mine, float)
                    if not math.isclose(mine, their, rel_tol=FOUR_DIGITS, abs_tol=TOLERANCE.get(what[0], 0.0)):
                        mismatches.append((quantity, sex, group, age, height, what, mine, their))

    assert [] == mismatches


def test_gli_global_man_fev1_computed_by_hand(sets):
    """GLI Global FEV1, male, 40 y (a table row), 175 cm: M, S, LLN worked out from the coefficients."""
    # Computed, not published: Bowerman et al. 2023 coefficients (males FEV1: a0 -11.399108,
    # a1 2.462664, a2 -0.011394, p0 -2.256278, p1 0.080729, q0 1.22703) and the look-up row at 40 y
    # as carried by pyspiro 1.0.0 (Mspline 0.0, Sspline 0.0 are NOT assumed; read below):
    data = importlib.resources.files("pyspiro.data").joinpath("bowerman_2022_splines.csv").read_text()
    row = next(r for r in csv.DictReader(data.splitlines(), delimiter=";") if float(r["age"]) == 40.0)
    m_spline, s_spline = float(row["FEV1_males_Mspline"]), float(row["FEV1_males_Sspline"])
    m = math.exp(-11.399108 + 2.462664 * math.log(175.0) - 0.011394 * math.log(40.0) + m_spline)
    s = math.exp(-2.256278 + 0.080729 * math.log(40.0) + s_spline)
    lln = m * (1.0 - 1.645 * 1.22703 * s) ** (1.0 / 1.22703)
    ours = sets[EquationSetName.GLI_GLOBAL].lms(Quantity.FEV1, Sex.MALE, 40.0, 175.0)

    assert isinstance(ours, Lms)
    assert (m, s, lln) == pytest.approx((ours.predicted, ours.S, ours.lln), rel=1e-12)
    assert 3.5 < m < 4.3  # a plausible FEV1 (L) for this man  # common practice


def test_carried_tables_are_pyspiros_figures(sets):
    """Every coefficient and spline value carried equals pyspiro 1.0.0's data file exactly."""
    data = importlib.resources.files("pyspiro.data")
    sources = {
        EquationSetName.GLI_GLOBAL: "bowerman_2022",
        EquationSetName.GLI_2012: "gli_2012",
        EquationSetName.GLI_2021: "gli_2021",
    }
    mismatches = []
    for name, source in sources.items():
        rows = list(csv.DictReader(data.joinpath(f"{source}_splines.csv").read_text().splitlines(), delimiter=";"))
        for quantity in SETS[name].quantities:
            for sex in SEXES:
                curve = sets[name].curves[(quantity, sex)]
                prefix = f"{PYSPIRO_NAME[quantity]}_{sex}s"
                for kind, carried in (("M", curve.splines.m), ("S", curve.splines.s), ("L", curve.splines.l)):
                    theirs = [float(r[f"{prefix}_{kind}spline"] or 0.0) for r in rows[: len(carried)]]
                    if list(carried) != theirs:
                        mismatches.append((name, prefix, kind))
                    assert all(not r[f"{prefix}_{kind}spline"] for r in rows[len(carried) :])  # nothing left off
    assert [] == mismatches


def test_defaults_and_coverage():
    """GLI Global is the spirometry default (race-neutral), GLI-2021 the lung-volume one; ranges as published."""
    # source: Bhakta NR et al., Race and ethnicity in pulmonary function test interpretation, an official
    # ATS statement, Am J Respir Crit Care Med 2023;207:978-995: race-neutral average equations (GLI Global)
    assert (EquationSetName.GLI_GLOBAL, EquationSetName.GLI_2021) == (DEFAULT_SPIROMETRY, DEFAULT_LUNG_VOLUMES)
    # source: Bowerman 2023 and Quanjer 2012 (3-95 y); Hall 2021 (5-80 y)
    assert [(3.0, 95.0), (3.0, 95.0), (5.0, 80.0)] == [SETS[n].age_range_y for n in EquationSetName]
    assert [False, True, False] == [SETS[n].takes_group for n in EquationSetName]


@pytest.mark.parametrize(
    ("name", "quantity", "sex", "age", "height", "group", "words"),
    [
        (EquationSetName.GLI_GLOBAL, Quantity.FEV1, Sex.MALE, 2.99, 95.0, None, ["age 2.99 y"]),
        (EquationSetName.GLI_GLOBAL, Quantity.FEV1, Sex.MALE, 95.01, 170.0, None, ["age 95.01 y"]),
        (EquationSetName.GLI_GLOBAL, Quantity.FEF25_75, Sex.MALE, 40.0, 170.0, None, ["no equation for fef25_75"]),
        (EquationSetName.GLI_GLOBAL, Quantity.FVC, Sex.OTHER, 40.0, 1.7, None, ["sex other", "height 1.7 cm"]),
        (EquationSetName.GLI_2012, Quantity.FEF25_75, Sex.FEMALE, 90.5, 160.0, Group.OTHER, ["age 90.5 y", "3-90 y"]),
        (EquationSetName.GLI_2012, Quantity.FEV1, Sex.FEMALE, 40.0, 160.0, None, ["needs an ethnic group"]),
        (EquationSetName.GLI_2021, Quantity.TLC, Sex.MALE, 80.5, 170.0, None, ["age 80.5 y"]),
        (EquationSetName.GLI_2021, Quantity.TLC, Sex.UNKNOWN, math.nan, 170.0, None, ["sex unknown", "age nan y"]),
    ],
)
def test_outside_range_gives_every_reason(sets, name, quantity, sex, age, height, group, words):
    """Ages, heights, sexes, quantities and missing groups the equations do not cover give reasons, not numbers."""
    found = sets[name].lms(quantity, sex, age, height, group)

    assert isinstance(found, OutsideRange)
    assert [True] * len(words) == [w in found.reason for w in words]


def test_compare_gives_the_2022_numbers_and_band(sets):
    """A value at the predicted is z 0, 100 % and normal; one at the LLN z -1.645; far below, severe and L."""
    lms = sets[EquationSetName.GLI_2021].lms(Quantity.TLC, Sex.FEMALE, 50.0, 162.0)
    assert isinstance(lms, Lms)
    at_predicted, at_lln, low = (compare(lms, v) for v in (lms.predicted, lms.lln, 0.3 * lms.predicted))

    assert isinstance(at_predicted, Compared) and isinstance(at_lln, Compared) and isinstance(low, Compared)
    assert (0.0, 100.0, Impairment.NORMAL, "N") == (
        pytest.approx(at_predicted.z, abs=1e-12),
        pytest.approx(at_predicted.percent_predicted),
        at_predicted.band,
        at_predicted.flag,
    )
    # LMS method: z = ((x/M)^L - 1)/(L S) inverts x = M (1 - 1.645 L S)^(1/L)
    assert -1.645 == pytest.approx(at_lln.z, abs=1e-12)
    # from memory: ERS/ATS 2022 severity, z below -4 severe
    assert (Impairment.SEVERE, "L") == (low.band, low.flag)
    assert isinstance(compare(lms, 0.0), OutsideRange)


def _text(name: EquationSetName, table: str) -> str:
    return (mappings_dir() / SETS[name].folder / table).read_text(encoding="utf-8")


@pytest.mark.parametrize(
    ("table", "old", "new", "where"),
    [
        ("coefficients.csv", "fev1,male,L,-11.399108", "fev1,male,L,x", "line"),
        ("coefficients.csv", ",0.080729,ln,", ",0.080729,log,", "column s_age_scale"),
        ("coefficients.csv", "fev1_fvc,female,1,", "fev1_fvc,female,%,", "fev1_fvc unit"),
        ("splines.csv", "\n3.25,", "\n3.5,", "line"),
        ("splines.csv", "age,fev1_male_m", "age,fev1_male_x", "header"),
    ],
)
def test_malformed_table_raises_mapping_error(table, old, new, where):
    """A broken table raises MappingError naming the table and where in it."""
    name = EquationSetName.GLI_GLOBAL
    texts = {t: _text(name, t) for t in ("coefficients.csv", "splines.csv")}
    assert old in texts[table]
    texts[table] = texts[table].replace(old, new, 1)

    with pytest.raises(MappingError) as caught:
        EquationSet.from_text(name, texts["coefficients.csv"], texts["splines.csv"])

    assert f"gliglobal/{table}" == caught.value.table
    assert where in caught.value.where


def test_gli_2012_without_groups_table_is_refused(tmp_path: Path):
    """GLI-2012 needs its groups.csv; the loader names the missing file."""
    with pytest.raises(MappingError) as caught:
        EquationSet.from_text(
            EquationSetName.GLI_2012,
            _text(EquationSetName.GLI_2012, "coefficients.csv"),
            _text(EquationSetName.GLI_2012, "splines.csv"),
        )
    assert "gli2012/groups.csv" == caught.value.table
    with pytest.raises(MappingError):
        load_equation_set(EquationSetName.GLI_2012, tmp_path)


@pytest.mark.parametrize("name", list(EquationSetName), ids=str)
def test_data_files_name_their_source_and_licence(name):
    """Each folder cites its publication, carries pyspiro's MIT licence, and stays small."""
    folder = mappings_dir() / SETS[name].folder
    citation = {
        EquationSetName.GLI_GLOBAL: "Am J Respir Crit Care Med 2023;207:768-774",
        EquationSetName.GLI_2012: "Eur Respir J 2012;40:1324-1343",
        EquationSetName.GLI_2021: "Eur Respir J 2021;57:2000289",
    }[name]
    licence = (folder / "LICENSE-pyspiro.txt").read_text(encoding="utf-8")
    tables = [p for p in folder.iterdir() if p.suffix == ".csv"]

    assert sum(p.stat().st_size for p in folder.iterdir()) < 200_000
    assert [True, True] == [w in licence for w in ("MIT License", "Copyright (c) 2024 OnlineArts")]
    for path in tables:
        header = "\n".join(line for line in path.read_text(encoding="utf-8").splitlines() if line.startswith("#"))
        assert [True, True, True] == [
            w in header for w in (citation if path.name != "groups.csv" else "Eur Respir J 2012", "pyspiro", "MIT")
        ]
    assert PYSPIRO_VERSION in licence
