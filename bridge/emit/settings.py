"""The site's identity in every message, with its defaults written once (pure).

Owns: :class:`EmitSettings` (sending and receiving application and facility, the facility id of
each lab, the site's base URL for its own identifier and code systems, how the patient is
referred to, the patient identifier type, the HL7 processing id, the haemoglobin unit, whose
predicted values are charted; the identifier and code systems built from ``system_base``) and
:class:`EmitContext`, what an emitter is given for one message: the time the shell read, the
destination's units, whether it is a correction, these settings as one value (``site``, never
copied field by field) and what was sent before.
Each field's check is declared on it (``bridge.emit.setting_values``), run by pydantic;
``bridge.config`` reads the values and names the file and key of a refused one.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Annotated, Literal

from pydantic.dataclasses import dataclass as settings_model

from bridge.emit import setting_values as kind
from bridge.emit.setting_values import check, optional_choice, system_uri, text
from bridge.emit.setting_values import choice as one_of
from bridge.science.units import DEFAULT_UNITS, UnitSystem
from bridge.values import SETTINGS_MODEL

PatientReference = Literal["conditional-create", "identifier"]
PATIENT_REFERENCES: tuple[PatientReference, ...] = ("identifier", "conditional-create")
# A placeholder base for the site's own identifier and code systems (RFC 2606 reserves
# ``.example``): every site sets ``emit.system_base`` to a URL it controls.
DEFAULT_SYSTEM_BASE = "https://pft-site.example/dlco-bridge"
HEMOGLOBIN_UNITS = ("g/L", "g/dL")  # the units a site may choose for haemoglobin (UCUM)
HEMOGLOBIN_DIMENSION = "mass_concentration"  # the dimension emit.hemoglobin_unit applies to (units.toml)
# Whose predicted values are charted, one per quantity (the other set goes into the notes): the
# GLI-2017 values computed by the bridge, or the lab's own as exported.
ChartedPredicted = Literal["gli-2017", "lab"]
CHARTED_PREDICTED: tuple[ChartedPredicted, ...] = ("gli-2017", "lab")
DEFAULT_CHARTED_PREDICTED: ChartedPredicted = "gli-2017"
# The fields that are HL7 names (HD namespace ids, CX.5): at most 20 characters, no delimiters.
HL7_NAMES = (
    "sending_application",
    "sending_facility",
    "receiving_application",
    "receiving_facility",
    "patient_identifier_type",
)


@settings_model(frozen=True, slots=True, config=SETTINGS_MODEL)
class EmitSettings:
    """The site's identity in every message; each field checked by pydantic with ``setting_values``.

    The HL7 names (``HL7_NAMES``) are checked when read from the configuration (``bridge.config``);
    built in code, the HL7 emitter refuses an over-long one when it writes it.
    """

    sending_application: Annotated[str, check(text)] = "DLCO-BRIDGE"
    sending_facility: Annotated[str, check(text)] = "PFT-LAB"  # MSH-4 for a lab not in lab_facilities
    receiving_application: Annotated[str, check(text)] = "RECORDS"
    receiving_facility: Annotated[str, check(text)] = "HOSPITAL"
    # an https:// URL the site controls; the default is a placeholder
    system_base: Annotated[str, check(kind.system_base)] = DEFAULT_SYSTEM_BASE
    # FHIR Identifier.system of observations; None: <system_base>/observation-id
    identifier_system: Annotated[str | None, check(system_uri)] = None
    # FHIR Coding.system of local codes; None: <system_base>/local-code
    local_code_system: Annotated[str | None, check(system_uri)] = None
    patient_reference: Annotated[PatientReference, check(one_of, PATIENT_REFERENCES)] = "identifier"
    # HL7 MSH-11: P production (table 0103, mappings/hl7_tables.toml; bridge.config checks it is listed)
    processing_id: Annotated[str, check(text)] = "P"
    lab_facilities: tuple[tuple[str, str], ...] = ()  # (lab name as exported, HL7 facility id): MSH-4, OBR-3
    patient_identifier_type: Annotated[str, check(text)] = "MR"  # HL7 PID-3 CX.5 (table 0203): MR medical record number
    # Haemoglobin is sent (and named in notes) in this unit, g/L or g/dL (HEMOGLOBIN_UNITS);
    # None: the unit system's display unit in mappings/units.toml.
    hemoglobin_unit: Annotated[str | None, check(optional_choice, HEMOGLOBIN_UNITS)] = None
    # Whose predicted value, per cent predicted and range are charted (CHARTED_PREDICTED); outside
    # the GLI-2017 equations' range the GLI-2017 results are sent as a stated absence, not replaced.
    charted_predicted: Annotated[ChartedPredicted, check(one_of, CHARTED_PREDICTED)] = DEFAULT_CHARTED_PREDICTED

    def context(
        self, now: datetime, units: UnitSystem, correction: bool = False, earlier: tuple[tuple[str, str], ...] = ()
    ) -> EmitContext:
        """The emitters' context for one message: these settings, the time the shell read, the ledger's record."""
        return EmitContext(now=now.replace(microsecond=0), units=units, correction=correction, site=self,
                           earlier=earlier)  # fmt: skip

    @property
    def observation_system(self) -> str:
        """Identifier system of the observations and reports the bridge emits."""
        return self.identifier_system or f"{self.system_base}/observation-id"

    @property
    def local_system(self) -> str:
        """Code system of the local codes (``system = "local"`` in codes.toml)."""
        return self.local_code_system or f"{self.system_base}/local-code"

    @property
    def source_system(self) -> str:
        """Identifier system of an input file's SHA-256 (FHIR Provenance.entity)."""
        return f"{self.system_base}/source-file"

    @property
    def session_system(self) -> str:
        """Identifier system of one session of an input file (FHIR Provenance.entity, its conditional key)."""
        return f"{self.system_base}/source-session"

    def facility_of(self, lab_name: str) -> str:
        """The HL7 facility id of the lab that performed the test; the site's default otherwise."""
        return next((facility for name, facility in self.lab_facilities if name == lab_name), self.sending_facility)


@dataclass(frozen=True, slots=True)
class EmitContext:
    """Everything an emitter needs that is not in the record: time, units, correction, the site's settings.

    The shell builds it (it reads the clock and the configuration), usually with
    :meth:`EmitSettings.context`; emitters never do. The site's identity is ``site`` (its
    defaults are :class:`EmitSettings`'s), never repeated here.
    """

    now: datetime
    units: UnitSystem = DEFAULT_UNITS
    correction: bool = False  # new content for a test id that was already sent
    site: EmitSettings = field(default_factory=EmitSettings)
    # What was sent before for this test: (identifier value, status as last sent: "final", "C",
    # "entered-in-error" ...), from the ledger; empty when nothing was or the ledger keeps no record.
    earlier: tuple[tuple[str, str], ...] = ()
