"""`dlco-bridge watch` delivering to `dlco-bridge stand-in`: files in, messages and resources out, refusals tried."""

from __future__ import annotations

import json
import re
import signal
import socket
import socketserver
import subprocess
import sys
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from bridge.service.loopback import LoopbackServer
from bridge.service.receiver import MllpPeer, ResourceStore
from tests.service.conftest import (
    GOOD,
    Site,
    clean_environment,
    cli,
    drop,
    fhir_destination,
    free_port,
    make_input,
    mllp_destination,
    wait_until,
)

MakeSite = Callable[..., Site]


@pytest.fixture
def stand_in(tmp_path: Path) -> Iterator[tuple[Path, int, str]]:
    """The stand-in as a user runs it: its own process, ports chosen free, stopped with SIGTERM."""
    folder, mllp_port, fhir_port = tmp_path / "stand-in", free_port(), free_port()
    process = subprocess.Popen(
        [sys.executable, "-m", "bridge", "stand-in", "--folder", str(folder),
         "--mllp-port", str(mllp_port), "--fhir-port", str(fhir_port)],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, env=clean_environment(), text=True,
    )  # fmt: skip
    assert process.stdout is not None
    first = process.stdout.readline()
    assert f"MLLP on 127.0.0.1:{mllp_port}" in first, first
    try:
        yield folder, mllp_port, f"http://127.0.0.1:{fhir_port}/fhir"
    finally:
        process.send_signal(signal.SIGTERM)
        process.communicate(timeout=10)


@pytest.fixture
def peers(tmp_path: Path) -> Iterator[tuple[MllpPeer, MllpPeer]]:
    """Two in-process stand-in MLLP listeners whose answer the test changes."""
    strict, patient = MllpPeer(tmp_path / "strict", answer="AR"), MllpPeer(tmp_path / "patient", answer="AR")
    for peer in (strict, patient):
        peer.start()
    yield strict, patient
    for peer in (strict, patient):
        peer.stop()


def test_watch_delivers_to_the_stand_in_and_a_resend_creates_nothing(make_site: MakeSite, stand_in) -> None:
    """Three exports: three HL7 messages written, three DiagnosticReports kept; a copy under another name adds none."""
    folder, mllp_port, fhir_url = stand_in
    site = make_site(mllp_destination(mllp_port) + fhir_destination(fhir_url))
    site.start()
    for sample in GOOD[:3]:
        drop(site.inbox, sample.name, sample.read_bytes())
    wait_until(lambda: site.summary().delivered == 6, "six deliveries")
    drop(site.inbox, "again-" + GOOD[0].name, GOOD[0].read_bytes())
    wait_until(lambda: site.summary().duplicates == 1, "the duplicate recognised")
    assert 0 == site.stop()

    listed = cli("stand-in", "--folder", str(folder), "--list")
    reports = [line for line in listed.stdout.splitlines() if line.startswith("DiagnosticReport/")]

    assert (0, 3, 3) == (listed.returncode, len(reports), len(list((folder / "messages").glob("*.hl7"))))
    log = site.stderr()
    # The start-up log names each destination with its address, the health address and the ledger.
    assert f"destination=records transport=mllp address=127.0.0.1:{mllp_port}" in log
    assert f"destination=store transport=fhir-rest address={fhir_url}" in log
    assert f"health=http://127.0.0.1:{site.metrics_port}/healthz" in log
    assert f"ledger={site.ledger_path}" in log


