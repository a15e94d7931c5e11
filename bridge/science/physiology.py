"""The equations of the single-breath CO test, as pure functions of plain numbers.

Owns: alveolar volume by tracer dilution, DLCO by the classical single-breath equation, KCO,
and the haemoglobin, carboxyhaemoglobin and inspired-PO2 (altitude) adjustments. Units are
in the parameter names (``_l``, ``_mmhg``, ``_s``, ``_g_dl``); DLCO is in mL/min/mmHg (STPD).
Every constant recalled without a verified source is a named constant below marked
``# from memory`` so it can be corrected in one place.

Sources (full references, where each was read and what was not: docs/sources.md):
  S05 -- MacIntyre et al., ATS/ERS standardisation of single-breath DLCO, ERJ 2005;26:720-735
  S17 -- Graham et al., 2017 ERS/ATS standards for single-breath CO uptake, ERJ 2017;49:1600016
  GLI -- Stanojevic et al., GLI reference values for TLCO, ERJ 2017;50:1700010
  KC86 -- Kanner & Crapo, Am Rev Respir Dis 1986;133:676-8
  ANT -- Antoine constants of water, 1-100 degC
"""

from __future__ import annotations

import math

from bridge.model import SampleGasHandling

# source: S05 Table 5 -- water-vapour pressure at 37 degC used in every gas-condition factor.
PH2O_BODY_MMHG = 47.0
# source: S05 Table 5 -- alveolar CO2 fraction assumed when not measured.
DEFAULT_ALVEOLAR_CO2_FRACTION = 0.05
STANDARD_PB_MMHG = 760.0  # source: S05 Table 5 -- the STPD factors PB/760
BODY_TEMPERATURE_K = 310.0  # source: S05 Table 5 -- the BTPS factors 310/(273 + T)
ZERO_CELSIUS_K = 273.0  # source: S05 Table 5 writes 273, not 273.15
MINUTE_ML_PER_L_S = 60_000.0  # 1000 mL/L x 60 s/min

# Anatomic dead space estimated from body weight when it was not measured: 2.2 mL per kg.
# source: GLI-2017 TLCO practical recommendations (Stanojevic et al., ERJ 2017;50:1700010, summary
# table): dead space "measured from the tracer gas washout or estimated using body size". The
# figure 2.2 mL/kg and that it means the body weight as measured (not an ideal weight) are
# from memory: the 2017 DLCO standard's text saying so was not read.  # from memory
ANATOMIC_DEAD_SPACE_ML_PER_KG = 2.2

# Haemoglobin adjustment, Cotes form (DM/(theta*VC) = 0.7): factor (k + Hb) / (1.7 Hb)
COTES_SLOPE = 1.7  # from memory (constants cross-checked: factor is 1 at the standard Hb)
COTES_K_MALE_G_DL = 10.22  # 0.7 x 14.6 g/dL, males >= 15 y  # from memory
COTES_K_FEMALE_CHILD_G_DL = 9.38  # 0.7 x 13.4 g/dL, females and children < 15 y  # from memory
COTES_ADULT_MALE_AGE = 15.0  # from memory

# Inspired-PO2 adjustment of the measured DLCO to sea level: DLCO x (1 + 0.0031 (PIO2 - 150)),
# PIO2 = 0.21 x (PB - 47), attributed to S17 (its text was not read; its reporting table, read,
# requires DLCO adjusted for PB). KC86 (abstract read) gives the alveolar form, 1 + 0.0035 (PAO2 - 120).
PIO2_SLOPE_PER_MMHG = 0.0031  # from memory
PIO2_REFERENCE_MMHG = 150.0  # from memory
FIO2_AIR = 0.21  # from memory (S17's PIO2 = 0.21 x (PB - 47)); 150 mmHg is 0.21 x (760 - 47) rounded

# Carboxyhaemoglobin: reference subjects carry a baseline COHb; S05 adjusts the predicted DLCO
# by (102 % - COHb %), i.e. to a 2 % baseline. The same baseline is the COHb_RAISED threshold.
COHB_BASELINE_PERCENT = 2.0  # source: S05, COHb adjustment "predicted x (102 % - COHb %)"  # from memory
COHB_FULL_PERCENT = 100.0


