"""Read CSV exports and legacy HL7 v2 feeds through their field maps, beside two floors measured in the same run.

Run: ``python benchmarks/bench_readers.py [--rows 100000] [--messages 20000] [--stream-rows 1000000] [--json]``.

What it measures, on one core in one process, with generated (invented) inputs built from the
two legacy samples (``samples/legacy/``) by changing test ids and patient ids:

* **CSV**: ``read_csv`` with ``mappings/maps/lowmarsh-csv.toml`` over ``--rows`` rows, one per
  manoeuvre (three per session): rows/s and sessions/s. Floor 1: the stdlib ``csv.reader``
  alone over the same bytes (decode and split, nothing mapped). Floor 2: the rest of the
  pipeline (derive, checks: what ``check`` does after reading and normalising) on the sessions read,
  per session. Target: applying the map costs no more per session than the rest of the pipeline.
* **HL7**: ``read_hl7`` with ``mappings/maps/highcairn-hl7v23.toml`` over ``--messages``
  messages: messages/s. Floor 1: python-hl7's ``hl7.parse`` alone on the same messages (already
  split). Floor 2: the rest of the pipeline on the sessions read.
* **Memory**: ``read_csv_lines`` over ``--stream-rows`` rows generated line by line (never held
  in memory), peak RSS after a tenth of them and after all: flat means streaming. Measured
  first, before the other parts hold their inputs (peak RSS only ever grows).

Timing: ``time.perf_counter``, one pass after a small warm-up; sessions are counted as they
stream and only the first 5,000 kept (for the rest of the pipeline), as a streaming caller
would. This is a script, not a test.
"""

from __future__ import annotations

import argparse
import csv
import io
import itertools
import json
import platform
import resource
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, TypeVar
from zoneinfo import ZoneInfo

import hl7

from bridge.model import Session
from bridge.readers.csv_export import read_csv, read_csv_lines
from bridge.readers.hl7v2_legacy import messages, read_hl7
from bridge.readers.mapped import MappedRecord
from bridge.science.checks import run_checks
from bridge.science.derive import derive
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.tables.field_map_parser import field_map
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parent.parent
CSV_MAP = ROOT / "mappings" / "maps" / "lowmarsh-csv.toml"
HL7_MAP = ROOT / "mappings" / "maps" / "highcairn-hl7v23.toml"
CSV_SAMPLE = ROOT / "samples" / "legacy" / "lowmarsh-results.csv"
HL7_SAMPLE = ROOT / "samples" / "legacy" / "highcairn-results.hl7"
T = TypeVar("T")
REST_SUBSET = 5000  # sessions the rest of the pipeline runs on (per-session cost)


def _csv_lines(rows: int) -> Iterator[str]:
    """Header, then ``rows`` rows: the sample's three manoeuvre rows of LOW-2026-0003 under new test ids."""
    text = CSV_SAMPLE.read_bytes().decode("latin-1")
    lines = text.splitlines(keepends=True)
    template = [line for line in lines[1:] if line.startswith("LOW-2026-0003")]
    yield lines[0]
    for n in range(rows):
        yield template[n % 3].replace("LOW-2026-0003", f"GEN-{n // 3:07d}").replace("FICT-1006", f"FICT-{n // 3:07d}")


def _csv_bytes(rows: int) -> bytes:
    return "".join(_csv_lines(rows)).encode("latin-1")


def _hl7_bytes(count: int) -> bytes:
    sample = HL7_SAMPLE.read_text(encoding="utf-8")
    parts = ["MSH" + p for p in sample.split("MSH")[1:]]
    out = []
    for n in range(count):
        out.append(parts[n % len(parts)].replace("|HC-", f"|G{n:06d}-").replace("FICT-", f"F{n:06d}-"))
    return "".join(out).encode("utf-8")


def _rss_mib() -> float:
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / 1024 / (1024 if sys.platform == "darwin" else 1)


def _timed(run: Callable[[], T]) -> tuple[float, T]:
    start = time.perf_counter()
    result = run()
    return time.perf_counter() - start, result


def _kept(records: Iterator[MappedRecord]) -> tuple[int, list[Session]]:
    """How many sessions were read, and the first REST_SUBSET of them (holding all would time the GC)."""
    count, kept = 0, []
    for record in records:
        assert record.session is not None, record.error
        count += 1
        if len(kept) < REST_SUBSET:
            kept.append(record.session)
    return count, kept


def _rest(sessions: list[Session], tables: Tables) -> float:
    """Seconds per session for derive -> checks (a reader's sessions come out normalised)."""
    subset = sessions[:REST_SUBSET]
    start = time.perf_counter()
    for session in subset:
        run_checks(session, derive(session, tables), tables)
    return (time.perf_counter() - start) / len(subset)


