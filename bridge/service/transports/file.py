"""``FileTransport``: drop each message as a file in a folder another system collects.

Owns the atomic write: a temporary file in the same folder, fsync, ``os.replace``, fsync
of the folder. A reader of the folder never sees half a message, and delivering the same
message again overwrites the same name, so a retry cannot make a second copy.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from bridge.errors import DeliveryError, DestinationFull
from bridge.service.files import Disk, is_no_space
from bridge.service.transports.base import (
    FHIR_JSON,
    HL7_V2_ER7,
    DeliveryReceipt,
    OutgoingMessage,
)

EXTENSIONS = {FHIR_JSON: ".bundle.json", HL7_V2_ER7: ".oru.hl7"}
DEFAULT_EXTENSION = ".msg"

# Anything outside this set could walk out of the folder or trip a collector's parser.
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")


def file_name(message: OutgoingMessage) -> str:
    """The stable file name of a message: its id made safe, plus the type's extension."""
    stem = _UNSAFE.sub("_", message.message_id).lstrip(".") or "_"
    return stem + EXTENSIONS.get(message.content_type, DEFAULT_EXTENSION)


@contextmanager
def _translated(destination: str) -> Iterator[None]:
    """Every file-system error is retryable: the operator frees space or fixes rights.

    No space (ENOSPC, EDQUOT) is ``DestinationFull``, so that the service pauses its intake meanwhile.
    """
    try:
        yield
    except OSError as exc:
        kind = DestinationFull if is_no_space(exc) else DeliveryError
        raise kind(destination, f"cannot write: {exc.strerror or exc}") from exc


class FileTransport:
    """Writes each message to ``folder`` under :func:`file_name` (through ``disk``, a seam for tests)."""

    def __init__(self, folder: Path, disk: Disk | None = None) -> None:
        self.folder = folder
        self.disk = disk or Disk()

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        target = self.folder / file_name(message)
        with _translated(message.destination):
            self.folder.mkdir(parents=True, exist_ok=True)
            self.disk.write_atomically(target, message.payload)
        return DeliveryReceipt("written", target.name)

    def close(self) -> None:
        """Nothing is held open between messages."""
