"""Audit generated sessions and compare the speed with reading the same files and doing nothing.

Run: ``python benchmarks/bench_audit.py [--sessions 20000] [--workers 1,2] [--emit-ndjson] [--whole-report]``.

Generated sessions (``bench_convert.generate``: invented, varied from the bundled samples) are
written as files, 1,000 to a folder; with ``--whole-report`` each also carries the spirometry and
lung volumes of ``samples/11-whole-report.json``, scaled by one factor per session
(``bench_convert.with_whole_report``). Each measurement runs in a fresh child process:

* **floor**: walk the archive with the audit's own walker and read every file, nothing else
  (one process, one core);
* **audit, N workers**: ``run_audit`` exactly as ``dlco-bridge audit`` runs it (the pool of
  worker processes, the reduce, findings.csv, summary.json, report.html; NDJSON with
  ``--emit-ndjson``).

It prints sessions/s, sessions/s per core (per worker), the ratio to the floor, the speed-up
from 1 to 2 workers, and the peak memory: the largest sum of the resident set sizes of the
audit process and all its descendants, sampled every 50 ms from /proc (Linux). Targets (issue
12): >= 3,000 sessions/s per core, peak < 500 MB, close to linear from 1 to 2 workers.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

TARGET_PER_CORE = 3000
TARGET_PEAK_MB = 500
BATCH = 1000


def write_archive(root: Path, sessions: int, whole_report: bool = False) -> None:
    from bench_convert import generate, with_whole_report  # invented sessions, as the convert benchmark makes them

    for start in range(0, sessions, BATCH):
        folder = root / f"batch-{start // BATCH:04d}"
        folder.mkdir()
        batch = generate(min(BATCH, sessions - start), seed=start + 1)
        for i, data in enumerate(with_whole_report(batch, seed=start + 1) if whole_report else batch):
            (folder / f"{start + i:07d}.json").write_bytes(data)


def _rss_kb(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/status") as status:
            return next(int(line.split()[1]) for line in status if line.startswith("VmRSS:"))
    except (OSError, StopIteration):
        return 0


def _descendants(pid: int) -> list[int]:
    found, todo = [], [pid]
    while todo:
        current = todo.pop()
        found.append(current)
        try:
            for task in os.listdir(f"/proc/{current}/task"):
                with open(f"/proc/{current}/task/{task}/children") as children:
                    todo.extend(int(c) for c in children.read().split())
        except OSError:
            continue
    return found


class PeakMemory(threading.Thread):
    """The largest total RSS of this process and its descendants, sampled every 50 ms."""

    def __init__(self) -> None:
        super().__init__(daemon=True)
        self.peak_kb = 0
        self.done = threading.Event()

    def run(self) -> None:
        while not self.done.wait(0.05):
            self.peak_kb = max(self.peak_kb, sum(_rss_kb(p) for p in _descendants(os.getpid())))


def child(kind: str, root: Path, workers: int, emit: bool) -> dict[str, float]:
    """One measurement in this (fresh) process."""
    from bridge.audit.run import AuditSettings, Job, run_audit
    from bridge.inputs import find_inputs, read_input
    from bridge.pipeline import PipelineSettings
    from bridge.tables.field_map_model import MapChoice

    sampler = PeakMemory()
    sampler.start()
    started = time.perf_counter()
    if kind == "floor":
        found = (f.path for f in find_inputs([root], MapChoice()) if f.skipped is None)
        files = sum(1 for path in found if read_input(path, 1 << 22) is not None)
    else:
        job = Job(PipelineSettings(), 2.987, "traditional", datetime.now(UTC), emit)
        with tempfile.TemporaryDirectory() as report:
            summary = run_audit([root], Path(report), job, AuditSettings(workers=workers))
        files = int(str(summary["files"]))
    elapsed = time.perf_counter() - started
    sampler.done.set()
    sampler.join()
    return {"files": files, "seconds": elapsed, "peak_mb": sampler.peak_kb / 1024}


def measure(kind: str, root: Path, workers: int, emit: bool) -> dict[str, float]:
    command = [sys.executable, __file__, "--child", kind, str(root), str(workers)] + (["--emit-ndjson"] if emit else [])
    done = subprocess.run(command, capture_output=True, text=True, check=True)
    result: dict[str, float] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sessions", type=int, default=20000)
    parser.add_argument("--workers", default="1,2", help="worker counts to measure, comma-separated")
    parser.add_argument("--emit-ndjson", action="store_true", help="also write the clean sessions as NDJSON")
    parser.add_argument(
        "--whole-report",
        action="store_true",
        help="give every session the spirometry and lung volumes of samples/11 (scaled), as bench_convert does",
    )
    parser.add_argument("--child", nargs=3, metavar=("KIND", "ROOT", "WORKERS"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        kind, root, workers = args.child
        print(json.dumps(child(kind, Path(root), int(workers), args.emit_ndjson)))
        return
    counts = [int(n) for n in args.workers.split(",")]
    with tempfile.TemporaryDirectory() as folder:
        root = Path(folder)
        kind = "whole-report" if args.whole_report else "DLCO-only"
        print(f"writing {args.sessions:,} generated {kind} sessions ...", flush=True)
        write_archive(root, args.sessions, args.whole_report)
        floor = measure("floor", root, 1, False)
        floor_rate = floor["files"] / floor["seconds"]
        print(f"floor (walk + read, 1 process): {floor_rate:,.0f} files/s, peak {floor['peak_mb']:.0f} MB")
        rates = {}
        for workers in counts:
            run = measure("audit", root, workers, args.emit_ndjson)
            rate = run["files"] / run["seconds"]
            rates[workers] = rate
            per_core = rate / workers
            print(
                f"audit, {workers} worker(s): {rate:,.0f} sessions/s, {per_core:,.0f} per core "
                f"(target >= {TARGET_PER_CORE:,}: {'met' if per_core >= TARGET_PER_CORE else 'not met'}), "
                f"{floor_rate / per_core:.1f}x the floor per core, peak {run['peak_mb']:.0f} MB "
                f"(target < {TARGET_PEAK_MB}: {'met' if run['peak_mb'] < TARGET_PEAK_MB else 'not met'})"
            )
        if 1 in rates and 2 in rates:
            print(f"speed-up 1 -> 2 workers: {rates[2] / rates[1]:.2f}x (linear: 2.00x)")
    print(f"{os.cpu_count()} CPUs; CPython {sys.version.split()[0]}; {args.sessions:,} sessions")


if __name__ == "__main__":
    main()
