"""The audit's report folder (shell): ``findings.csv``, ``summary.json``, ``report.html``, the hand-over, the manifest.

Owns the files, their shapes and the folder itself. ``findings.csv`` is written as rows arrive
(in the walk's order), then the findings across the archive (sorted). The hand-over is written
after the checks across records: ``ndjson/<ResourceType>.ndjson`` holds one version per test
id of the sessions that can migrate as they are (a Patient once), ``ndjson/quarantined.csv``
every record kept out and the codes that keep it out. ``manifest.json`` lists every file the
run wrote: a re-run into the same folder removes those first (no stale hand-over beside a new
report), and a non-empty folder without one is refused, so that nobody's files are replaced.
The page is drawn by ``bridge.audit.page``.
"""

from __future__ import annotations

import csv
import json
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import IO, Any

import orjson

from bridge.audit import stats
from bridge.audit.index import IndexedRecord
from bridge.audit.page import page
from bridge.audit.reduce import Answer, ArchiveReduce
from bridge.audit.rows import AuditFinding, Row
from bridge.display.check_report import CAUTION
from bridge.emit.fhir_ndjson import resource_key
from bridge.version import __version__

FINDINGS_HEADER = ("file", "record", "source", "test_id", "check", "severity", "message")
QUARANTINE_HEADER = ("file", "record", "source", "test_id", "checks")
MANIFEST = "manifest.json"
WRITTEN_BY = "dlco-bridge audit"
SHARED_KINDS = frozenset({"Patient"})  # resources many sessions share: written once
_SCRATCH_PREFIX = ".audit-index-"  # bridge.audit.index's scratch file, left behind only by a run that was killed


def prepare_folder(folder: Path) -> None:
    """Make ``folder`` ready for a run: create it, or empty it of what an earlier audit wrote.

    Raises ``OSError`` when it cannot be made, or when it is not empty and holds no manifest
    of an earlier audit (the files in it are someone else's).
    """
    folder.mkdir(parents=True, exist_ok=True)
    if not any(folder.iterdir()):
        return
    listed = _manifest_files(folder)
    root = folder.resolve()
    for name in listed:
        path = (folder / name).resolve()
        if path.parent == root or path.parent.parent == root:  # only what a report writes: no way out of it
            path.unlink(missing_ok=True)
    for leftover in folder.glob(_SCRATCH_PREFIX + "*"):
        leftover.unlink(missing_ok=True)
    ndjson = folder / "ndjson"
    if ndjson.is_dir() and not any(ndjson.iterdir()):
        ndjson.rmdir()
    (folder / MANIFEST).unlink(missing_ok=True)


def _manifest_files(folder: Path) -> list[str]:
    refuse = f"{folder}: not empty and not an earlier audit report (no {MANIFEST} of {WRITTEN_BY}); use a new folder"
    try:
        manifest = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise OSError(refuse) from exc
    if not isinstance(manifest, dict) or manifest.get("written_by") != WRITTEN_BY:
        raise OSError(refuse)
    files = manifest.get("files")
    if not isinstance(files, list) or not all(isinstance(f, str) for f in files):
        raise OSError(f"{folder / MANIFEST}: files: a list of file names")
    return files