def initial_alveolar_co_fraction(fi_co: float, fi_tracer: float, fa_tracer: float) -> float:
    """FA,CO,0: inspired CO diluted exactly as the inert tracer (S05, S17)."""
    return fi_co * fa_tracer / fi_tracer


def anatomic_dead_space_estimate_l(weight_kg: float) -> float:
    """VD,anat estimated from body weight: 2.2 mL/kg (83 kg: 0.1826 L)."""
    return ANATOMIC_DEAD_SPACE_ML_PER_KG * weight_kg / 1000.0


def water_vapour_pressure_mmhg(temperature_c: float) -> float:
    """Saturated water-vapour pressure at room temperature (Antoine equation for water).

    # source: ANT -- A=8.07131, B=1730.63, C=233.426 (mmHg, degC, valid 1-100 degC)
    """
    return 10 ** (8.07131 - 1730.63 / (233.426 + temperature_c))


def alveolar_volume_btps_l(
    inspired_volume_l: float,
    fi_tracer: float,
    fa_tracer: float,
    pb_mmhg: float,
    room_temperature_c: float,
    *,
    instrument_dead_space_l: float = 0.0,
    anatomic_dead_space_l: float = 0.0,
    handling: SampleGasHandling = SampleGasHandling.H2O_REMOVED,
    fa_co2: float = DEFAULT_ALVEOLAR_CO2_FRACTION,
) -> float:
    """VA (BTPS) by tracer dilution with the gas-condition factor of S05 Table 5.

    The inspired volume is ATPD (dry spirometer gas at room temperature; S05 Table 5, footnote).
    One branch per row of the table, in the form the table prints; the CO2 correction of the
    alveolar sample (H2O and CO2 removed) is its second row, FI,Tr (1 + FA,CO2) / FS,Tr, with
    FA,CO2 = 0.05 when not measured (the note under that row).
    """
    effective = inspired_volume_l - instrument_dead_space_l - anatomic_dead_space_l
    dilution = fi_tracer / fa_tracer
    warm = BODY_TEMPERATURE_K / (ZERO_CELSIUS_K + room_temperature_c)
    dry_body = pb_mmhg / (pb_mmhg - PH2O_BODY_MMHG)
    if handling is SampleGasHandling.H2O_REMOVED:
        return effective * dilution * dry_body * warm
    if handling is SampleGasHandling.H2O_AND_CO2_REMOVED:
        return effective * dilution * (1 + fa_co2) * dry_body * warm
    if handling is SampleGasHandling.ROOM_EQUILIBRATED:
        wet_room = pb_mmhg - water_vapour_pressure_mmhg(room_temperature_c)
        return effective * dilution * wet_room / (pb_mmhg - PH2O_BODY_MMHG) * warm
    # Heated wet sample line: S05 gives only the STPD form; BTPS follows from the identity.
    stpd = effective * dilution * (pb_mmhg - PH2O_BODY_MMHG) / STANDARD_PB_MMHG
    stpd *= ZERO_CELSIUS_K / (ZERO_CELSIUS_K + room_temperature_c)
    return btps_from_stpd_l(stpd, pb_mmhg)


def stpd_from_btps_l(volume_btps_l: float, pb_mmhg: float) -> float:
    """V_STPD = V_BTPS x (PB - 47)/760 x 273/310 (from the S05 Table 5 factors)."""
    return volume_btps_l * (pb_mmhg - PH2O_BODY_MMHG) / STANDARD_PB_MMHG * ZERO_CELSIUS_K / BODY_TEMPERATURE_K


def btps_from_stpd_l(volume_stpd_l: float, pb_mmhg: float) -> float:
    return volume_stpd_l / stpd_from_btps_l(1.0, pb_mmhg)