def bench_csv(rows: int, fmap: FieldMap, tables: Tables) -> dict[str, float]:
    data = _csv_bytes(rows)
    list(read_csv(_csv_bytes(30), "warm.csv", fmap, tables.units))
    floor_s, _ = _timed(
        lambda: sum(1 for _ in csv.reader(io.StringIO(data.decode("latin-1"), newline=""), delimiter=";"))
    )
    real_s, (count, sessions) = _timed(lambda: _kept(read_csv(data, "gen.csv", fmap, tables.units)))
    per_session_map = real_s / count
    per_session_rest = _rest(sessions, tables)
    return {
        "rows": rows,
        "sessions": count,
        "rows_per_s": rows / real_s,
        "floor_csv_reader_rows_per_s": rows / floor_s,
        "ratio_to_csv_reader": real_s / floor_s,
        "map_ms_per_session": per_session_map * 1000,
        "beyond_floor_ms_per_session": (real_s - floor_s) / count * 1000,
        "rest_of_pipeline_ms_per_session": per_session_rest * 1000,
        "map_over_rest": per_session_map / per_session_rest,
    }


def bench_hl7(count: int, fmap: FieldMap, tables: Tables) -> dict[str, float]:
    data = _hl7_bytes(count)
    split = ["\r".join(segments) for segments in messages(data.decode("utf-8"))]
    list(read_hl7(_hl7_bytes(20), "warm.hl7", fmap, tables.units))
    floor_s, _ = _timed(lambda: sum(1 for m in split if hl7.parse(m)))
    real_s, (read, sessions) = _timed(lambda: _kept(read_hl7(data, "gen.hl7", fmap, tables.units)))
    assert read == count, "every generated message maps"
    per_session_map = real_s / count
    per_session_rest = _rest(sessions, tables)
    return {
        "messages": count,
        "messages_per_s": count / real_s,
        "floor_hl7_parse_messages_per_s": count / floor_s,
        "ratio_to_hl7_parse": real_s / floor_s,
        "map_ms_per_session": per_session_map * 1000,
        "beyond_floor_ms_per_session": (real_s - floor_s) / count * 1000,
        "rest_of_pipeline_ms_per_session": per_session_rest * 1000,
        "map_over_rest": per_session_map / per_session_rest,
    }


def bench_stream(rows: int, fmap: FieldMap, tables: Tables) -> dict[str, float]:
    """Peak RSS after a tenth of the rows and after all of them, streamed line by line."""
    records = read_csv_lines(_csv_lines(rows), "stream.csv", fmap, tables.units)
    tenth = sum(1 for _ in itertools.islice(records, rows // 30))
    at_tenth = _rss_mib()
    start = time.perf_counter()
    rest = sum(1 for _ in records)
    seconds = time.perf_counter() - start
    return {
        "rows": rows,
        "sessions": tenth + rest,
        "peak_rss_mib_after_tenth": at_tenth,
        "peak_rss_mib_after_all": _rss_mib(),
        "rows_per_s_rest": (rows - rows // 10) / seconds,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--messages", type=int, default=20_000)
    parser.add_argument("--stream-rows", type=int, default=1_000_000)
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(argv)
    tables = load_tables()
    csv_map = field_map(CSV_MAP.read_text(encoding="utf-8"), CSV_MAP.name, tables.units, ZoneInfo)
    hl7_map = field_map(HL7_MAP.read_text(encoding="utf-8"), HL7_MAP.name, tables.units, ZoneInfo)
    # The stream first: peak RSS is a high-water mark, so it is read before anything else is held.
    report: dict[str, Any] = {
        "machine": f"{platform.python_implementation()} {platform.python_version()}, {platform.machine()}",
        "stream": bench_stream(args.stream_rows, csv_map, tables),
        "csv": bench_csv(args.rows, csv_map, tables),
        "hl7": bench_hl7(args.messages, hl7_map, tables),
    }
    if args.json:
        print(json.dumps(report))
        return 0
    c, h, s = report["csv"], report["hl7"], report["stream"]
    print(f"dlco-bridge field-map readers ({report['machine']})")
    floor = c["floor_csv_reader_rows_per_s"]
    print(f"CSV  {c['rows']:,} rows ({c['sessions']:,} sessions): {c['rows_per_s']:,.0f} rows/s; "
          f"stdlib csv.reader alone {floor:,.0f} rows/s (x{c['ratio_to_csv_reader']:.1f})")  # fmt: skip
    floor = h["floor_hl7_parse_messages_per_s"]
    print(f"HL7  {h['messages']:,} messages: {h['messages_per_s']:,.0f} messages/s; python-hl7 parse alone "
          f"{floor:,.0f} messages/s (x{h['ratio_to_hl7_parse']:.1f})")  # fmt: skip
    for name, part in (("CSV", c), ("HL7", h)):
        rest = part["rest_of_pipeline_ms_per_session"]
        print(f"{name:<4} read {part['map_ms_per_session']:.3f} ms/session ({part['beyond_floor_ms_per_session']:.3f} "
              f"beyond the floor) vs rest of pipeline {rest:.3f} ms/session: read/rest = {part['map_over_rest']:.2f} "
              "(target <= 1)")  # fmt: skip
    tenth, whole = s["peak_rss_mib_after_tenth"], s["peak_rss_mib_after_all"]
    print(f"stream {s['rows']:,} rows ({s['sessions']:,} sessions): peak RSS {tenth:.0f} MiB after a tenth, "
          f"{whole:.0f} MiB after all ({s['rows_per_s_rest']:,.0f} rows/s)")  # fmt: skip
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