class ReportWriter:
    """Streams findings into the report folder, writes the hand-over after the checks, then the summary and the page."""

    def __init__(self, folder: Path, *, ndjson: bool) -> None:
        prepare_folder(folder)
        self.folder = folder
        self._written: list[str] = []
        self._findings_file = self._open("findings.csv", "w", newline="", encoding="utf-8")
        self._findings = csv.writer(self._findings_file, lineterminator="\n")
        self._findings.writerow(FINDINGS_HEADER)
        self._ndjson = ndjson
        self._streams: dict[str, IO[bytes]] = {}

    def _open(self, name: str, mode: str, **options: Any) -> Any:
        """Open a file of the report, listing it in the manifest first (a killed run is still cleared next time)."""
        self._written.append(name)
        self._write_manifest()
        return open(self.folder / name, mode, **options)  # closed by hand_over() or finish()

    def _write_manifest(self) -> None:
        manifest = {"written_by": WRITTEN_BY, "version": __version__, "files": self._written}
        temporary = self.folder / (MANIFEST + ".tmp")
        temporary.write_bytes(orjson.dumps(manifest, option=orjson.OPT_INDENT_2) + b"\n")
        os.replace(temporary, self.folder / MANIFEST)

    def add(self, rows: Sequence[Row]) -> None:
        """Write one chunk's findings."""
        for row in rows:
            self._findings.writerows(_fields(f) for f in row.findings)

    def hand_over(self, records: Iterable[IndexedRecord], held: Mapping[tuple[str, str], tuple[str, ...]]) -> Answer:
        """Settle every record (ready, needs a decision, copy, unreadable) and write the hand-over when asked for.

        ``held``: per (source, test id), the codes of the checks across records that keep it out.
        """
        answer = Answer()
        quarantine: Any = None
        if self._ndjson:
            (self.folder / "ndjson").mkdir(exist_ok=True)
            quarantine_file = self._open("ndjson/quarantined.csv", "w", newline="", encoding="utf-8")
            quarantine = csv.writer(quarantine_file, lineterminator="\n")
            quarantine.writerow(QUARANTINE_HEADER)
        shared: set[tuple[str, str]] = set()
        try:
            for record in records:
                codes = tuple(sorted({*record.held, *held.get((record.source, record.test_id), ())}))
                verdict = answer.settle(record.readable, codes, record.first)
                if quarantine is None:
                    continue
                if verdict in ("unreadable", "decision"):
                    quarantine.writerow((record.file, record.record, record.source, record.test_id, " ".join(codes)))
                elif verdict == "ready":
                    self._write_ndjson(record.ndjson, shared)
        finally:
            for stream in self._streams.values():
                stream.close()
            if quarantine is not None:
                quarantine_file.close()
        return answer

    def _write_ndjson(self, lines: bytes, shared: set[tuple[str, str]]) -> None:
        for line in lines.splitlines():
            key = resource_key(line)
            if key[0] in SHARED_KINDS:
                if key in shared:
                    continue
                shared.add(key)
            stream = self._streams.get(key[0])
            if stream is None:
                stream = self._streams[key[0]] = self._open(f"ndjson/{key[0]}.ndjson", "wb")
            stream.write(line + b"\n")

    def finish(
        self, reduce: ArchiveReduce, archive: Sequence[AuditFinding], answer: Answer, run: Mapping[str, object]
    ) -> dict[str, object]:
        """Append the archive's findings, write ``summary.json`` and ``report.html``; the summary."""
        self._findings.writerows(_fields(f) for f in archive)
        self._findings_file.close()
        summary = summarise(reduce, answer, run)
        with self._open("summary.json", "wb") as handle:
            handle.write(orjson.dumps(summary, option=orjson.OPT_INDENT_2) + b"\n")
        with self._open("report.html", "w", encoding="utf-8") as handle:
            handle.write(page(summary, reduce))
        return summary


def _fields(finding: AuditFinding) -> tuple[str, ...]:
    return (finding.file, finding.record, finding.source, finding.test_id, finding.check, finding.severity,
            finding.message)  # fmt: skip


def summarise(reduce: ArchiveReduce, answer: Answer, run: Mapping[str, object]) -> dict[str, object]:
    """The machine summary: the answer, the run, counts by check, source and severity, the agreement figures."""
    by_source: dict[str, dict[str, int]] = {}
    for (source, check), n in sorted(reduce.by_source.items()):
        by_source.setdefault(source, {})[check] = n
    agreement = stats.dlco_agreement(reduce.plots)
    return {
        "caution": CAUTION,
        "run": dict(run),
        "files": reduce.files,
        "records": reduce.records,
        "skipped": reduce.skipped,
        "sessions_read": reduce.readable,
        "unreadable": answer.unreadable,
        "ready": answer.ready,
        "need_decision": answer.decision,
        "copies": answer.copies,
        "held_by_check": dict(sorted(answer.why.items())),
        "clean": reduce.clean,
        "findings": sum(reduce.by_check.values()),
        "findings_by_severity": dict(sorted(reduce.by_severity.items())),
        "findings_by_check": dict(sorted(reduce.by_check.items())),
        "findings_by_source": by_source,
        "dlco_reported_vs_recomputed": None
        if agreement is None
        else {
            "pairs": agreement.n,
            "bias": round(agreement.bias, 4),
            "lower_limit": round(agreement.lower, 4),
            "upper_limit": round(agreement.upper, 4),
            "unit": "mL/min/mmHg",
        },
    }
