"""The service's life: start-up checks, one service per state folder, graceful stop, quiet logs."""

from __future__ import annotations

import json
import subprocess
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING

from bridge.service.ledger import Ledger
from tests.service.conftest import (
    drop,
    file_destination,
    free_port,
    make_input,
    mllp_destination,
    wait_until,
    watch,
)

if TYPE_CHECKING:
    from tests.service.conftest import Site

MakeSite = Callable[..., "Site"]


def run_watch(site: Site, timeout: float = 30.0) -> subprocess.CompletedProcess[str]:
    """Run ``watch`` expecting it to exit by itself; its exit code and stderr."""
    stderr_path = site.root / "refused.log"
    with stderr_path.open("wb") as stderr:
        process = watch(site.config, stderr)
        try:
            code = process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
            raise
    return subprocess.CompletedProcess(process.args, code, "", stderr_path.read_text(encoding="utf-8"))


def test_a_second_service_on_the_same_state_folder_refuses_in_one_line(make_site: MakeSite) -> None:
    """Two services on one state folder: the second exits 1 with one line naming the lock."""
    site = make_site(file_destination())
    site.start()
    second = run_watch(site)

    assert 1 == second.returncode
    assert [f"dlco-bridge: another dlco-bridge service holds {site.root / 'state' / 'service.lock'}"] == (
        second.stderr.splitlines()
    )
    assert site.healthy()


def test_a_config_error_stops_the_service_at_start_naming_the_key(make_site: MakeSite) -> None:
    """A bad value exits 1 before anything runs, with one line naming the file and the key."""
    site = make_site(mllp_destination(70000))
    refused = run_watch(site)

    assert 1 == refused.returncode
    assert [f"dlco-bridge: {site.config}: destination.records.port: a port number 1-65535, got 70000"] == (
        refused.stderr.splitlines()
    )
    assert not (site.root / "state").exists()


def test_an_unreachable_destination_at_start_does_not_stop_intake(make_site: MakeSite) -> None:
    """Nobody listens on the MLLP port: files are still archived and their messages wait in the outbox."""
    site = make_site(mllp_destination(free_port()))
    site.start()
    for n in range(5):
        drop(site.inbox, f"early-{n}.json", make_input(f"EARLY-{n}", "FICT-2001"))
    wait_until(lambda: len(site.archived()) == 5, "5 inputs archived")
    summary = site.summary()

    assert (5, 5, 0) == (summary.processed, summary.pending, summary.delivered)
    assert site.healthy()


def test_sigterm_while_files_arrive_exits_0_with_nothing_half_done(make_site: MakeSite) -> None:
    """SIGTERM mid-burst: exit 0 within the bound; each file is still in the inbox or archived with its message."""
    site = make_site(file_destination())
    site.start()
    dropped: list[str] = []

    def feed() -> None:
        for n in range(300):
            name = f"burst-{n:03d}.json"
            drop(site.inbox, name, make_input(f"BURST-{n:03d}", f"FICT-1{n % 9:03d}"))
            dropped.append(name)
            time.sleep(0.005)

    feeder = threading.Thread(target=feed)
    feeder.start()
    wait_until(lambda: len(site.archived()) >= 20, "some inputs archived")
    code = site.stop(timeout=15)
    feeder.join(timeout=30)
    archived = {p.name for p in site.archived()}
    with Ledger.open(site.ledger_path, read_only=True) as ledger:
        summary = ledger.summary()

    assert 0 == code
    assert set(dropped) == archived | site.inbox_names()
    assert set() == archived & site.inbox_names()
    assert (len(archived), len(archived)) == (summary.processed, summary.pending + summary.delivered)
    assert "service stopped" in site.stderr()


def test_logs_carry_no_patient_identifiers_unless_asked(make_site: MakeSite) -> None:
    """By default stderr names no patient id or name; with log_patient_data = true the id appears."""
    quiet = make_site(file_destination(), name="quiet")
    told = make_site(file_destination(), extra="log_patient_data = true", name="told")
    # A reason quotes the value at fault: here a birth date field holding an identifier.
    malformed = json.loads(make_input("LOGS-02", "FICT-7731", given="Quillon"))
    malformed["patient"]["birth_date"] = "FICT-7731"
    for site in (quiet, told):
        site.start()
        drop(site.inbox, "good.json", make_input("LOGS-01", "FICT-7730", given="Quillon"))
        drop(site.inbox, "bad.json", json.dumps(malformed).encode())
        wait_until(lambda s=site: len(s.archived()) == 1 and len(s.quarantined()) == 1, "both inputs taken")  # type: ignore[misc]
        assert 0 == site.stop()
    identifiers = ("FICT-7730", "FICT-7731", "Quillon", "Fictive")

    assert [] == [i for i in identifiers if i in quiet.all_stderr()]
    assert ("FICT-7730", "FICT-7731") == tuple(i for i in identifiers[:2] if i in told.all_stderr())
    assert "reason=InvalidField at patient.birth_date report=bad.json.error.json" in quiet.all_stderr()


def test_a_misspelt_destination_key_stops_the_service_at_start(make_site: MakeSite) -> None:
    """An unknown key in a destination table is named, not silently replaced by its default."""
    site = make_site(file_destination() + "read_timout = 5.0\n")
    refused = run_watch(site)

    assert (1, 1) == (refused.returncode, len(refused.stderr.splitlines()))
    assert refused.stderr.startswith(f"dlco-bridge: {site.config}: destination.drop.read_timout: one of ")


def test_a_metrics_port_in_use_stops_the_service_at_start_in_one_line(make_site: MakeSite) -> None:
    """The health/metrics port taken by another program: exit 1, one line naming metrics_port and the port."""
    first = make_site(file_destination(), name="first")
    first.start()
    second = make_site(file_destination(), name="second")
    second.config.write_text(
        second.config.read_text().replace(
            f"metrics_port = {second.metrics_port}", f"metrics_port = {first.metrics_port}"
        )
    )
    refused = run_watch(second)

    assert 1 == refused.returncode
    assert [
        f"dlco-bridge: metrics_port: a free port on 127.0.0.1 (port {first.metrics_port}: Address already in use)"
    ] == refused.stderr.splitlines()


def test_automatic_retention_prunes_at_start_without_touching_pending_messages(make_site: MakeSite) -> None:
    """retention_days = 1: the service prunes at start (a log line) and a pending message keeps its payload."""
    site = make_site(mllp_destination(free_port()), extra="retention_days = 1")
    site.start()
    drop(site.inbox, "kept.json", make_input("KEEP-1", "FICT-2002"))
    wait_until(lambda: site.summary().pending == 1, "the message waiting")
    assert 0 == site.stop()

    with Ledger.open(site.ledger_path, read_only=True) as ledger:
        (row,) = ledger.rows("pending")
    assert "ledger pruned  event=pruned payloads=0 messages=0 inputs=0" in site.stderr()
    assert row.payload.startswith(b"MSH|")