def btps_from_atpd_l(volume_atpd_l: float, pb_mmhg: float, room_temperature_c: float) -> float:
    """Dry gas at room temperature to body conditions: x PB/(PB - 47) x 310/(273 + T).

    The BTPS factor of S05 Table 5 (H2O removed from the sample) without the tracer dilution:
    what takes an inspired volume, measured ATPD, to the conditions of a vital capacity.
    """
    warm = BODY_TEMPERATURE_K / (ZERO_CELSIUS_K + room_temperature_c)
    return volume_atpd_l * pb_mmhg / (pb_mmhg - PH2O_BODY_MMHG) * warm


def atpd_from_btps_l(volume_btps_l: float, pb_mmhg: float, room_temperature_c: float) -> float:
    """Dry gas at room temperature and PB from body conditions: x (PB - 47)/PB x (273 + T)/310."""
    dry = (pb_mmhg - PH2O_BODY_MMHG) / pb_mmhg
    return volume_btps_l * dry * (ZERO_CELSIUS_K + room_temperature_c) / BODY_TEMPERATURE_K


def dlco_single_breath(
    va_stpd_l: float,
    breath_hold_s: float,
    pb_mmhg: float,
    fa_co_initial: float,
    fa_co_final: float,
) -> float:
    """Classical single-breath DLCO in mL/min/mmHg (STPD).

    DLCO = VA_STPD x 60000 / (tBH x (PB - 47)) x ln(FA,CO,0 / FA,CO)  # from memory (S05/S17 form)
    """
    return (
        va_stpd_l
        * MINUTE_ML_PER_L_S
        / (breath_hold_s * (pb_mmhg - PH2O_BODY_MMHG))
        * math.log(fa_co_initial / fa_co_final)
    )


def transfer_coefficient(dlco: float, va_btps_l: float) -> float:
    """KCO = DLCO / VA with VA in litres BTPS (Hughes & Pride, ERJ 2001)."""
    return dlco / va_btps_l


def cotes_constant(is_male: bool, age_years: float) -> float:
    """The Cotes constant: males from 15 y use 10.22, females and children 9.38."""
    if is_male and age_years >= COTES_ADULT_MALE_AGE:
        return COTES_K_MALE_G_DL
    return COTES_K_FEMALE_CHILD_G_DL


def hb_adjustment_factor(hb_g_dl: float, is_male: bool, age_years: float) -> float:
    """Multiplier taking a measured DLCO to the standard haemoglobin: (k + Hb) / (1.7 Hb)."""
    return (cotes_constant(is_male, age_years) + hb_g_dl) / (COTES_SLOPE * hb_g_dl)


def inspired_po2_mmhg(pb_mmhg: float, fio2: float = FIO2_AIR) -> float:
    """PIO2 = FIO2 x (PB - 47) (S17: 0.21 x (PB - 47) for air)."""
    return fio2 * (pb_mmhg - PH2O_BODY_MMHG)


def pressure_adjustment_factor(pb_mmhg: float, fio2: float = FIO2_AIR) -> float:
    """Multiplier taking DLCO measured at ``pb_mmhg`` to its sea-level equivalent.

    1 + 0.0031 (PIO2 - 150): below 1 at altitude, where the lower PIO2 raises measured DLCO.
    """
    return 1.0 + PIO2_SLOPE_PER_MMHG * (inspired_po2_mmhg(pb_mmhg, fio2) - PIO2_REFERENCE_MMHG)


def cohb_adjustment_factor(cohb_percent: float, baseline_percent: float = COHB_BASELINE_PERCENT) -> float:
    """Multiplier taking a measured DLCO to the baseline COHb: 100 / (100 + baseline - COHb %).

    The inverse of S05's adjustment of the predicted value, predicted x (102 % - COHb %) / 100
    with the 2 % baseline: 1 at the baseline, above 1 when COHb is raised.
    """
    return COHB_FULL_PERCENT / (COHB_FULL_PERCENT + baseline_percent - cohb_percent)


def barometric_pressure_from_altitude_mmhg(altitude_m: float) -> float:
    """Standard-atmosphere pressure at an altitude (used only when PB was not measured).

    P = 760 x (1 - 2.25577e-5 h)^5.25588  # common practice (ICAO standard atmosphere)
    """
    return float(STANDARD_PB_MMHG * (1.0 - 2.25577e-5 * altitude_m) ** 5.25588)
