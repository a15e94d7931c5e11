"""Intake of the watch-folder service: what becomes of each complete inbox file (shell).

Owns :class:`Intake` -- one complete file (:mod:`bridge.service.watcher` says when): read, hash,
process through the pure pipeline, enqueue its messages in the ledger (committed first), then
archive it; or quarantine it with ``<name>.error.json`` saying why in the same words as
``check``. The same content dropped again is archived as a duplicate and sends nothing; new
content for a test id already sent goes out as a correction (which replaces what the ledger's
record of sent resources says was final, and withdraws what it no longer gives). Any other exception met while
processing one file (a bug the file exposes) quarantines that file as an internal error: one
file never stops the feed. A file read through a field map (``map`` or ``[maps]`` in the
settings) may hold many sessions: the messages of every good one are enqueued in the one ledger
commit, each refused record gets its own ``<name>.<n>.error.json`` in quarantine (naming its row
or message), and the file is archived; a file with no good session is quarantined whole.

Disk full: a write that finds no space (the ledger, the archive, the quarantine) raises
``DiskFull`` and leaves the file in the inbox; what was done before it stays consistent (the
ledger's transaction rolled back, or its commit kept and the move still to do, as after a crash),
so the same file is taken again when space returns.

Crash safety: the ledger commit comes before the move, and a restart that finds a file whose
content the ledger knows only archives it (into the archive proper when it is the file a crash
kept from being moved, into ``duplicates/`` when it was dropped again), so a kill at any point
loses nothing and enqueues nothing twice. Must not deliver (that is
:mod:`bridge.service.delivery`), watch the folder or parse settings.
"""

from __future__ import annotations

import contextlib
import glob
import hashlib
import logging
import time
import traceback
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Literal

import orjson

from bridge.emit.manifest import carried
from bridge.errors import DiskFull, InputError, InvalidField, LedgerError, UnreadableInput
from bridge.model import Outcome, Payload
from bridge.pipeline import PipelineSettings, Route, process, process_all
from bridge.service.files import Disk, free_name, is_no_space
from bridge.service.ledger import InputRecord, Ledger, NewInput, NewMessage
from bridge.service.metrics import Metrics
from bridge.service.settings import ServiceSettings
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap, MapChoice
from bridge.version import __version__

log = logging.getLogger("dlco_bridge.intake")

Result = Literal["processed", "correction", "duplicate", "quarantined", "vanished"]
# The pure pipeline's entry point; a seam so tests can hand the intake one that fails.
Processor = Callable[..., Outcome]  # bridge.pipeline.process, or a failing one in tests


@dataclass(frozen=True, slots=True)
class IntakeResult:
    """What became of one file; ``detail`` is the quarantine reason, or ``recovered``."""

    path: Path
    result: Result
    detail: str = ""


