"""The stand-in's MLLP listener: every HL7 v2 message written to a folder and answered.

Owns reading MLLP blocks (``bridge.hl7.mllp``, the client's framing), writing each message as
``<n>-<MSH-10>.hl7`` (atomically), and answering an ACK (``bridge.hl7.ack``) whose MSA-1 is ``answer``:
AA, or AE/AR to rehearse a receiver's refusal. Loopback only.
"""

from __future__ import annotations

import re
import socketserver
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

from bridge.hl7.ack import build_ack
from bridge.hl7.mllp import FrameReader, frame
from bridge.hl7.text import control_id_of
from bridge.service.files import write_atomically
from bridge.service.loopback import LoopbackServer
from bridge.tables.files import load_hl7_tables

# source: HL7 v2.5.1 ch. 2 table 0008, original mode (AA accept, AE error, AR reject): mappings/hl7_tables.toml
ANSWERS = load_hl7_tables().original_acknowledgments
# MSA-3 of a rehearsed refusal, by what the code means (table 0008)
_REHEARSED = {"accept": "", "error": "stand-in: rehearsed application error", "reject": "stand-in: rehearsed reject"}
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")
MAX_MESSAGE_BYTES = 10 * 1024 * 1024


def ack_for(message: bytes, code: str, control_id: str, at: datetime) -> bytes:
    """An ACK to ``message``: MSH with sender and receiver swapped, MSA-1 ``code``, MSA-2 its MSH-10."""
    return build_ack(message, code, control_id, at, _REHEARSED[load_hl7_tables().acknowledgments[code]])


class _Listener(socketserver.ThreadingTCPServer):
    """The listening socket: SO_REUSEADDR, so that a stand-in stopped and started again binds its port
    at once instead of waiting out the old connections' TIME_WAIT (about a minute); as the FHIR
    endpoint's http.server does."""

    allow_reuse_address = True
    daemon_threads = True


class MllpPeer(LoopbackServer):
    """An MLLP listener on 127.0.0.1 in a background thread; ``answer`` may be changed while it runs."""

    def __init__(self, folder: Path, port: int = 0, answer: str = "AA") -> None:
        if answer not in ANSWERS:
            raise ValueError(f"answer must be one of {', '.join(ANSWERS)}")
        self.folder = folder
        self.answer = answer
        self.received = 0
        self._lock = threading.Lock()
        folder.mkdir(parents=True, exist_ok=True)
        super().__init__(_handler(self), port, setting="--mllp-port", name="stand-in-mllp")

    def take(self, message: bytes) -> bytes:
        """Write one message and return the ACK to send."""
        with self._lock:
            self.received += 1
            number = self.received
        control = control_id_of(message.decode("utf-8", errors="replace")) or ""
        name = f"{time.time_ns()}-{number:06d}-{_UNSAFE.sub('_', control)[:60] or 'no-control-id'}.hl7"
        write_atomically(self.folder / name, message)
        return ack_for(message, self.answer, f"SI{number:06d}", datetime.now(UTC))


def _handler(peer: MllpPeer) -> type[socketserver.BaseRequestHandler]:
    class Handler(socketserver.BaseRequestHandler):
        def handle(self) -> None:
            reader = FrameReader()
            while True:
                data = self.request.recv(65536)
                if not data:
                    return
                for message in reader.feed(data):
                    self.request.sendall(frame(peer.take(message)))
                if reader.pending > MAX_MESSAGE_BYTES:
                    return

    return Handler
