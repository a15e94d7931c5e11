"""The one exception tree of dlco-bridge.

Each branch maps to exactly one action in the shell::

    BridgeError
    ├── InputError            quarantine the input, never retry
    │   ├── UnreadableInput   bytes that are not text / JSON / HL7 / over the size limit
    │   ├── UnknownFormat     no reader or field map claims the input
    │   ├── MissingField      a required field is absent
    │   ├── InvalidField      a field is present but has the wrong type or value
    │   ├── UnitError         a unit that is unknown or of the wrong dimension
    │   ├── BlockedByFinding  an ERROR finding not allowed (or one configured as blocking) stops emission
    │   ├── OutputInvalid     what was built for it fails independent validation
    │   └── ProcessingFailed  the bridge itself failed on it (a defect to report)
    ├── MappingError          a field map or code table is broken: fatal at start-up
    ├── ConfigError           the settings are broken: fatal at start-up
    ├── DeliveryError         retry with back-off
    │   ├── ConnectFailed
    │   ├── DeliveryTimeout
    │   ├── DestinationFull   a file destination's folder has no space: retry; intake pauses meanwhile
    │   ├── RetryLater        the receiver asked for a later try (429/503, Retry-After): retry not before then
    │   └── Rejected          the receiver said no (NAK, HTTP 4xx): dead-letter, no retry
    ├── DiskFull              no space for the ledger, archive or quarantine: pause, resume when space returns
    ├── LedgerError           the state database is unusable: fatal
    └── ReconcileFailed       the receiving server could not be asked: reconcile stops, exit 2

Clinical or data-quality problems are never exceptions: they are ``Finding`` values
(see ``bridge.model``). Exceptions carry structured fields so that callers and reports use
``exc.field`` rather than parsing the message.
"""

from __future__ import annotations


class BridgeError(Exception):
    """Root of every error dlco-bridge raises on purpose."""


class InputError(BridgeError):
    """The input cannot be turned into a record; it is quarantined with this reason.

    ``source`` names the file (or message), ``field`` the path inside it, ``expected`` says
    what would have been accepted. ``str()`` is the one-line form ``source: field: expected``.
    ``outcome`` is the record as read and checked when the refusal came only at the gate or
    while emitting (None when the input did not become a record): a caller that reports on
    every record (the audit) still sees its findings.
    """

    outcome: object | None = None  # a bridge.model.Outcome (errors import nothing of the project)

    def __init__(self, field: str, expected: str, source: str = "") -> None:
        self.field = field
        self.expected = expected
        self.source = source
        super().__init__(self.line())

    def line(self) -> str:
        parts = [p for p in (self.source, self.field, self.expected) if p]
        return ": ".join(parts)

    def with_source(self, source: str) -> InputError:
        """The same error, naming the input it came from."""
        clone = type(self).__new__(type(self))
        clone.__dict__.update(self.__dict__)
        clone.source = source
        Exception.__init__(clone, clone.line())
        return clone

    def __str__(self) -> str:
        return self.line()


class UnreadableInput(InputError):
    """Not decodable: not UTF-8, not JSON, empty, or larger than the configured limit."""


class UnknownFormat(InputError):
    """No reader recognises the input."""


class MissingField(InputError):
    """A required field is absent."""


class InvalidField(InputError):
    """A field has the wrong type or an impossible value."""


class UnitError(InputError):
    """A unit that is not in the catalogue, or of the wrong dimension for its field."""

    def __init__(self, field: str, unit: str, expected: str, source: str = "") -> None:
        self.unit = unit
        super().__init__(field, f"unit {unit!r} {expected}", source)


class BlockedByFinding(InputError):
    """An ERROR finding the site did not allow, or one it marks as blocking; nothing is emitted.

    ``code`` is the finding's code.
    """

    def __init__(self, field: str, expected: str, source: str = "", *, code: str = "") -> None:
        self.code = code
        super().__init__(field, expected, source)


class OutputInvalid(InputError):
    """The message built for this input fails independent validation; nothing is written."""


class ProcessingFailed(InputError):
    """The bridge failed on this input with an unexpected exception: a defect, not bad input.

    The shell's last line of defence (``check``, ``convert``, the service's intake) turns any
    other exception raised for one input into this, so that one file never stops the rest;
    the input is quarantined like bad input and the report asks for it to be sent in.
    """

    @classmethod
    def wrapping(cls, exc: Exception, source: str) -> ProcessingFailed:
        failed = cls("(internal)", f"no internal error, got {type(exc).__name__}: {exc} (a defect: please report it)")
        return failed.with_source(source) if source else failed  # type: ignore[return-value]


class MappingError(BridgeError):
    """A field map or code table in ``mappings/`` is invalid."""

    def __init__(self, table: str, where: str, expected: str) -> None:
        self.table = table
        self.where = where
        self.expected = expected
        super().__init__(f"{table}: {where}: {expected}")


class ConfigError(BridgeError):
    """The settings are invalid; ``key`` names the setting at fault."""

    def __init__(self, key: str, expected: str, source: str = "") -> None:
        self.key = key
        self.expected = expected
        self.source = source
        super().__init__(": ".join(p for p in (source, key, expected) if p))


class DeliveryError(BridgeError):
    """A message could not be delivered this time; the outbox retries it."""

    def __init__(self, destination: str, detail: str) -> None:
        self.destination = destination
        self.detail = detail
        super().__init__(f"{destination}: {detail}")


class ConnectFailed(DeliveryError):
    """The receiver could not be reached."""


class DeliveryTimeout(DeliveryError):
    """The receiver did not answer in time."""


class RetryLater(DeliveryError):
    """The receiver asked to be tried again later (HTTP 429/503 with Retry-After): not before ``after`` s."""

    def __init__(self, destination: str, detail: str, after: float) -> None:
        self.after = after
        super().__init__(destination, detail)


class DestinationFull(DeliveryError):
    """A file destination's folder has no space left (ENOSPC, EDQUOT): retried like any failure."""


class Rejected(DeliveryError):
    """The receiver answered no (MLLP AE/AR, HTTP 4xx): dead-letter, never retried."""


class LedgerError(BridgeError):
    """The state database cannot be used (locked by another service, corrupt, wrong schema)."""


class DiskFull(BridgeError):
    """No space left where the service keeps its state or files (ENOSPC, EDQUOT, SQLite's "disk is full").

    Neither the input's fault nor fatal: nothing was half done (a ledger transaction rolled back, an
    atomic write left no file), so the service pauses and tries again when space returns. ``where``
    names the place (``ledger``, ``archive``, ``quarantine``), ``folder`` its folder.
    """

    def __init__(self, where: str, folder: str, detail: str) -> None:
        self.where = where
        self.folder = folder
        self.detail = detail
        super().__init__(f"{folder}: no space left for the {where} ({detail})")


class ReconcileFailed(BridgeError):
    """The receiving server could not be asked what it holds (refused, unreachable, unreadable): no conclusion."""

    def __init__(self, destination: str, detail: str) -> None:
        self.destination = destination
        self.detail = detail
        super().__init__(f"{destination}: {detail}")
