"""The lung-volume rules: findings from the record's static lung volumes and what was recomputed of them (pure).

Owns the findings of the ``lung_volumes`` section (codes ``LUNG_VOLUMES_*``, listed in
``mappings/finding_codes.toml`` and ``docs/findings.md``): RV above TLC and FRC outside RV-TLC
(``bridge.science.spirometry.lung_volume_problems``), a volume sent in the wrong unit by a factor
of 1000 (``millilitres_as_litres``, the ``[plausible]`` ranges of ``mappings/spirometry_grades.toml``),
the reported RV/TLC unlike 100 x RV / TLC, IC unlike TLC - FRC and ERV unlike FRC - RV
(``bridge.science.lung_volumes``, the allowances in ``[lung_volumes]``), and why no GLI-2021
reference values were computed. Each rule is a :data:`bridge.science.findings.Rule`.
"""

from __future__ import annotations

from collections.abc import Iterator

from bridge.lung_volume_record import LungVolumes
from bridge.model import Derived, Finding, Quantity, Session, Severity
from bridge.science.findings import finding, finding_with_values, message_quantity
from bridge.science.lung_volumes import volume_sum_problems
from bridge.science.normalise import express
from bridge.science.spirometry import Problem, lung_volume_problems
from bridge.science.spirometry_checks import wrong_unit
from bridge.science.table_values import Tables

_VOLUMES = ("tlc", "frc", "rv", "vc", "ic", "erv")  # in litres
_PATH = "lung_volumes"


def _value(volumes: LungVolumes, key: str) -> float | None:
    q: Quantity | None = getattr(volumes, key)
    return None if q is None else q.value


def check_lung_volume_values(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """RV above TLC, FRC below RV or above TLC: volumes nested inside one another cannot be so."""
    volumes = session.lung_volumes
    if volumes is None:
        return
    problems = lung_volume_problems(_value(volumes, "tlc"), _value(volumes, "rv"), _value(volumes, "frc"))
    for problem in problems:
        if problem.problem is Problem.RV_ABOVE_TLC:
            template = "RV {rv} is larger than TLC {tlc}, of which it is a part: one of them is wrong."
        elif problem.problem is Problem.FRC_BELOW_RV:
            template = "FRC {frc} is smaller than RV {rv}, which is a part of it: one of them is wrong."
        else:
            template = "FRC {frc} is larger than TLC {tlc}, of which it is a part: one of them is wrong."
        values = {name: getattr(volumes, name) for name, _ in problem.evidence}
        yield finding_with_values(
            "LUNG_VOLUMES_IMPOSSIBLE", Severity.ERROR, f"{_PATH}.{problem.quantity}", template, **values
        )


def check_lung_volume_units(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """A volume 1000 times off: millilitres labelled litres (above the range), or litres labelled millilitres."""
    volumes = session.lung_volumes
    if volumes is None:
        return
    for key in _VOLUMES:
        value: Quantity | None = getattr(volumes, key)
        if value is not None:
            yield from wrong_unit("LUNG_VOLUMES_UNIT_MISLABEL", f"{_PATH}.{key}", key, value, tables)


def check_lung_volume_ratios(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """The reported RV/TLC against 100 x RV / TLC; IC against TLC - FRC; ERV against FRC - RV."""
    volumes = session.lung_volumes
    if volumes is None:
        return
    tlc, rv = _value(volumes, "tlc"), _value(volumes, "rv")
    rules = tables.spirometry
    if volumes.rv_tlc is not None and tlc is not None and rv is not None:
        reported = express(volumes.rv_tlc, "%", tables.units)
        for problem in lung_volume_problems(tlc, rv, None, reported.value, rules):
            if problem.problem is not Problem.RV_TLC_DIFFERS or problem.likely_value is None:
                continue
            yield finding_with_values(
                "LUNG_VOLUMES_RATIO_MISMATCH",
                Severity.WARNING,
                f"{_PATH}.rv_tlc",
                "The reported RV/TLC {reported} differs from RV/TLC {recomputed} of the reported RV and TLC "
                f"by more than rounding ({rules.rv_tlc_max_difference_percent:g} %): one of the three values "
                "is not what the lab measured.",
                reported=reported,
                recomputed=message_quantity(problem.likely_value, "%", 1),
            )
    sums = volume_sum_problems(tlc, _value(volumes, "frc"), rv, _value(volumes, "ic"), _value(volumes, "erv"), rules)
    for problem in sums:
        if problem.likely_value is None:
            continue
        parts = "TLC - FRC" if problem.problem is Problem.IC_DIFFERS else "FRC - RV"
        yield finding_with_values(
            "LUNG_VOLUMES_SUM_MISMATCH",
            Severity.WARNING,
            f"{_PATH}.{problem.quantity}",
            f"The reported {problem.quantity.upper()} {{reported}} differs from {parts} = {{recomputed}} by more "
            f"than {rules.lung_volume_sum_max_difference_l:g} L: the volumes do not nest as they must; "
            "one of them is not what the lab measured.",
            reported=getattr(volumes, problem.quantity),
            recomputed=message_quantity(problem.likely_value, "L", 2),
        )


def check_lung_volume_reference(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Say why the lung volumes have no GLI-2021 reference values (age outside 5-80 y, sex, height)."""
    volumes = derived.lung_volumes
    if volumes is None or volumes.reference_not_computed is None:
        return
    yield finding(
        "LUNG_VOLUMES_REFERENCE_NOT_COMPUTED",
        Severity.INFO,
        _PATH,
        f"No {volumes.reference_set} reference values for lung volumes: {volumes.reference_not_computed}.",
    )


LUNG_VOLUME_RULES = (
    check_lung_volume_values,
    check_lung_volume_units,
    check_lung_volume_ratios,
    check_lung_volume_reference,
)
