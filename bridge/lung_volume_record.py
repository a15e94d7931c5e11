"""Static lung volumes in the canonical record: what the export carries and what the bridge recomputes (pure).

Owns the optional ``lung_volumes`` section of a session: TLC, FRC, RV, VC, RV/TLC, IC and ERV as
the lab reports them, and the method that measured them (body plethysmography, nitrogen washout,
helium dilution); and :class:`LungVolumesDerived`, what ``bridge.science.lung_volume_derive``
recomputes (RV/TLC, IC and ERV from the volumes; the GLI-2021 reference values of Hall et al.,
Eur Respir J 2021;57:2000289). ``bridge.model`` re-exports the record's types. Imports only the
stdlib, pydantic and ``bridge.values``.
"""

from __future__ import annotations

from dataclasses import field
from typing import Annotated, Literal

from bridge.spirometry_record import SpirometryReference
from bridge.values import Measure, Quantity, Text, record

Volume = Annotated[Quantity, Measure("volume", "L")]
Percentage = Annotated[Quantity, Measure("fraction", "%")]

# How the volumes were measured; FRC (and from it TLC and RV) depends on the method.
LungVolumeMethod = Literal["plethysmography", "nitrogen_washout", "helium_dilution"]
LUNG_VOLUME_METHODS: tuple[LungVolumeMethod, ...] = ("plethysmography", "nitrogen_washout", "helium_dilution")

# The quantities of the section, by the key every output and finding uses.
LUNG_VOLUME_KEYS = ("tlc", "frc", "rv", "vc", "rv_tlc", "ic", "erv")


@record
class LungVolumes:
    """Static lung volumes of the session, as the lab reports them (each optional), and the method."""

    method: LungVolumeMethod | None = None  # None: the lab did not say
    # The reference set the lab's own report used for lung volumes ("ECSC 1993"), as the lab names it:
    # carried and shown, never charted (the bridge's reference values are GLI-2021's).
    reference_set: Text | None = None
    tlc: Volume | None = None
    frc: Volume | None = None
    rv: Volume | None = None
    vc: Volume | None = None  # the slow (relaxed) vital capacity of the lung-volume manoeuvre
    rv_tlc: Percentage | None = None  # per cent (35 %), or with unit "1" as a fraction (0.35)
    ic: Volume | None = None
    erv: Volume | None = None


@record
class LungVolumesDerived:
    """Lung volumes recomputed: the ratios and differences of the reported volumes, and the reference values."""

    reference_set: Text  # GLI-2021, by title
    rv_tlc: Quantity | None = None  # 100 x RV / TLC, %
    ic: Quantity | None = None  # TLC - FRC, L
    erv: Quantity | None = None  # FRC - RV, L
    # By key (LUNG_VOLUME_KEYS): the measured value against GLI-2021 (RV/TLC in per cent).
    references: dict[str, SpirometryReference] = field(default_factory=dict)
    reference_not_computed: str | None = None  # why some or all reference values are missing
