"""The audit's shell: walk the archive, map the one pipeline over its files in worker processes.

Owns walking (``os.scandir``, iteratively: no recursion limit, one folder open at a time,
no listing held whole), chunking, the bounded pool of worker processes
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
import sys
import time
from collections import deque
from collections.abc import Iterable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path
from typing import Any, TextIO

from bridge.audit.index import ArchiveIndex
from bridge.audit.reduce import ArchiveReduce, held_by_archive
from bridge.audit.report import ReportWriter
from bridge.audit.rows import Row, row_of, row_of_error
from bridge.errors import InputError, ProcessingFailed, UnreadableInput
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


def walk(paths: Iterable[Path]) -> Iterator[str]:
    """Every file under ``paths`` (hidden names skipped, symlinked folders not followed).

    Iterative, one ``os.scandir`` open at a time; a folder that cannot be listed is yielded
    itself, so that reading it becomes a finding rather than a crash.
    """
    for top in paths:
        if not top.is_dir():
            yield str(top)
            continue
        folders = [str(top)]
        while folders:
            folder = folders.pop()
            try:
                with os.scandir(folder) as entries:
                    for entry in entries:
                        if entry.name.startswith("."):
                            continue
                        if entry.is_dir(follow_symlinks=False):
                            folders.append(entry.path)
                        else:
                            yield entry.path
            except OSError:
                yield folder


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


def read_file(path: str, limit: int) -> bytes:
    """The bytes of one file; anything the file system refuses is an :class:`UnreadableInput`."""
    try:
        with open(path, "rb") as handle:
            data = handle.read(limit + 1)
    except OSError as exc:
        raise UnreadableInput("(file)", f"a readable file ({exc.strerror or exc})", path) from exc
    if len(data) > limit:
        raise UnreadableInput("(file)", f"at most {limit} bytes", path)
    return data


def audit_file(path: str, job: Job, tables: Tables) -> list[Row]:
    """One file through the one pipeline and the site's gate: a row per session (or refusal).

    A file read through a field map may hold many sessions (numbered rows: the record within
    the file); each bad record is a row of its own. A session the gate refuses keeps its
    findings (the error carries the checked record) and names the codes that held it.
    """
    rows: list[Row] = []
    routes = (Route("ndjson", job.units),) if job.emit_ndjson else ()
    try:
        data = read_file(path, job.pipeline.max_input_bytes)
        maps = _maps(job.map_default, job.map_patterns, job.traditional_per_si)
        pipeline = replace(job.pipeline, field_map=maps.for_file(os.path.basename(path)))
        many = pipeline.field_map is not None
        for number, result in enumerate(
            process_all(data, path, tables, pipeline, now=job.now, routes=routes, gate=True), start=1
        ):
            rows.append(_row(result, path, str(number) if many else ""))
    except InputError as exc:  # the file as a whole (or, for a map that refuses bad records, its first bad one)
        rows.append(_row(exc, path, str(len(rows) + 1) if rows or exc.outcome is not None else ""))
    except Exception as exc:  # one file must never stop the others
        rows.append(row_of_error(ProcessingFailed.wrapping(exc, path), path))
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
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
        pending: deque[Future[ChunkResult]] = deque()
        for chunk in chunks:
            pending.append(pool.submit(audit_chunk, chunk, job))
            if len(pending) >= ahead:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


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
    reduce = ArchiveReduce()
    shown = Progress(progress)
    with ArchiveIndex(report) as index:
        try:
            chunks = chunked(walk(paths), settings.chunk_files)
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


def terminal(stream: TextIO = sys.stderr) -> TextIO | None:
    """``stream`` when it is a terminal (the progress line), else None (quiet)."""
    return stream if stream.isatty() else None
