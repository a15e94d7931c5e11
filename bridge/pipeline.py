"""The pure pipeline: bytes of one input -> :class:`bridge.model.Outcome`.

Owns: the order of the steps (read -> normalise -> derive -> check), in one place. The same
function serves ``check``, ``convert``, ``watch`` and ``audit``. No I/O: the shell reads the
file and passes its bytes and name.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

from bridge.checks import run_checks
from bridge.derive import derive
from bridge.errors import InputError, UnreadableInput
from bridge.mapping import Tables
from bridge.model import Outcome, Session
from bridge.normalise import normalise
from bridge.readers.json_export import read_export
from bridge.units import UnitCatalogue

DEFAULT_MAX_INPUT_BYTES = 5 * 1024 * 1024  # a DLCO export is a few kB; anything huge is wrong


@dataclass(frozen=True, slots=True)
class Limits:
    max_input_bytes: int = DEFAULT_MAX_INPUT_BYTES


def read(data: bytes, source: str) -> Session:
    """Pick the reader for the input (only ``dlco-result/1`` JSON so far)."""
    return read_export(data, source)


def read_and_normalise(data: bytes, source: str, catalogue: UnitCatalogue) -> Session:
    """The session read from ``data``, every quantity in its canonical unit."""
    return normalise(read(data, source), catalogue)


def process(data: bytes, source: str, tables: Tables, limits: Limits = Limits()) -> Outcome:
    """Read, normalise, derive and check one input. Raises InputError when it is unreadable."""
    if len(data) > limits.max_input_bytes:
        raise UnreadableInput("(file)", f"at most {limits.max_input_bytes} bytes, got {len(data)}", source)
    try:
        session = read_and_normalise(data, source, tables.units)
    except InputError as exc:
        if exc.source:
            raise
        raise exc.with_source(source) from None  # normalise does not know the file name
    derived = derive(session, tables)
    findings = run_checks(session, derived, tables)
    return Outcome(
        source=source,
        source_sha256=hashlib.sha256(data).hexdigest(),
        session=session,
        derived=derived,
        findings=findings,
    )
