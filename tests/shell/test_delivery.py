"""The delivery policy: outcomes to ledger states, back-off, order, and graceful stop."""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

import pytest

from bridge.service.backoff import ceiling, next_delay
from bridge.service.delivery import Backoff, deliver_due, deliver_one
from bridge.service.ledger import Ledger, NewInput, NewMessage
from bridge.service.transports.base import FHIR_JSON, HL7_V2_ER7
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.memory import InMemoryTransport
from bridge.service.transports.mllp import MllpTransport

if TYPE_CHECKING:
    from tests.shell.conftest import Clock, FhirEndpoint, MllpReceiver

MakeOru = Callable[..., bytes]


def half() -> float:
    """A fixed 'random' draw: half of the back-off ceiling."""
    return 0.5


def hl7(control: str, destination: str = "ward", patient: str = "p1") -> NewMessage:
    payload = f"MSH|^~\\&|DLCO-BRIDGE|TESTLAB|R|W|20240102||ORU^R01|{control}|P|2.5.1\r"
    return NewMessage(destination, control, "T-1", patient, payload.encode(), HL7_V2_ER7)


def enqueue(ledger: Ledger, *messages: NewMessage) -> list[int]:
    return ledger.record_input_and_enqueue(NewInput("a" * 64, "a.json", "T-1"), messages)


def ids_of(transport: InMemoryTransport) -> list[str]:
    return [m.message_id for m in transport.attempts]


# ---- back-off (pure) --------------------------------------------------------------------


@pytest.mark.parametrize(("attempt", "expected"), [(1, 1.0), (2, 2.0), (5, 16.0), (9, 256.0), (10, 300.0)])
def test_backoff_ceiling_doubles_up_to_the_cap(attempt: int, expected: float) -> None:
    """The ceiling is base * 2^(attempt-1), never above the cap."""
    # common practice: exponential back-off with full jitter
    assert expected == ceiling(attempt, base=1.0, cap=300.0)


def test_backoff_survives_absurd_attempt_counts() -> None:
    """A message failing for years still gets the capped delay, not an overflow."""
    assert 300.0 == next_delay(10**9, rand=lambda: 1.0)


def test_backoff_is_jittered_by_the_given_draw() -> None:
    """The delay is the draw times the ceiling."""
    assert (0.0, 4.0) == (next_delay(4, rand=lambda: 0.0), next_delay(4, rand=half))


# ---- outcomes, with the in-memory transport ----------------------------------------------


def test_due_messages_are_delivered_in_order(ledger: Ledger, clock: Clock) -> None:
    """Every due message is delivered, oldest first, and marked with the receipt."""
    ids = enqueue(ledger, hl7("C-1"), hl7("C-2"), hl7("C-3"))
    transport = InMemoryTransport()

    count = deliver_due(ledger, {"ward": transport}, clock, half)

    row = ledger.get(ids[0])
    assert 3 == count
    assert ["C-1", "C-2", "C-3"] == ids_of(transport)
    assert row is not None and "AA kept in memory as C-1" == row.ack_text


def test_rejected_message_is_dead_lettered_and_others_go_on(ledger: Ledger, clock: Clock) -> None:
    """A refusal dead-letters that message only; the next one is still delivered."""
    ids = enqueue(ledger, hl7("C-1"), hl7("C-2"))
    transport = InMemoryTransport()
    transport.reject_next(1, "AE unknown code")

    count = deliver_due(ledger, {"ward": transport}, clock, half)

    first, second = ledger.get(ids[0]), ledger.get(ids[1])
    assert 2 == count
    assert first is not None and ("rejected", "AE unknown code") == (
        first.state,
        first.last_error,
    )
    assert second is not None and "delivered" == second.state


def test_failure_schedules_a_retry_with_backoff(ledger: Ledger, clock: Clock) -> None:
    """A retryable failure keeps the row pending, due after the jittered back-off."""
    (row_id,) = enqueue(ledger, hl7("C-1"))
    transport = InMemoryTransport()
    transport.fail_next(2)
    backoff = Backoff(base=2.0, cap=60.0)

    first = deliver_one(ledger, "ward", transport, clock, half, backoff)
    clock.advance(1.0)
    second = deliver_one(ledger, "ward", transport, clock, half, backoff)

    row = ledger.get(row_id)
    assert ("retry", "retry") == (first, second)
    assert row is not None
    assert (2, clock.now + 0.5 * 4.0) == (row.attempts, row.next_attempt_at)
    assert "ConnectFailed: connection refused" == row.last_error


def test_retry_is_delivered_once_due(ledger: Ledger, clock: Clock) -> None:
    """A message waiting for its back-off goes as soon as it is due, and not before."""
    (row_id,) = enqueue(ledger, hl7("C-1"))
    transport = InMemoryTransport()
    transport.time_out_next(1)
    deliver_due(ledger, {"ward": transport}, clock, half)

    early = deliver_due(ledger, {"ward": transport}, clock, half)
    clock.advance(0.5)
    due = deliver_due(ledger, {"ward": transport}, clock, half)

    row = ledger.get(row_id)
    assert (0, 1) == (early, due)
    assert row is not None and ("delivered", 2) == (row.state, row.attempts)


