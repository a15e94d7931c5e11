"""Delivery by the running service to real loopback receivers: outages, refusals, slowness, FHIR REST."""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

from bridge.service.ledger import Ledger, OutboxRow
from tests.service.conftest import cli, drop, fhir_destination, make_input, mllp_destination, wait_until

if TYPE_CHECKING:
    from tests.service.conftest import RecordingReceiver, Site
    from tests.shell.conftest import FhirEndpoint

MakeSite = Callable[..., "Site"]


def outbox_rows(site: Site) -> list[OutboxRow]:
    """Every outbox row, read beside the running service (ids are dense: rows are never deleted)."""
    rows = []
    with Ledger.open(site.ledger_path, read_only=True) as ledger:
        total = ledger.summary()
        count = total.pending + total.delivered + total.rejected
        for outbox_id in range(1, count + 1):
            row = ledger.get(outbox_id)
            assert row is not None
            rows.append(row)
    return rows


def test_receiver_down_then_up_delivers_everything_in_order_per_patient(
    make_site: MakeSite, receiver: RecordingReceiver
) -> None:
    """While the receiver is down the outbox holds every message (status and /metrics agree); then all go, in order."""
    receiver.stop()
    site = make_site(mllp_destination(receiver.port))
    site.start()
    patients = ("FICT-6001", "FICT-6002", "FICT-6003")
    for n in range(12):
        drop(site.inbox, f"down-{n:02d}.json", make_input(f"DOWN-{n:02d}", patients[n % 3]))
    wait_until(lambda: len(site.archived()) == 12, "12 inputs archived")
    status = site.status_json()
    metrics = site.metrics()

    assert (12, 0) == (status["destinations"]["records"]["pending"], status["destinations"]["records"]["delivered"])
    assert (12.0, 12.0) == (
        metrics['dlco_bridge_outbox_depth{destination="records"}'],
        metrics["dlco_bridge_files_processed_total"],
    )

    receiver.start()
    wait_until(lambda: site.summary().delivered == 12, "12 messages delivered")
    order = {p: [a.test_id for a in receiver.accepted() if a.patient == p] for p in patients}
    metrics = site.metrics()

    assert {p: [f"DOWN-{n:02d}" for n in range(12) if n % 3 == i] for i, p in enumerate(patients)} == order
    assert (0.0, 12.0) == (
        metrics['dlco_bridge_outbox_depth{destination="records"}'],
        metrics['dlco_bridge_delivered_total{destination="records"}'],
    )


def test_a_refused_message_is_dead_lettered_and_resent_on_request(
    make_site: MakeSite, receiver: RecordingReceiver
) -> None:
    """An AE dead-letters that message with the receiver's text, others go on; resend --rejected delivers it."""
    receiver.refuse_tests["NAK-02"] = "PID-3 not known here"
    site = make_site(mllp_destination(receiver.port))
    site.start()
    for n in range(1, 4):
        drop(site.inbox, f"nak-{n}.json", make_input(f"NAK-{n:02d}", f"FICT-50{n:02d}"))
    wait_until(lambda: (s := site.summary()).delivered == 2 and s.rejected == 1, "2 delivered, 1 rejected")
    (rejected,) = [row for row in outbox_rows(site) if row.state == "rejected"]
    status = site.status_json()

    assert ("NAK-02", "AE PID-3 not known here") == (rejected.test_id, rejected.last_error)
    assert {"NAK-01", "NAK-03"} == {a.test_id for a in receiver.accepted()}
    assert (1, 1.0) == (status["destinations"]["records"]["rejected"],
                        site.metrics()['dlco_bridge_dead_letters{destination="records"}'])  # fmt: skip
    assert [(rejected.id, "NAK-02", "AE PID-3 not known here")] == [
        (d["id"], d["test_id"], d["reason"]) for d in status["dead_letters"]
    ]

    receiver.refuse_tests.clear()
    resent = cli("resend", "--rejected", "--config", str(site.config))
    wait_until(lambda: site.summary().delivered == 3, "the resent message delivered")
    attempts = [a.test_id for a in receiver.acked if a.test_id == "NAK-02"]

    assert (0, "1 rejected message queued again") == (resent.returncode, resent.stdout.strip())
    assert ["NAK-02", "NAK-02"] == attempts
    assert {"NAK-01", "NAK-02", "NAK-03"} == {a.test_id for a in receiver.accepted()}


def test_a_slow_receiver_is_retried_until_it_answers_in_time(make_site: MakeSite, receiver: RecordingReceiver) -> None:
    """No ACK within read_timeout is retried with the same MSH-10 until an ACK arrives in time."""
    receiver.delay = 1.5
    site = make_site(mllp_destination(receiver.port, read_timeout=0.5))
    site.start()
    drop(site.inbox, "slow.json", make_input("SLOW-01", "FICT-4001"))
    wait_until(lambda: len(receiver.received) >= 2, "a second attempt after a timeout")
    (row,) = outbox_rows(site)

    assert ("pending", "DeliveryTimeout: no ACK in time") == (row.state, row.last_error)

    receiver.delay = 0.0
    wait_until(lambda: site.summary().delivered == 1, "the message delivered")

    assert 1 == len(set(receiver.received))
    assert ["SLOW-01"] == [a.test_id for a in receiver.accepted()][-1:]


def test_fhir_rest_2xx_is_delivered_and_4xx_rejected_with_the_outcome_text(
    make_site: MakeSite, fhir_server: FhirEndpoint
) -> None:
    """A 2xx answer marks the Bundle delivered; a 4xx dead-letters it with the OperationOutcome's text."""
    site = make_site(fhir_destination(fhir_server.url))
    site.start()
    drop(site.inbox, "ok.json", make_input("REST-01", "FICT-3001"))
    wait_until(lambda: site.summary().delivered == 1, "the Bundle delivered")
    fhir_server.mode = "reject"
    drop(site.inbox, "refused.json", make_input("REST-02", "FICT-3002"))
    wait_until(lambda: site.summary().rejected == 1, "the Bundle rejected")
    first, second = outbox_rows(site)

    # source: RFC 9110 §15.3 (2xx success) and §15.5 (4xx client error); FHIR R4 http.html OperationOutcome
    assert ("delivered", "200") == (first.state, first.ack_text.split(" ")[0])
    assert ("rejected", "HTTP 400: Observation.code: unknown code") == (second.state, second.last_error)
    assert 1 == len(fhir_server.bundles)
