"""The site's identity in every message, with its defaults written once (pure).

Owns: :class:`EmitSettings` (sending and receiving application and facility, identifier and
code systems, how the patient is referred to, the HL7 processing id) and turning them, with the
time the shell read and the destination's units, into the emitters' :class:`EmitContext`.
Checking the values is ``bridge.config``'s job when it reads them.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from bridge.emit.observations import EmitContext, PatientReference
from bridge.science.units import UnitSystem


@dataclass(frozen=True, slots=True)
class EmitSettings:
    sending_application: str = "DLCO-BRIDGE"
    sending_facility: str = "PFT-LAB"
    receiving_application: str = "RECORDS"
    receiving_facility: str = "HOSPITAL"
    identifier_system: str = "urn:dlco-bridge:observation-id"
    local_code_system: str | None = None  # FHIR URI for local codes; None: the one in codes.toml
    patient_reference: PatientReference = "identifier"
    processing_id: str = "P"  # HL7 MSH-11 (table 0103): P production, T training, D debugging
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
            local_code_system=self.local_code_system,
            identifier_system=self.identifier_system,
            patient_reference=self.patient_reference,
            correction=correction,
            processing_id=self.processing_id,
            hemoglobin_unit=self.hemoglobin_unit,
        )