def test_a_correction_updates_the_resource_in_place(make_site: MakeSite, stand_in) -> None:
    """A correction: Observations and report updated in place (v2); only a Provenance for the new file is new."""
    # source: FHIR R4 http.html#cond-update (PUT Type?search updates the one match)
    folder, _, fhir_url = stand_in
    site = make_site(fhir_destination(fhir_url))
    site.start()
    drop(site.inbox, "first.json", make_input("FH-STAND-1", "FH-P-1"))
    wait_until(lambda: site.summary().delivered == 1, "the first delivery")
    before = cli("stand-in", "--folder", str(folder), "--list").stdout
    drop(site.inbox, "second.json", make_input("FH-STAND-1", "FH-P-1", change=0.3))
    wait_until(lambda: site.summary().delivered == 2, "the correction delivered")
    site.stop()
    after = cli("stand-in", "--folder", str(folder), "--list").stdout

    def kinds(listing: str) -> dict[str, int]:
        found: dict[str, int] = {}
        for line in listing.splitlines():
            if "/" in line.split(" ")[0]:
                kind = line.split("/")[0]
                found[kind] = found.get(kind, 0) + 1
        return found

    grown = {k: kinds(after)[k] - kinds(before).get(k, 0) for k in kinds(after)}
    expected = {"Observation": 0, "DiagnosticReport": 0, "Provenance": 1}
    assert expected == {k: grown.get(k, 0) for k in expected}
    assert re.search(r"^DiagnosticReport/\d+ +v2 ", after, re.M)


def test_a_correction_without_hb_withdraws_the_hb_adjusted_dlco_and_corrects_the_rest(
    make_site: MakeSite, stand_in
) -> None:
    """Original, then a correction with Hb removed: the stand-in ends with the Hb-adjusted DLCO entered-in-error.

    Every other Observation and the report are corrected in place; the withdrawn one keeps its id.
    """
    # source: FHIR R4 CodeSystem observation-status ("entered-in-error": withdrawn following previous
    # final release; "corrected"); FHIR R4 http.html#cond-update (PUT Type?identifier updates the one match)
    folder, _, fhir_url = stand_in
    site = make_site(fhir_destination(fhir_url))
    site.start()
    original = json.loads(make_input("FH-STAND-HB", "FH-P-9"))
    assert "hemoglobin" in original["conditions"]
    drop(site.inbox, "first.json", json.dumps(original).encode())
    wait_until(lambda: site.summary().delivered == 1, "the original delivered")
    first = _observations(folder)
    corrected = {**original, "conditions": {k: v for k, v in original["conditions"].items() if k != "hemoglobin"}}
    drop(site.inbox, "second.json", json.dumps(corrected).encode())
    wait_until(lambda: site.summary().delivered == 2, "the correction delivered")
    assert 0 == site.stop()
    after = _observations(folder)
    statuses = {key: body["status"] for key, (_, body) in after.items()}

    assert {"final"} == {body["status"] for _, body in first.values()}
    assert "entered-in-error" == statuses.pop("dlco_hb_adjusted")
    assert {"corrected"} == set(statuses.values())
    assert set(first) == set(after)  # updated in place: nothing new, nothing lost
    assert {key: ident for key, (ident, _) in first.items()} == {key: ident for key, (ident, _) in after.items()}
    assert "valueQuantity" not in after["dlco_hb_adjusted"][1]


def _observations(folder: Path) -> dict[str, tuple[int, dict]]:
    """The stand-in's Observations and report by identifier key: (resource id, body)."""
    store = ResourceStore(folder / "resources.sqlite3")
    try:
        kept = [r for r in store.all() if r.type in ("Observation", "DiagnosticReport")]
    finally:
        store.close()
    return {r.body["identifier"][0]["value"].rsplit(".", 1)[1]: (r.id, r.body) for r in kept}


def test_ae_is_dead_lettered_and_ar_follows_each_destination_policy(make_site: MakeSite, peers) -> None:
    """AE and AR dead-letter by default; with on_ar = "retry" an AR is retried until the receiver says AA."""
    # source: HL7 v2.5.1 ch. 2 table 0008 (AE application error, AR application reject)
    strict, patient = peers
    site = make_site(
        mllp_destination(strict.port, "strict") + mllp_destination(patient.port, "patient") + 'on_ar = "retry"\n'
    )
    site.start()
    drop(site.inbox, "one.json", make_input("FH-AR-1", "FH-P-2"))
    wait_until(lambda: site.summary().destinations.get("strict", None) and site.summary().rejected == 1, "strict AR")
    wait_until(lambda: patient.received >= 3, "the AR retried")
    assert 1 == site.summary().destinations["patient"].pending
    patient.answer = "AA"
    wait_until(lambda: site.summary().destinations["patient"].delivered == 1, "delivered once the receiver accepts")
    strict.answer = "AE"
    drop(site.inbox, "two.json", make_input("FH-AE-2", "FH-P-3"))
    wait_until(lambda: site.summary().destinations["strict"].rejected == 2, "AE dead-lettered")
    site.stop()

    assert re.search(rf"will retry .*destination=patient .*address=127\.0\.0\.1:{patient.port}", site.stderr())


