"""MLLP framing of HL7 v2 messages: the block characters, framing a message, and reading blocks from a stream.

Owns the bytes of the minimal lower layer protocol that the client (``bridge.service.transports.mllp``),
the stand-in's listener (``bridge.service.receiver.mllp_peer``), the legacy reader and ``show``
share. Pure: bytes in, bytes out; :class:`FrameReader` holds only the bytes it was fed.
"""

from __future__ import annotations

# source: HL7 v2 MLLP (minimal lower layer protocol) release 2 — <VT> message <FS><CR>
START_BLOCK = b"\x0b"
END_BLOCK = b"\x1c"
CARRIAGE_RETURN = b"\x0d"
TRAILER = END_BLOCK + CARRIAGE_RETURN
# The same characters as text: what may stand around a message read from a file (framed or not).
FRAMING_TEXT = (START_BLOCK + END_BLOCK + CARRIAGE_RETURN).decode("ascii")


def frame(payload: bytes) -> bytes:
    """Wrap one message in an MLLP block."""
    return START_BLOCK + payload + TRAILER


def can_be_framed(payload: bytes) -> bool:
    """Whether ``payload`` holds no block character (which would end its own block early)."""
    return START_BLOCK not in payload and END_BLOCK not in payload


def unframed(text: str, also: str = "\n") -> str:
    """``text`` without the MLLP block characters, carriage returns and ``also`` around it."""
    return text.strip(FRAMING_TEXT + also)


class FrameReader:
    """Collects bytes from a stream and hands back each complete MLLP block's content.

    Bytes outside a block (noise between frames) are dropped and counted in ``dropped``;
    ``pending`` is the size of the incomplete block held, for the caller's size limit.
    """

    def __init__(self) -> None:
        self._buffer = bytearray()
        self.dropped = 0

    @property
    def pending(self) -> int:
        return len(self._buffer)

    def feed(self, data: bytes) -> list[bytes]:
        """Add ``data``; return the contents of the blocks it completed, in order."""
        self._buffer += data
        frames: list[bytes] = []
        while True:
            start = self._buffer.find(START_BLOCK)
            if start < 0:
                self.dropped += len(self._buffer)
                self._buffer.clear()
                return frames
            self.dropped += start
            del self._buffer[:start]
            end = self._buffer.find(TRAILER, 1)
            if end < 0:
                return frames
            frames.append(bytes(self._buffer[1:end]))
            del self._buffer[: end + len(TRAILER)]
