"""Intake of the running service: when a file is taken, and what becomes of it."""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from bridge.config import parse_settings
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables
from tests.service.conftest import (
    GOOD,
    MALFORMED,
    cli,
    drop,
    fhir_destination,
    file_destination,
    make_input,
    mllp_destination,
    wait_until,
)

if TYPE_CHECKING:
    from bridge.service.receiver import FhirPeer
    from tests.service.conftest import RecordingReceiver, Site

MakeSite = Callable[..., "Site"]


def outbox_files(site: Site) -> list[Path]:
    folder = site.root / "outbox"
    return sorted(folder.iterdir()) if folder.exists() else []


def test_a_file_written_slowly_is_taken_only_when_complete(make_site: MakeSite) -> None:
    """A file still being written in chunks stays in the inbox; once closed it is processed whole."""
    site = make_site(file_destination())
    site.start()
    data = make_input("SLOW-0001", "FICT-8001")
    chunks = [data[i : i + len(data) // 12 + 1] for i in range(0, len(data), len(data) // 12 + 1)]
    target = site.inbox / "slow.json"
    with target.open("wb") as stream:
        for chunk in chunks:
            stream.write(chunk)
            stream.flush()
            time.sleep(0.1)  # less than stable_seconds: a live writer, not a stalled one
            assert (True, []) == (target.exists(), site.quarantined())
    wait_until(lambda: site.archived(), "the file archived")

    assert ([data], [], 1) == ([p.read_bytes() for p in site.archived()], site.quarantined(), len(outbox_files(site)))


def test_the_same_file_dropped_twice_is_archived_as_a_duplicate_and_sends_nothing(make_site: MakeSite) -> None:
    """The same content again goes to archive/<day>/duplicates/ and sends no second message."""
    site = make_site(file_destination())
    site.start()
    data = make_input("TWICE-0001", "FICT-8002")
    drop(site.inbox, "twice.json", data)
    wait_until(lambda: len(outbox_files(site)) == 1, "the first message")
    drop(site.inbox, "twice.json", data)
    duplicates = wait_until(lambda: sorted(site.archive.rglob("duplicates/twice.json")), "the duplicate archived")
    summary = site.summary()

    assert (1, 1, 1, 1) == (len(duplicates), len(outbox_files(site)), summary.processed, summary.duplicates)


def test_a_file_a_crash_kept_from_the_archive_is_archived_not_called_a_duplicate(make_site: MakeSite) -> None:
    """An input the ledger knows but the archive lacks (kill after commit, before move) is archived normally."""
    site = make_site(file_destination())
    site.start()
    data = make_input("CUT-0001", "FICT-8003")
    drop(site.inbox, "cut.json", data)
    wait_until(lambda: site.summary().delivered == 1, "the message delivered")
    assert 0 == site.stop()
    # The state a kill between the ledger commit and the move leaves: recorded, still in the inbox.
    (archived,) = site.archived()
    archived.rename(site.inbox / "cut.json")
    site.start()
    wait_until(lambda: not site.inbox_names(), "the inbox emptied")
    summary = site.summary()

    assert ([archived], [], 0, 1) == (site.archived(), sorted(site.archive.rglob("duplicates/*")),
                                      summary.duplicates, len(outbox_files(site)))  # fmt: skip


def test_a_correction_goes_out_as_corrected_results(
    make_site: MakeSite, receiver: RecordingReceiver, stand_in_fhir: FhirPeer
) -> None:
    """New content for a test id already sent: HL7 OBX-11 C with a new MSH-10; FHIR status corrected, updated."""
    site = make_site(mllp_destination(receiver.port) + fhir_destination(stand_in_fhir.url))
    site.start()
    drop(site.inbox, "first.json", make_input("CORR-0001", "FICT-8004"))
    wait_until(lambda: len(receiver.accepted()) == 1 and stand_in_fhir.bundles == 1, "the original delivered")
    created = {r.reference for r in stand_in_fhir.store.all() if r.type == "Observation"}
    drop(site.inbox, "second.json", make_input("CORR-0001", "FICT-8004", change=0.1))
    wait_until(lambda: len(receiver.accepted()) == 2 and stand_in_fhir.bundles == 2, "the correction delivered")
    original, correction = receiver.accepted()
    observations = [r for r in stand_in_fhir.store.all() if r.type == "Observation"]

    # source: HL7 v2.5.1 ch. 7, table 0085 observation result status (F final, C correction)
    assert {"F"} == set(original.statuses)
    assert {"C"} == set(correction.statuses)
    assert original.control_id != correction.control_id
    # source: FHIR R4 ObservationStatus value set ("corrected"); http.html#cond-update: a conditional
    # update of the one match updates that resource (its version 2), it creates none
    assert created == {o.reference for o in observations}
    assert {("corrected", 2)} == {(o.body["status"], o.version) for o in observations}
    assert 1 == site.summary().corrections


def test_a_file_renamed_into_the_inbox_is_taken(make_site: MakeSite) -> None:
    """An atomic rename in (from a temporary name in the inbox, or from beside it) is taken once, whole."""
    site = make_site(file_destination())
    site.start()
    partial = site.inbox / "moved.json.part"
    partial.write_bytes(make_input("MOVE-0001", "FICT-8005"))
    beside = site.root / "beside.json"
    beside.write_bytes(make_input("MOVE-0002", "FICT-8005"))
    os.rename(partial, site.inbox / "moved.json")
    os.rename(beside, site.inbox / "beside.json")
    wait_until(lambda: len(site.archived()) == 2, "both files archived")

    assert (["beside.json", "moved.json"], 2) == ([p.name for p in site.archived()], len(outbox_files(site)))


def test_a_thousand_files_dropped_at_once_are_all_processed(make_site: MakeSite) -> None:
    """1,000 files renamed in together are all archived, each with its message, and counted."""
    site = make_site(file_destination())
    staging = site.root / "staging"
    staging.mkdir()
    for n in range(1000):
        (staging / f"bulk-{n:04d}.json").write_bytes(
            make_input(f"BULK-{n:04d}", f"FICT-7{n % 50:03d}", template=GOOD[n % len(GOOD)])
        )
    site.start()
    for path in sorted(staging.iterdir()):
        path.rename(site.inbox / path.name)
    wait_until(lambda: not site.inbox_names(), "an empty inbox", timeout=120)
    wait_until(lambda: site.summary().delivered == 1000, "1,000 messages delivered", timeout=60)
    metrics = site.metrics()

    assert (1000, 1000, 1000.0, 1000.0) == (
        len(site.archived()),
        len(outbox_files(site)),
        metrics["dlco_bridge_files_processed_total"],
        metrics['dlco_bridge_delivered_total{destination="drop"}'],
    )


def test_a_file_that_vanishes_before_it_is_read_leaves_no_trace(tmp_path: Path) -> None:
    """A file gone between 'complete' and the read is skipped: no ledger row, no quarantine."""
    settings = parse_settings(
        'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n' + file_destination(), {}, base=tmp_path
    )
    full, settings = settings, settings.require_service()
    settings.inbox.mkdir()
    with Ledger.open(settings.ledger_path) as ledger:
        intake = Intake(settings, full.pipeline, MapChoice(), load_tables(), ledger, Metrics(time.time))
        path = settings.inbox / "gone.json"
        path.write_bytes(make_input("GONE-0001", "FICT-8006"))
        path.unlink()
        result = intake.take(path, time.time())
        summary = ledger.summary()

    assert ("vanished", 0, 0, False) == (
        result.result,
        summary.processed,
        summary.quarantined,
        settings.quarantine.exists(),
    )


def test_a_malformed_file_is_quarantined_with_the_reason_check_prints(make_site: MakeSite, tmp_path: Path) -> None:
    """<name>.error.json beside the quarantined file gives the same one line as `dlco-bridge check`."""
    site = make_site(file_destination())
    site.start()
    data = MALFORMED.read_bytes()
    drop(site.inbox, "bad.json", data)
    report_path = wait_until(
        lambda: (site.quarantine / "bad.json.error.json").is_file() and site.quarantine / "bad.json.error.json",
        "the error report",
    )
    aside = tmp_path / "aside"
    aside.mkdir()
    (aside / "bad.json").write_bytes(data)
    checked = cli("check", "bad.json", cwd=aside)
    report = json.loads(report_path.read_text(encoding="utf-8"))

    assert 2 == checked.returncode
    assert checked.stderr.strip() == report["reason"]
    assert ([site.quarantine / "bad.json"], [], 0) == (site.quarantined(), site.archived(), len(outbox_files(site)))
