"""The audit's shell: walk the archive, map the one pipeline over its files in worker processes.

Owns chunking the files :func:`bridge.inputs.find_inputs` finds under the archive (the folder
and skip rule of every command: to any depth, one folder listed at a time, the skipped files
counted), the bounded pool of worker processes
(``concurrent.futures.ProcessPoolExecutor``), what one worker does with one file
(:func:`audit_file`: read, :func:`bridge.pipeline.process_all` through the site's gate, with the
``ndjson`` route when the hand-over is asked for, one row per session),
the same map on an existing Dask cluster (:func:`map_dask`), the progress line on a terminal,
and the order results are taken in: the order of the walk, whatever the number of workers or
the scheduler, so that a run's files are the same for 1 or N workers, local or on a cluster.
After the walk: the checks across records, then the hand-over (NDJSON and ``quarantined.csv``,
written only now, so that a conflicting test id is kept out of it), then the page.
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
from dataclasses import dataclass
from datetime import datetime
from multiprocessing import forkserver
from pathlib import Path
from typing import Any, TextIO

from bridge.audit.index import ArchiveIndex
from bridge.audit.reduce import ArchiveReduce, held_by_archive
from bridge.audit.report import ReportWriter
from bridge.audit.rows import Row, row_of, row_of_error
from bridge.errors import InputError
from bridge.inputs import each_input, find_inputs
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, Route, process_all
from bridge.science.units import UnitSystem
from bridge.tables import Tables
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_map_choice, load_tables
from bridge.version import __version__

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
    """The rows of one chunk (each with its hand-over, when asked for), in the chunk's order, and its file count."""

    rows: tuple[Row, ...]
    files: int


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


def audit_file(path: str, job: Job, tables: Tables) -> list[Row]:
    """One file through the one pipeline and the site's gate: a row per session (or refusal).

    A file read through a field map may hold many sessions (numbered rows: the record within
    the file); each bad record is a row of its own. A session the gate refuses keeps its
    findings (the error carries the checked record) and names the codes that held it. Reading
    the file and the guard that keeps one file from stopping the others are
    :func:`bridge.inputs.each_input`'s, as for ``check`` and ``convert``.
    """
    routes = (Route("ndjson", job.units),) if job.emit_ndjson else ()

    def work(data: bytes) -> Iterator[tuple[Outcome | InputError, bool]]:
        maps = _maps(job.map_default, job.map_patterns, job.traditional_per_si)
        pipeline = job.pipeline.reading_with(maps.for_file(os.path.basename(path)))
        many = pipeline.field_map is not None
        for result in process_all(data, path, tables, pipeline, now=job.now, routes=routes, gate=True):
            yield result, many  # a record of the file (numbered when the file may hold many)

    rows: list[Row] = []
    for item in each_input(Path(path), job.pipeline.max_input_bytes, work):
        # An error of the file as a whole (or, for a map that refuses bad records, its first bad one)
        if isinstance(item, InputError):
            rows.append(_row(item, path, str(len(rows) + 1) if rows or item.outcome is not None else ""))
            continue
        result, many = item
        rows.append(_row(result, path, str(len(rows) + 1) if many else ""))
    return rows


def _row(result: Outcome | InputError, path: str, record: str) -> Row:
    if isinstance(result, Outcome):
        return row_of(result, path, record)
    if isinstance(result.outcome, Outcome):  # refused at the gate, or while building its hand-over
        return row_of(result.outcome, path, record, refused=result)
    return row_of_error(result, path, record)


def audit_chunk(files: Sequence[str], job: Job) -> ChunkResult:
    """What a worker does with one chunk (a top-level function: it is pickled by name)."""
    tables = _tables(job.traditional_per_si)
    rows = [row for path in files for row in audit_file(path, job, tables)]
    return ChunkResult(tuple(rows), len(files))


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
    folder cannot be written (or is not empty and holds no earlier report), or the scheduler
    cannot be reached.
    """
    writer = ReportWriter(report, ndjson=job.emit_ndjson)
    reduce = ArchiveReduce(traditional_per_si=job.traditional_per_si)
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
                reduce.add_files(result.files)
                for row in result.rows:
                    reduce.add(row)
                index.add(result.rows)
                writer.add(result.rows)
                shown.advance(result.files)
        finally:
            shown.close()
        archive = reduce.finish(index.contents(), index.patients())
        answer = writer.hand_over(index.records(), held_by_archive(archive, job.pipeline.blocking, job.pipeline.allow))
    return writer.finish(reduce, archive, answer, about_the_run(paths, job))


def about_the_run(paths: Sequence[Path], job: Job) -> dict[str, object]:
    """The settings, paths, tool version and date of a run, as the page and summary.json show them.

    Not the number of workers or the scheduler: 1 or N workers, local or on a cluster, write the same files.
    """
    pipeline = job.pipeline
    maps = [str(job.map_default)] if job.map_default is not None else []
    maps += [f"{pattern} = {path}" for pattern, path in job.map_patterns]
    return {
        "tool": f"dlco-bridge {__version__}",
        "date": job.now.isoformat(timespec="seconds"),
        "paths": [str(p) for p in paths],
        "field_maps": maps,
        "units": job.units,
        "traditional_per_si": job.traditional_per_si,
        "allow": sorted(pipeline.allow),
        "blocking": sorted(pipeline.blocking),
        "reference_basis": pipeline.reference_basis,
        "repeatability": pipeline.repeatability,
        "hand_over": "ndjson" if job.emit_ndjson else "none",
    }


def terminal(stream: TextIO | None = None) -> TextIO | None:
    """``stream`` (standard error as it is now) when it is a terminal (the progress line), else None (quiet)."""
    stream = sys.stderr if stream is None else stream
    return stream if stream.isatty() else None