class Intake:
    """Turns one complete inbox file into ledger rows plus an archived (or quarantined) file."""

    def __init__(
        self,
        service: ServiceSettings,
        pipeline: PipelineSettings,
        maps: MapChoice,  # which field map reads which file (per inbox, per file-name pattern)
        tables: Tables,
        ledger: Ledger,
        metrics: Metrics,
        clock: Callable[[], float] = time.time,
        on_enqueued: Callable[[], None] = lambda: None,
        processor: Processor = process,
        disk: Disk | None = None,
    ) -> None:
        self.service = service
        self.pipeline = pipeline
        self.tables = tables
        self.ledger = ledger
        self.metrics = metrics
        self.clock = clock
        self.on_enqueued = on_enqueued
        self.processor = processor
        self.disk = disk or Disk()  # the archive and quarantine writes; a seam for tests
        self.routes = tuple(Route(d.payload, d.units) for d in self.service.destinations)
        self.maps = maps

    def take(self, path: Path, complete_at: float) -> IntakeResult:
        """Process one file completely; never raises for what the file contains.

        Raises only what is not the file's fault: OSError (it cannot be read or moved; the
        service leaves it in place), DiskFull (no space for the ledger, archive or quarantine: the
        file stays, to be taken again when space returns) and LedgerError (the state database is
        unusable: fatal).
        """
        try:
            data = self._read(path)
        except FileNotFoundError:
            log.info("input vanished before it was read", extra={"event": "vanished", "file": path.name})
            return IntakeResult(path, "vanished")
        except InputError as error:
            return self._quarantine(path, _file_sha256(path), error)
        self.metrics.count("files_seen")
        sha = hashlib.sha256(data).hexdigest()
        known = self.ledger.seen(sha)
        if known is not None and known.state != "quarantined":
            if self._interrupted(path, known):
                return self._recover(path, known)
            return self._duplicate(path, sha)
        try:
            # Every destination's payload is built before anything is recorded: one that
            # fails quarantines the file with nothing enqueued for any destination.
            now = datetime.fromtimestamp(self.clock(), UTC)
            fmap = self.maps.for_file(path.name)
            if fmap is None:
                outcome = self.processor(
                    data,
                    path.name,
                    self.tables,
                    self.pipeline,
                    now=now,
                    routes=self.routes,
                    is_correction=self._is_correction,
                    sent_before=self.ledger.sent_before,
                )
                messages = self._messages(outcome)
            else:  # a field map: every session of the file, collected before anything is recorded
                outcome, messages, refused = self._sessions(data, path, fmap, now)
        except InputError as error:
            return self._quarantine(path, sha, error)
        except (LedgerError, DiskFull):
            raise  # the state database or its disk, not this file
        except Exception as error:
            # Anything else is a bug this file exposes (OverflowError, a model's ValidationError,
            # ZeroDivisionError...). Retrying cannot help and must not stop the feed: the file is
            # quarantined as an internal error and the next one is taken. Not BaseException:
            # KeyboardInterrupt and SystemExit still stop the service.
            return self._quarantine(path, sha, error)
        if fmap is not None:
            self._quarantine_records(path, outcome.source_sha256, refused)
        return self._enqueue(path, outcome, messages, complete_at)

    def _sessions(
        self, data: bytes, path: Path, fmap: FieldMap, now: datetime
    ) -> tuple[Outcome, list[NewMessage], list[InputError]]:
        """Every session a map finds in the file: the first good outcome (the ledger's test id), all
        good sessions' messages, and the refused records. No good session refuses the file; a map
        with ``on_bad_record = "refuse"`` refuses it at its first bad record (raised by the pipeline)."""
        pipeline = self.pipeline.reading_with(fmap)
        results = list(process_all(data, path.name, self.tables, pipeline, now=now, routes=self.routes,
                                   is_correction=self._is_correction,
                                   sent_before=self.ledger.sent_before))  # fmt: skip
        good = [r for r in results if isinstance(r, Outcome)]
        refused = [r for r in results if isinstance(r, InputError)]
        if not good:
            raise refused[0] if refused else InvalidField("(file)", "at least one session", path.name)
        messages = [m for outcome in good for m in self._messages(outcome)]
        correction = any(o.correction for o in good)
        return replace(good[0], correction=correction), messages, refused

    def _quarantine_records(self, path: Path, sha: str, refused: list[InputError]) -> None:
        """One ``<name>.<n>.error.json`` per refused record (naming its row or message); the file is archived."""
        for number, error in enumerate(refused, start=1):
            reason, said, details = _input_error(path.name, error)
            report = {"file": path.name, "sha256": sha, "record": number, **details,
                      "at": datetime.fromtimestamp(self.clock(), UTC).isoformat(), "version": __version__}  # fmt: skip
            with self._room("quarantine"):
                target = free_name(self.service.quarantine, f"{path.name}.{number}.error.json", sha[:12])
                self.disk.write_atomically(target, orjson.dumps(report, option=orjson.OPT_INDENT_2))
            self.metrics.count("records_quarantined")
            log.warning("record refused; the file's other sessions go on",
                        extra={"event": "record_quarantined", "file": path.name,
                               "reason": reason if self.service.log_patient_data else said,
                               "report": target.name})  # fmt: skip

    def _read(self, path: Path) -> bytes:
        limit = self.pipeline.max_input_bytes
        size = path.stat().st_size
        if size > limit:
            raise UnreadableInput("(file)", f"at most {limit} bytes, got {size}", path.name)
        return path.read_bytes()

    def _is_correction(self, test_id: str, sha256: str) -> bool:
        """New content for a test id whose earlier content was accepted."""
        previous = self.ledger.last_for_test(test_id)
        return previous is not None and previous.sha256 != sha256

    def _enqueue(self, path: Path, outcome: Outcome, messages: list[NewMessage], complete_at: float) -> IntakeResult:
        session, correction = outcome.session, outcome.correction
        state: Literal["correction", "processed"] = "correction" if correction else "processed"
        self.ledger.record_input_and_enqueue(
            NewInput(outcome.source_sha256, path.name, session.test_id, state), messages
        )
        for message in messages:
            self.metrics.note_enqueued(message.message_id, complete_at)
        self.on_enqueued()
        self._archive(path, "", outcome.source_sha256)
        self.metrics.count("files_processed")
        if correction:
            self.metrics.count("corrections")
        extra: dict[str, object] = {"event": state, "file": path.name, "sha256": outcome.source_sha256[:12]}
        extra |= {"messages": len(messages), "findings": len(outcome.findings), **self._patient(outcome)}
        log.info("input processed", extra=extra)
        return IntakeResult(path, state)

    def _messages(self, outcome: Outcome) -> list[NewMessage]:
        """One outbox row per destination, from the payload of its route."""
        patient = outcome.session.patient
        patient_key = hashlib.sha256(f"{patient.id_system}|{patient.id}".encode()).hexdigest()[:32]
        by_route = {(p.kind, p.units): p for p in outcome.payloads}
        return [
            NewMessage(
                destination=destination.name,
                message_id=_outbox_id(payload, outcome),
                test_id=outcome.session.test_id,
                patient_key=patient_key,
                payload=payload.data,
                content_type=payload.content_type,
                # the input's hash, not the payload's: the payload carries a send-time stamp
                content_sha256=outcome.source_sha256,
                kind=payload.kind,
                lab=outcome.session.lab.name,
                # kept by the ledger through pruning (what a correction replaces)
                carried=carried(payload, self.pipeline.emit.observation_system),
            )
            for destination in self.service.destinations
            for payload in (by_route[(destination.payload, destination.units)],)
        ]

    def _patient(self, outcome: Outcome) -> dict[str, str]:
        if not self.service.log_patient_data:
            return {}
        return {"patient_id": outcome.session.patient.id}

    def _interrupted(self, path: Path, known: InputRecord) -> bool:
        """Whether ``path`` is the very file whose archiving a crash cut short.

        That file was recorded under its own name, and no copy of it reached the archive
        folder of the day it was recorded (or the next day, for a commit just before
        midnight). A file the operator dropped again has its first copy there.
        """
        if known.source != path.name:
            return False
        for day in (known.first_seen, known.first_seen + 86_400):
            folder = self.service.archive / datetime.fromtimestamp(day, UTC).strftime("%Y-%m-%d")
            for candidate in folder.glob(glob.escape(path.name) + "*"):
                if candidate.is_file() and _file_sha256(candidate) == known.sha256:
                    return False
        return True

    def _recover(self, path: Path, known: InputRecord) -> IntakeResult:
        """Finish what a crash interrupted: the messages are queued already; archive the file."""
        self._archive(path, "", known.sha256)
        self.on_enqueued()
        self.metrics.count("files_processed")
        log.info("input archived; its messages were queued before (a restart or a full archive held it back)",
                 extra={"event": "recovered", "file": path.name, "sha256": known.sha256[:12]})  # fmt: skip
        return IntakeResult(path, "processed", "recovered")

    def _duplicate(self, path: Path, sha: str) -> IntakeResult:
        self.ledger.record_duplicate(sha, path.name)
        self._archive(path, "duplicates", sha)
        self.metrics.count("files_duplicate")
        log.info("same content again: archived, nothing sent",
                 extra={"event": "duplicate", "file": path.name, "sha256": sha[:12]})  # fmt: skip
        return IntakeResult(path, "duplicate")

    def _quarantine(self, path: Path, sha: str, error: Exception) -> IntakeResult:
        """Into ``quarantine/`` with ``<name>.error.json`` saying why; the ledger keeps it by hash."""
        if isinstance(error, InputError):
            reason, said, details = _input_error(path.name, error)
        else:
            reason, said, details = _internal_error(path.name, error)
        target = free_name(self.service.quarantine, path.name, sha[:12])
        report = {"file": path.name, "sha256": sha, **details,
                  "at": datetime.fromtimestamp(self.clock(), UTC).isoformat(), "version": __version__}  # fmt: skip
        with self._room("quarantine"):
            self.disk.write_atomically(
                target.with_name(target.name + ".error.json"), orjson.dumps(report, option=orjson.OPT_INDENT_2)
            )
        self.ledger.record_quarantine(sha, path.name, reason)
        with self._room("quarantine"), contextlib.suppress(FileNotFoundError):  # already gone: the report stays
            self.disk.move_durably(path, target)
        self.metrics.count("files_quarantined")
        if details["kind"] == "internal":
            self.metrics.count("files_failed_internal")
        # The reason may quote the input's values: it goes to the log only when patient data
        # may be logged; the report always has it.
        log.log(logging.WARNING if details["kind"] == "input" else logging.ERROR, "input quarantined",
                extra={"event": "quarantined", "file": path.name,
                       "reason": reason if self.service.log_patient_data else said,
                       "report": target.name + ".error.json"})  # fmt: skip
        return IntakeResult(path, "quarantined", reason)

    def _archive(self, path: Path, subfolder: str, sha: str) -> None:
        """Into ``archive/YYYY-MM-DD/`` (UTC day); a name already there gets the hash appended."""
        day = datetime.fromtimestamp(self.clock(), UTC).strftime("%Y-%m-%d")
        folder = self.service.archive / day / subfolder if subfolder else self.service.archive / day
        with self._room("archive"):
            self.disk.move_durably(path, free_name(folder, path.name, sha[:12]))

    @contextlib.contextmanager
    def _room(self, where: Literal["archive", "quarantine"]) -> Iterator[None]:
        """A write into the archive or quarantine; no space there is DiskFull, any other OSError stays one."""
        try:
            yield
        except OSError as exc:
            if is_no_space(exc):
                folder = self.service.archive if where == "archive" else self.service.quarantine
                raise DiskFull(where, str(folder), exc.strerror or str(exc)) from exc
            raise


