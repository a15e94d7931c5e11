"""The file-drop transport: atomic, idempotent writes under a stable name."""

from __future__ import annotations

from pathlib import Path

import pytest

from bridge.errors import DeliveryError
from bridge.service.transports.base import FHIR_JSON, HL7_V2_ER7, OutgoingMessage
from bridge.service.transports.file import FileTransport, file_name


def test_message_is_written_under_its_id(tmp_path: Path) -> None:
    """An HL7 message lands as <message id>.oru.hl7 with the exact payload."""
    transport = FileTransport(tmp_path / "drop")

    receipt = transport.deliver(OutgoingMessage("drop", "C-1", b"MSH|x\r", HL7_V2_ER7))

    assert b"MSH|x\r" == (tmp_path / "drop" / "C-1.oru.hl7").read_bytes()
    assert ("written", "C-1.oru.hl7") == (receipt.code, receipt.text)


def test_redelivery_overwrites_the_same_file(tmp_path: Path) -> None:
    """Delivering the same message twice leaves one file, and no temporary files."""
    transport = FileTransport(tmp_path)
    message = OutgoingMessage("drop", "B-1", b"{}", FHIR_JSON)

    transport.deliver(message)
    transport.deliver(message)

    assert ["B-1.bundle.json"] == sorted(p.name for p in tmp_path.iterdir())


def test_unsafe_ids_cannot_leave_the_folder() -> None:
    """Path separators and leading dots in an id are neutralised in the file name."""
    message = OutgoingMessage("drop", "../../etc/x", b"", "application/octet-stream")

    assert "_.._etc_x.msg" == file_name(message)


def test_unwritable_folder_is_retryable(tmp_path: Path) -> None:
    """A folder that cannot be written is a retryable DeliveryError."""
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the folder should be")
    transport = FileTransport(blocker)

    with pytest.raises(DeliveryError, match="cannot write"):
        transport.deliver(OutgoingMessage("drop", "C-1", b"MSH|", HL7_V2_ER7))