# source: HL7 v2.5.1 ch. 2 (MSH segment), a minimal ORU^R01 header the stand-in answers
GOOD_MESSAGE = b"MSH|^~\\&|DLCO-BRIDGE|SITE|RECORDS|HOSPITAL|20260101120000||ORU^R01^ORU_R01|C-1|P|2.5.1\rPID|1\r"


def _start_stand_in(folder: Path, mllp_port: int) -> subprocess.Popen[str]:
    process = subprocess.Popen(
        [sys.executable, "-m", "bridge", "stand-in", "--folder", str(folder), "--mllp-port", str(mllp_port),
         "--fhir-port", "0"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=clean_environment(), text=True,
    )  # fmt: skip
    assert process.stdout is not None
    process.stdout.readline()  # the first line: listening (or nothing, when it could not start)
    return process


def test_the_stand_in_restarts_on_its_mllp_port_at_once(tmp_path: Path) -> None:
    """Stopped while a sender is connected, the stand-in starts again on the same MLLP port at once (issue 19.9).

    The stopped process closes its side of the connection first, which leaves the port in TIME_WAIT for
    about a minute; the listener sets SO_REUSEADDR, as the FHIR endpoint's http.server does.
    """
    # source: RFC 9293 section 3.6.1 (the side that closes first waits in TIME_WAIT for 2 MSL); POSIX SO_REUSEADDR
    port = free_port()
    first = _start_stand_in(tmp_path / "a", port)
    sender = socket.create_connection(("127.0.0.1", port), timeout=10)
    try:
        sender.sendall(b"\x0b" + GOOD_MESSAGE + b"\x1c\r")
        assert b"MSA|AA" in sender.recv(65536)
        first.send_signal(signal.SIGTERM)
        first.communicate(timeout=10)
        again = _start_stand_in(tmp_path / "b", port)
        try:
            assert again.poll() is None, again.communicate(timeout=10)
        finally:
            again.send_signal(signal.SIGTERM)
            _, err = again.communicate(timeout=10)
    finally:
        sender.close()

    assert "" == err


def test_a_port_in_use_is_named_in_the_error(tmp_path: Path) -> None:
    """--mllp-port on a port another program holds: one line naming the flag and the port, exit 1."""
    with socket.socket() as holder:
        holder.bind(("127.0.0.1", 0))
        holder.listen()
        port = holder.getsockname()[1]
        done = subprocess.run(
            [sys.executable, "-m", "bridge", "stand-in", "--folder", str(tmp_path), "--mllp-port", str(port),
             "--fhir-port", "0"],
            capture_output=True, env=clean_environment(), text=True, timeout=60,
        )  # fmt: skip

    assert (1, f"dlco-bridge: --mllp-port: a free port on 127.0.0.1 (port {port}: Address already in use)\n") == (
        done.returncode,
        done.stderr,
    )


def test_a_port_in_use_stops_the_stand_in_in_one_line_naming_its_option(tmp_path: Path) -> None:
    """The FHIR port taken (the MLLP one free): exit 1, one line naming --fhir-port and the port; nothing left open."""
    with LoopbackServer(socketserver.BaseRequestHandler) as taken:
        mllp_port = free_port()
        refused = cli("stand-in", "--folder", str(tmp_path / "s"),
                      "--mllp-port", str(mllp_port), "--fhir-port", str(taken.port))  # fmt: skip

    assert (1, [f"dlco-bridge: --fhir-port: a free port on 127.0.0.1 (port {taken.port}: Address already in use)"]) == (
        refused.returncode,
        refused.stderr.splitlines(),
    )
