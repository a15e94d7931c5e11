"""The stand-in receiver: an MLLP listener and a FHIR endpoint on loopback, for trying a feed.

``dlco-bridge stand-in`` runs it; ``watch`` never does. :mod:`.mllp_peer` answers each HL7 v2
message with AA (or AE/AR, to rehearse failures) and writes it to a folder; :mod:`.fhir_peer`
takes transaction Bundles, honours ``ifNoneExist`` and conditional update, and keeps what it
created in :mod:`.store` (a SQLite file it can list). It imports no ledger and no transport but
the MLLP framing, which it shares with the client.
"""

from dataclasses import dataclass
from pathlib import Path

from bridge.service.loopback import LOOPBACK
from bridge.service.receiver.fhir_peer import FhirPeer
from bridge.service.receiver.mllp_peer import ANSWERS, MllpPeer
from bridge.service.receiver.store import ResourceStore, StoredResource


@dataclass(frozen=True, slots=True)
class StandInSettings:
    """Where the stand-in listens and keeps what it received; the ports match the sample configuration."""

    folder: Path
    mllp_port: int = 2575
    fhir_port: int = 8080
    answer: str = "AA"

    @property
    def messages(self) -> Path:
        return self.folder / "messages"

    @property
    def resources(self) -> Path:
        return self.folder / "resources.sqlite3"


__all__ = ["ANSWERS", "LOOPBACK", "FhirPeer", "MllpPeer", "ResourceStore", "StandInSettings", "StoredResource"]
