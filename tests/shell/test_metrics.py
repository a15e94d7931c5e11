"""/metrics as prometheus_client writes it, read back by the library's own text parser.

source: Prometheus "Exposition formats", text format 0.0.4 (counter ``_total``, histogram
``_bucket{le}`` cumulative with ``+Inf`` equal to ``_count``, label values escaped).
"""

from __future__ import annotations

from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families

from bridge.service.files import Disk
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.service.space import Space
from tests.shell.conftest import Clock


def _families(text: str) -> dict[str, list[tuple[str, dict[str, str], float]]]:
    return {f.name: [(s.name, s.labels, s.value) for s in f.samples] for f in text_string_to_metric_families(text)}


def test_latency_lands_in_cumulative_buckets_from_file_complete_to_acknowledgement(tmp_path: Path) -> None:
    """Files complete at t, acknowledged at t+0.3 s and t+7 s; one enqueued before a restart is counted, not timed."""
    clock = Clock(start=1000.0)
    metrics = Metrics(clock)
    metrics.note_enqueued("m-1", 1000.0)
    metrics.note_enqueued("m-2", 1000.0)
    clock.advance(0.3)
    metrics.note_delivered("records", "m-1")
    clock.advance(6.7)
    metrics.note_delivered("records", "m-2")
    metrics.note_delivered("records", "from-before-a-restart")
    with Ledger.open(tmp_path / "ledger.sqlite3") as ledger:
        families = _families(metrics.render(ledger.summary()))

    buckets = {s[1]["le"]: s[2] for s in families["dlco_bridge_delivery_latency_seconds"] if s[0].endswith("_bucket")}
    # By hand: 0.3 s is in every bucket from le=0.5 up; 7.0 s in every bucket from le=10 up.
    assert {"0.25": 0, "0.5": 1, "5.0": 1, "10.0": 2, "300.0": 2, "+Inf": 2} == {
        le: buckets[le] for le in ("0.25", "0.5", "5.0", "10.0", "300.0", "+Inf")
    }
    totals = {s[0]: s[2] for s in families["dlco_bridge_delivery_latency_seconds"] if not s[0].endswith("_bucket")}
    assert (2, 7.3) == (totals["dlco_bridge_delivery_latency_seconds_count"],
                        round(totals["dlco_bridge_delivery_latency_seconds_sum"], 6))  # fmt: skip
    # Three acknowledged (the one from before the restart too), two of them timed.
    assert [("dlco_bridge_delivered_total", {"destination": "records"}, 3)] == families["dlco_bridge_delivered"]


def test_each_service_has_its_own_registry_and_no_created_series(tmp_path: Path) -> None:
    """Two Metrics count apart (no process-wide registry); only the documented series, no ``_created``."""
    first, second = Metrics(Clock()), Metrics(Clock())
    first.count("files_seen")
    first.count("files_seen")
    second.count("files_seen")
    with Ledger.open(tmp_path / "ledger.sqlite3") as ledger:
        text = first.render(ledger.summary())

    assert (2, 1) == tuple(m.registry.get_sample_value("dlco_bridge_files_seen_total") for m in (first, second))
    assert [("dlco_bridge_files_seen_total", {}, 2)] == _families(text)["dlco_bridge_files_seen"]
    assert "_created" not in text


def test_disk_gauges_with_a_label_that_needs_escaping(tmp_path: Path) -> None:
    """A destination and a place whose names hold a quote and a backslash come back unchanged."""
    name = 'ward "B"\\east'
    space = Space({"ledger": tmp_path, f"destination:{name}": tmp_path}, Disk(), Clock(), probe_every=1.0)
    space.full(f"destination:{name}", "no space left on device")
    with Ledger.open(tmp_path / "ledger.sqlite3") as ledger:
        families = _families(Metrics(Clock()).render(ledger.summary(), space))

    assert [
        ("dlco_bridge_disk_full", {"where": f"destination:{name}"}, 1),
        ("dlco_bridge_disk_full", {"where": "ledger"}, 0),
    ] == families["dlco_bridge_disk_full"]
    # A full destination folder pauses the intake, not delivery (only a full ledger does).
    assert (1, 0) == (families["dlco_bridge_intake_paused"][0][2], families["dlco_bridge_delivery_paused"][0][2])