def _input_error(source: str, error: InputError) -> tuple[str, str, dict[str, object]]:
    """The reason (the line ``check`` prints), what the log says of it by default, the report's fields."""
    error = error if error.source else error.with_source(source)
    name = type(error).__name__
    reason = error.line()  # may quote a malformed patient id or birth date
    details: dict[str, object] = {"reason": reason, "error": name, "field": error.field,
                                  "expected": error.expected, "kind": "input"}  # fmt: skip
    return reason, f"{name} at {error.field}", details


def _internal_error(source: str, error: Exception) -> tuple[str, str, dict[str, object]]:
    """As :func:`_input_error` for an exception that is a bug, not a reason: type, message, traceback."""
    name = type(error).__name__
    message = str(error)  # may quote the input (pydantic repeats the value it refused)
    reason = f"{source}: internal error: {name}" + (f": {message.splitlines()[0]}" if message else "")
    frames = traceback.extract_tb(error.__traceback__)
    said = f"{name} (internal error)" + (f" in {Path(frames[-1].filename).name}:{frames[-1].lineno}" if frames else "")
    details: dict[str, object] = {"reason": reason, "error": name, "field": None, "expected": None,
                                  "kind": "internal", "message": message,
                                  "traceback": "".join(traceback.format_exception(error))}  # fmt: skip
    return reason, said, details


def _file_sha256(path: Path) -> str:
    """The SHA-256 of a file's content; OSError when it cannot be read (never a made-up hash)."""
    with path.open("rb") as stream:
        return hashlib.file_digest(stream, "sha256").hexdigest()


def _outbox_id(payload: Payload, outcome: Outcome) -> str:
    """Outbox id: HL7 uses MSH-10 (content-derived); FHIR uses the test id plus the content hash."""
    if payload.kind == "hl7":
        return payload.message_id
    return f"{payload.message_id}.{outcome.source_sha256[:12]}" + (".c" if outcome.correction else "")
