"""The site's identity in every message, with its defaults written once (pure).

Owns: :class:`EmitSettings` (sending and receiving application and facility, the facility id of
each lab, the site's base URL for its own identifier and code systems, how the patient is
referred to, the patient identifier type, the HL7 processing id) and turning them, with the
time the shell read and the destination's units, into the emitters' :class:`EmitContext`.
Checking the values is ``bridge.config``'s job when it reads them.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from bridge.emit.observations import DEFAULT_SENDING_FACILITY, DEFAULT_SYSTEM_BASE, EmitContext, PatientReference
from bridge.science.units import UnitSystem


@dataclass(frozen=True, slots=True)
class EmitSettings:
    sending_application: str = "DLCO-BRIDGE"
    sending_facility: str = DEFAULT_SENDING_FACILITY  # MSH-4 for a lab not in lab_facilities
    receiving_application: str = "RECORDS"
    receiving_facility: str = "HOSPITAL"
    system_base: str = DEFAULT_SYSTEM_BASE  # an https:// URL the site controls; the default is a placeholder
    identifier_system: str | None = None  # FHIR Identifier.system of observations; None: <system_base>/observation-id
    local_code_system: str | None = None  # FHIR Coding.system of local codes; None: <system_base>/local-code
    patient_reference: PatientReference = "identifier"
    processing_id: str = "P"  # HL7 MSH-11 (table 0103): P production, T training, D debugging
    lab_facilities: tuple[tuple[str, str], ...] = ()  # (lab name as exported, HL7 facility id): MSH-4, OBR-3
    patient_identifier_type: str = "MR"  # HL7 PID-3 CX.5 (table 0203): MR medical record number
    # Haemoglobin is sent (and named in notes) in this unit, g/L or g/dL (HEMOGLOBIN_UNITS);
    # None: the unit system's display unit in mappings/units.toml.
    hemoglobin_unit: str | None = None

    def context(self, now: datetime, units: UnitSystem, correction: bool = False) -> EmitContext:
        """The emitters' context for one message: these settings plus the time the shell read."""
        return EmitContext(
            now=now.replace(microsecond=0),
            units=units,
            sending_application=self.sending_application,
            sending_facility=self.sending_facility,
            receiving_application=self.receiving_application,
            receiving_facility=self.receiving_facility,
            system_base=self.system_base,
            local_code_system=self.local_code_system,
            identifier_system=self.identifier_system,
            patient_reference=self.patient_reference,
            correction=correction,
            processing_id=self.processing_id,
            lab_facilities=self.lab_facilities,
            patient_identifier_type=self.patient_identifier_type,
            hemoglobin_unit=self.hemoglobin_unit,
        )
