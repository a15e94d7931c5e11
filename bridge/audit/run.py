"""The audit's shell: walk the archive, map the one pipeline over its files in worker processes.

Owns chunking the files :func:`bridge.inputs.find_inputs` finds under the archive (the folder
and skip rule of every command: to any depth, one folder listed at a time, the skipped files
counted), the bounded pool of worker processes
(``concurrent.futures.ProcessPoolExecutor``), what one worker does with one file
(:func:`audit_file`: read, :func:`bridge.pipeline.process`, row, NDJSON of a clean session),
the same map on an existing Dask cluster (:func:`map_dask`), the progress line on a terminal,
and the order results are taken in: the order of the walk, whatever the number of workers or
the scheduler, so that a run's files are the same for 1 or N workers, local or on a cluster.

Extension point for field maps (``--map``): a worker reads every file through
:func:`audit_file`, which calls the one pipeline with the job's settings; when the pipeline
accepts a field map, the map goes on :class:`Job` and nowhere else changes.
"""

from __future__ import annotations

import functools
import multiprocessing
import os
import signal
import sys
import threading
import time
from collections import deque
from collections.abc import Iterable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass, replace
from datetime import datetime
from multiprocessing import forkserver
from pathlib import Path
from typing import Any, TextIO

from bridge.audit.index import ArchiveIndex
from bridge.audit.reduce import ArchiveReduce
from bridge.audit.report import ReportWriter
from bridge.audit.rows import Row, row_of, row_of_error
from bridge.emit.fhir_ndjson import to_ndjson
from bridge.errors import InputError
from bridge.inputs import each_input, find_inputs
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.science.reference import ReferenceEquations
from bridge.science.units import UnitSystem
from bridge.tables import Tables
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_map_choice, load_reference_equations, load_tables

DEFAULT_WORKERS = os.cpu_count() or 1  # one worker per CPU


@dataclass(frozen=True, slots=True)
class AuditSettings:
    """How the audit runs (defaults written here once; ``--help`` shows them)."""

    workers: int = DEFAULT_WORKERS  # worker processes
    chunk_files: int = 250  # files a worker takes at a time
    in_flight_per_worker: int = 2  # chunks submitted ahead per worker: bounds memory
    emit_ndjson: bool = False


@dataclass(frozen=True, slots=True)
class Job:
    """What a worker needs besides the files; sent with every chunk (small, picklable)."""

    pipeline: PipelineSettings
    traditional_per_si: float
    units: UnitSystem
    now: datetime  # read once by the shell: every resource of the run carries the same time
    emit_ndjson: bool
    # The field maps by file path (--map / map, and [maps]); each worker reads them once. None and
    # no patterns: every input is dlco-result/1 JSON.
    map_default: Path | None = None
    map_patterns: tuple[tuple[str, Path], ...] = ()


@dataclass(frozen=True, slots=True)
class ChunkResult:
    """The rows of one chunk, in the chunk's order, and the NDJSON of its clean sessions."""

    rows: tuple[Row, ...]
    ndjson: tuple[tuple[str, bytes], ...]  # (resource type, lines), resource types sorted


def chunked(files: Iterable[str], size: int) -> Iterator[list[str]]:
    """Consecutive lists of at most ``size`` files."""
    chunk: list[str] = []
    for file in files:
        chunk.append(file)
        if len(chunk) >= size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


@functools.cache
def _tables(traditional_per_si: float) -> Tables:
    """The tables, loaded once per worker process."""
    return load_tables(traditional_per_si=traditional_per_si)


@functools.cache
def _maps(default: Path | None, patterns: tuple[tuple[str, Path], ...], traditional_per_si: float) -> MapChoice:
    """The field maps, read once per worker process."""
    return load_map_choice(default, patterns, _tables(traditional_per_si))


@functools.cache
def _equations() -> ReferenceEquations:
    """The GLI-2017 reference equations, loaded once per worker process."""
    return load_reference_equations()


def audit_file(
    path: str, job: Job, tables: Tables, equations: ReferenceEquations | None = None
) -> tuple[list[Row], dict[str, bytes]]:
    """One file through the one pipeline: a row per session (or refusal), and the NDJSON of the clean ones.

    A file read through a field map may hold many sessions; each bad record is a row of its own.
    Reading it and the guard that keeps one file from stopping the others are
    :func:`bridge.inputs.each_input`'s, as for ``check`` and ``convert``.
    """

    def work(data: bytes) -> Iterator[tuple[Row, Outcome | None]]:
        maps = _maps(job.map_default, job.map_patterns, job.traditional_per_si)
        pipeline = replace(job.pipeline, field_map=maps.for_file(os.path.basename(path)))
        for result in process_all(data, path, tables, pipeline, now=job.now):
            if isinstance(result, InputError):
                yield row_of_error(result, path), None
                continue
            row = row_of(result, path, equations)
            yield row, result if job.emit_ndjson and row.clean else None

    rows: list[Row] = []
    clean = []
    for item in each_input(Path(path), job.pipeline.max_input_bytes, work):
        if isinstance(item, InputError):
            rows.append(row_of_error(item, path))
            continue
        row, outcome = item
        rows.append(row)
        if outcome is not None:
            clean.append(outcome)
    if not clean:
        return rows, {}
    return rows, to_ndjson(clean, tables, job.pipeline.emit.context(job.now, job.units, False))


