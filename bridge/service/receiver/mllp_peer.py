"""The stand-in's MLLP listener: every HL7 v2 message written to a folder and answered.

Owns reading MLLP blocks (with the client's framing), writing each message as
``<n>-<MSH-10>.hl7`` (atomically), and answering an ACK whose MSA-1 is ``answer``: AA, or AE/AR
to rehearse a receiver's refusal. Loopback only.
"""

from __future__ import annotations

import re
import socketserver
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

from bridge.emit.hl7text import split_fields, split_segments
from bridge.service.files import write_atomically
from bridge.service.loopback import LoopbackServer
from bridge.service.transports.mllp import FrameReader, frame

# source: HL7 v2.5.1 ch. 2 table 0008 (AA accept, AE error, AR reject)
ANSWERS = ("AA", "AE", "AR")
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")
MAX_MESSAGE_BYTES = 10 * 1024 * 1024


def ack_for(message: bytes, code: str, control_id: str, at: datetime) -> bytes:
    """An ACK to ``message``: MSH with sender and receiver swapped, MSA-1 ``code``, MSA-2 its MSH-10."""
    text = message.decode("utf-8", errors="replace")
    msh = split_fields(split_segments(text)[0], "|") if text.startswith("MSH|") else ["MSH", "^~\\&"]

    def field(n: int) -> str:  # MSH-n is index n-1 (MSH-1 is the separator itself)
        return msh[n - 1] if len(msh) >= n else ""

    sent = field(10)
    # source: HL7 v2.5.1 ch. 2: ACK MSH-3..6 answer MSH-5, 6, 3, 4; MSA-2 echoes MSH-10; MSH-9 ACK^R01^ACK
    msh_out = "|".join(
        ["MSH", "^~\\&", field(5), field(6), field(3), field(4), at.strftime("%Y%m%d%H%M%S"), "",
         "ACK^R01^ACK", control_id, "P", "2.5.1"]
    )  # fmt: skip
    text_out = {"AA": "", "AE": "stand-in: rehearsed application error", "AR": "stand-in: rehearsed reject"}[code]
    msa = "|".join(["MSA", code, sent] + ([text_out] if text_out else []))
    return f"{msh_out}\r{msa}\r".encode()


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
        text = message.decode("utf-8", errors="replace")
        first = split_segments(text)[0] if text else ""
        fields = split_fields(first, first[3]) if first.startswith("MSH") and len(first) > 3 else []
        control = fields[9] if len(fields) > 9 else ""
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