def test_failing_destination_does_not_hold_up_another(ledger: Ledger, clock: Clock) -> None:
    """One destination failing leaves the other delivering everything."""
    enqueue(ledger, hl7("C-1"), hl7("C-2"), hl7("F-1", "fhir"), hl7("F-2", "fhir"))
    ward, fhir = InMemoryTransport(), InMemoryTransport()
    ward.fail_next(5)

    count = deliver_due(ledger, {"ward": ward, "fhir": fhir}, clock, half)

    assert 2 == count
    assert (["C-1"], ["F-1", "F-2"]) == (ids_of(ward), ids_of(fhir))


def test_stop_is_honoured_between_messages(ledger: Ledger, clock: Clock) -> None:
    """Asked to stop, the loop finishes the message in hand and takes no other."""
    enqueue(ledger, hl7("C-1"), hl7("C-2"), hl7("C-3"))
    transport = InMemoryTransport()

    def stop_after_one() -> bool:
        return len(transport.delivered) >= 1

    count = deliver_due(ledger, {"ward": transport}, clock, half, should_stop=stop_after_one)

    assert 1 == count
    assert (1, 2) == (ledger.summary().delivered, ledger.summary().pending)


def test_rows_without_a_transport_stay_pending(ledger: Ledger, clock: Clock) -> None:
    """Messages for a destination with no configured transport are kept, not dropped."""
    enqueue(ledger, hl7("C-1", "retired-ward"))

    count = deliver_due(ledger, {"ward": InMemoryTransport()}, clock, half)

    assert (0, 1) == (count, ledger.summary().pending)


# ---- with real loopback receivers ---------------------------------------------------------


def mllp(receiver: MllpReceiver, read_timeout: float = 1.0) -> MllpTransport:
    return MllpTransport("127.0.0.1", receiver.port, connect_timeout=1.0, read_timeout=read_timeout)


def test_ae_dead_letters_with_receiver_text_and_next_goes(
    ledger: Ledger, clock: Clock, mllp_receiver: MllpReceiver
) -> None:
    """The receiver's AE text is kept on the dead-lettered row; the next is acknowledged."""
    # source: HL7 v2.5.1 ch. 2 table 0008 (AE application error)
    ids = enqueue(ledger, hl7("C-1"), hl7("C-2"))
    mllp_receiver.refuse["C-1"] = "OBX-5 not numeric"
    transport = mllp(mllp_receiver)

    count = deliver_due(ledger, {"ward": transport}, clock, half)
    transport.close()

    first, second = ledger.get(ids[0]), ledger.get(ids[1])
    assert 2 == count
    assert first is not None and ("rejected", "AE OBX-5 not numeric") == (
        first.state,
        first.last_error,
    )
    assert second is not None and ("delivered", "AA") == (
        second.state,
        second.ack_text,
    )


def test_receiver_down_then_up_delivers_in_order(ledger: Ledger, clock: Clock, mllp_receiver: MllpReceiver) -> None:
    """Nothing is lost while the receiver is down; afterwards all arrive in order."""
    enqueue(ledger, hl7("C-1"), hl7("C-2"), hl7("C-3"))
    transport = mllp(mllp_receiver)
    mllp_receiver.stop()

    while_down = deliver_due(ledger, {"ward": transport}, clock, half)
    mllp_receiver.start()
    clock.advance(60)
    after = deliver_due(ledger, {"ward": transport}, clock, half)
    transport.close()

    assert (0, 3) == (while_down, after)
    assert ["C-1", "C-2", "C-3"] == mllp_receiver.received
    assert 3 == ledger.summary().delivered


def test_slow_receiver_is_retried_then_delivered(ledger: Ledger, clock: Clock, mllp_receiver: MllpReceiver) -> None:
    """A timed-out message is retried with the same control id and then delivered."""
    (row_id,) = enqueue(ledger, hl7("C-1"))
    transport = mllp(mllp_receiver, read_timeout=0.2)
    mllp_receiver.delay = 0.5

    first = deliver_due(ledger, {"ward": transport}, clock, half)
    mllp_receiver.delay = 0.0
    clock.advance(60)
    second = deliver_due(ledger, {"ward": transport}, clock, half)
    transport.close()

    row = ledger.get(row_id)
    assert (0, 1) == (first, second)
    assert row is not None and ("delivered", 2) == (row.state, row.attempts)
    # At-least-once: the receiver saw the control id twice and can drop the repeat.
    assert ["C-1", "C-1"] == mllp_receiver.received
    assert ["retry", "delivered"] == [a.outcome for a in ledger.history(row_id)]


def test_fhir_unavailable_then_delivered(
    ledger: Ledger,
    clock: Clock,
    fhir_endpoint: FhirEndpoint,
    make_bundle: Callable[..., bytes],
) -> None:
    """A 503 keeps the Bundle pending; once the server is back it is delivered."""
    (row_id,) = ledger.record_input_and_enqueue(
        NewInput("b" * 64, "b.json", "T-1"),
        [NewMessage("fhir", "B-1", "T-1", "p1", make_bundle(), FHIR_JSON)],
    )
    transport = FhirRestTransport(fhir_endpoint.url, read_timeout=1.0)
    fhir_endpoint.mode = "unavailable"

    first = deliver_due(ledger, {"fhir": transport}, clock, half)
    fhir_endpoint.mode = "ok"
    clock.advance(60)
    second = deliver_due(ledger, {"fhir": transport}, clock, half)
    transport.close()

    row = ledger.get(row_id)
    assert (0, 1) == (first, second)
    assert row is not None and ("delivered", "200 201 Created x1") == (
        row.state,
        row.ack_text,
    )
