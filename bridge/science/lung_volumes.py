"""Static lung volumes: the sums that must hold between the reported volumes (pure).

Owns: IC against TLC - FRC and ERV against FRC - RV where all three volumes are given, within
the allowance of ``mappings/spirometry_grades.toml`` ``[lung_volumes] max_sum_difference_l``. The
lung volumes are nested: TLC = FRC + IC and FRC = RV + ERV (source: Wanger J et al.,
Standardisation of the measurement of lung volumes, Eur Respir J 2005;26:511-522, the
definitions of the volumes). RV above TLC, FRC outside RV-TLC and RV/TLC recomputed are
``bridge.science.spirometry.lung_volume_problems``; a volume sent in millilitres labelled litres is
``bridge.science.spirometry.millilitres_as_litres``. Plain numbers in litres; no Session. Pure.
"""

from __future__ import annotations

from bridge.science.spirometry import Impossible, Problem, SpirometryRules

# Volumes come to 1 mL and limits are decimal: 1e-9 absorbs binary rounding (as bridge.science.spirometry).
_ROUNDING = 1e-9


def _differs(reported: float, recomputed: float, limit: float) -> bool:
    return abs(reported - recomputed) > limit + _ROUNDING


def volume_sum_problems(
    tlc_l: float | None,
    frc_l: float | None,
    rv_l: float | None,
    ic_l: float | None,
    erv_l: float | None,
    rules: SpirometryRules,
) -> tuple[Impossible, ...]:
    """IC unlike TLC - FRC, ERV unlike FRC - RV (each only where its three volumes are given)."""
    limit = rules.lung_volume_sum_max_difference_l
    found: list[Impossible] = []
    if tlc_l is not None and frc_l is not None and ic_l is not None and _differs(ic_l, tlc_l - frc_l, limit):
        evidence = (("ic", ic_l), ("tlc", tlc_l), ("frc", frc_l), ("tlc_minus_frc", tlc_l - frc_l))
        found.append(Impossible(Problem.IC_DIFFERS, "ic", evidence, tlc_l - frc_l))
    if frc_l is not None and rv_l is not None and erv_l is not None and _differs(erv_l, frc_l - rv_l, limit):
        evidence = (("erv", erv_l), ("frc", frc_l), ("rv", rv_l), ("frc_minus_rv", frc_l - rv_l))
        found.append(Impossible(Problem.ERV_DIFFERS, "erv", evidence, frc_l - rv_l))
    return tuple(found)
