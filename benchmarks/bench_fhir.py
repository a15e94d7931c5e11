"""Time the FHIR emitter: building and serialising one transaction Bundle per sample.

Run: ``python benchmarks/bench_fhir.py``. Prints the median time per Bundle for dict
building (to_bundle) and for the JSON bytes (bundle_json). Invented sample data only.
"""

from __future__ import annotations

import statistics
import timeit
from datetime import UTC, datetime
from pathlib import Path

from bridge.emit.fhir import bundle_json, to_bundle
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.pipeline import process
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parents[1]


def main(repeat: int = 5, number: int = 200) -> None:
    tables = load_tables()
    context = EmitContext(
        now=datetime(2026, 3, 10, 12, tzinfo=UTC), site=EmitSettings(patient_reference="conditional-create")
    )
    for path in sorted(ROOT.glob("samples/0[1-79]*.json")):
        outcome = process(path.read_bytes(), path.name, tables)
        for name, func in (("to_bundle", to_bundle), ("bundle_json", bundle_json)):
            times = timeit.repeat(lambda f=func, o=outcome: f(o, tables, context), repeat=repeat, number=number)
            per_call_ms = statistics.median(times) / number * 1000
            print(f"{path.stem:36} {name:12} {per_call_ms:7.3f} ms")


if __name__ == "__main__":
    main()