def audit_chunk(files: Sequence[str], job: Job) -> ChunkResult:
    """What a worker does with one chunk (a top-level function: it is pickled by name)."""
    tables, equations = _tables(job.traditional_per_si), _equations()
    rows = []
    ndjson: dict[str, list[bytes]] = {}
    for path in files:
        file_rows, lines = audit_file(path, job, tables, equations)
        rows.extend(file_rows)
        for kind, text in lines.items():
            ndjson.setdefault(kind, []).append(text)
    return ChunkResult(tuple(rows), tuple((kind, b"".join(parts)) for kind, parts in sorted(ndjson.items())))


def map_local(chunks: Iterable[list[str]], job: Job, settings: AuditSettings) -> Iterator[ChunkResult]:
    """Chunks through a pool of worker processes; results in submission order, a bounded number ahead."""
    workers = max(1, settings.workers)
    ahead = workers * max(1, settings.in_flight_per_worker)
    context = multiprocessing.get_context("forkserver")
    # Ctrl-C reaches every process of the terminal's group: this one answers it (one line, the
    # CLI's exit 130); the workers, and the server that forks them, start deaf to it, so none
    # prints a traceback of its own.
    if threading.current_thread() is threading.main_thread():  # only the main thread may set handlers
        previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
        try:
            forkserver.ensure_running()
        finally:
            signal.signal(signal.SIGINT, previous)
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_deaf_to_interrupts)
    try:
        pending: deque[Future[ChunkResult]] = deque()
        for chunk in chunks:
            pending.append(pool.submit(audit_chunk, chunk, job))
            if len(pending) >= ahead:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()
    except BaseException:
        pool.shutdown(wait=True, cancel_futures=True)  # interrupted or failed: no chunk is started after this
        raise
    pool.shutdown(wait=True)


def _deaf_to_interrupts() -> None:
    """A worker leaves Ctrl-C to the process that started it (which stops the pool)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def map_dask(chunks: Iterable[list[str]], job: Job, settings: AuditSettings, address: str) -> Iterator[ChunkResult]:
    """The same chunks through an existing Dask cluster (the ``[scale]`` extra), results in submission order.

    Every worker must see the files at the same paths (a shared file system). Raises
    ``OSError`` when the scheduler cannot be reached.
    """
    try:
        from distributed import Client
    except ImportError as exc:
        raise OSError(f"--scheduler needs Dask: pip install 'dlco-bridge[scale]' ({exc})") from exc
    with Client(address, set_as_default=False) as client:  # type: ignore[no-untyped-call]  # untyped upstream
        workers = max(1, len(client.scheduler_info()["workers"]))
        ahead = workers * max(1, settings.in_flight_per_worker)
        pending: deque[Any] = deque()
        for chunk in chunks:
            pending.append(client.submit(audit_chunk, chunk, job, pure=False))
            if len(pending) >= ahead:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


class Progress:
    """A progress line on a terminal (files and files/s), at most a few times a second; silent otherwise."""

    def __init__(self, stream: TextIO | None) -> None:
        self.stream = stream
        self.files = 0
        self.started = self.shown = time.monotonic()

    def advance(self, files: int) -> None:
        self.files += files
        now = time.monotonic()
        if self.stream is not None and now - self.shown >= 0.25:
            self.shown = now
            self._show(now)

    def close(self) -> None:
        if self.stream is not None:
            self._show(time.monotonic())
            self.stream.write("\n")

    def _show(self, now: float) -> None:
        assert self.stream is not None
        rate = self.files / max(now - self.started, 1e-9)
        self.stream.write(f"\raudit: {self.files:,} files, {rate:,.0f} files/s")
        self.stream.flush()


def run_audit(
    paths: Sequence[Path],
    report: Path,
    job: Job,
    settings: AuditSettings = AuditSettings(),
    *,
    progress: TextIO | None = None,
    scheduler: str | None = None,
) -> dict[str, object]:
    """Audit every file under ``paths`` and write the report folder; returns the summary written.

    ``scheduler``: the address of a Dask scheduler to run on instead of local processes (the
    files written are the same). Raises ``OSError`` when the audit could not run: the report
    folder cannot be written, or the scheduler cannot be reached.
    """
    writer = ReportWriter(report, ndjson=job.emit_ndjson)
    reduce = ArchiveReduce()
    shown = Progress(progress)
    maps = _maps(job.map_default, job.map_patterns, job.traditional_per_si)

    def inputs() -> Iterator[str]:
        for found in find_inputs(paths, maps):
            if found.skipped is None:
                yield str(found.path)
            else:
                reduce.skipped += 1

    with ArchiveIndex(report) as index:
        try:
            chunks = chunked(inputs(), settings.chunk_files)
            results = (
                map_local(chunks, job, settings) if scheduler is None else map_dask(chunks, job, settings, scheduler)
            )
            for result in results:
                for row in result.rows:
                    reduce.add(row)
                index.add(result.rows)
                writer.add(result.rows, result.ndjson)
                shown.advance(len(result.rows))
        finally:
            shown.close()
            writer.close_streams()
        archive = reduce.finish(index.contents(), index.patients())
    return writer.finish(reduce, archive)


def terminal(stream: TextIO | None = None) -> TextIO | None:
    """``stream`` (standard error as it is now) when it is a terminal (the progress line), else None (quiet)."""
    stream = sys.stderr if stream is None else stream
    return stream if stream.isatty() else None
