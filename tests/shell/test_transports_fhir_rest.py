"""FHIR REST delivery against a small real HTTP endpoint on loopback."""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

import pytest

from bridge.errors import (
    ConfigError,
    ConnectFailed,
    DeliveryError,
    DeliveryTimeout,
    Rejected,
)
from bridge.service.transports.base import FHIR_JSON, HL7_V2_ER7, OutgoingMessage
from bridge.service.transports.fhir_rest import FhirRestTransport, operation_outcome_text
from tests.shell.conftest import free_port

if TYPE_CHECKING:
    from tests.shell.conftest import FhirEndpoint

MakeBundle = Callable[..., bytes]
TOKEN = "invented-token-0000"


def outgoing(payload: bytes) -> OutgoingMessage:
    return OutgoingMessage("fhir", "B-1", payload, FHIR_JSON, "T-1")


def client(url: str, read_timeout: float = 1.0) -> FhirRestTransport:
    """A client with the invented token; short timeouts keep failing tests fast."""
    return FhirRestTransport(url, token=TOKEN, connect_timeout=1.0, read_timeout=read_timeout)


def test_bundle_is_posted_and_accepted(fhir_endpoint: FhirEndpoint, make_bundle: MakeBundle) -> None:
    """A 200 answer is a receipt; the server got the Bundle as FHIR JSON with the token."""
    # source: FHIR R4 http.html#transaction (POST a transaction Bundle to the base URL)
    transport = client(fhir_endpoint.url)

    receipt = transport.deliver(outgoing(make_bundle("T-1")))
    transport.close()

    assert ("200", "201 Created x1") == (receipt.code, receipt.text)
    assert ["transaction"] == [b["type"] for b in fhir_endpoint.bundles]
    assert [FHIR_JSON] == fhir_endpoint.content_types
    assert [f"Bearer {TOKEN}"] == fhir_endpoint.authorizations


def test_4xx_is_rejected_with_the_outcome_text(fhir_endpoint: FhirEndpoint, make_bundle: MakeBundle) -> None:
    """A 400 is a refusal carrying the OperationOutcome diagnostics, never the token."""
    fhir_endpoint.mode = "reject"
    transport = client(fhir_endpoint.url)

    with pytest.raises(Rejected) as caught:
        transport.deliver(outgoing(make_bundle()))
    transport.close()

    assert "fhir: HTTP 400: Observation.code: unknown code" == str(caught.value)
    assert TOKEN not in str(caught.value) + repr(transport)


def test_not_a_transaction_is_refused_by_the_server(
    fhir_endpoint: FhirEndpoint,
) -> None:
    """The endpoint checks the Bundle type, so a wrong document comes back as 400."""
    transport = client(fhir_endpoint.url)

    with pytest.raises(Rejected):
        transport.deliver(outgoing(b'{"resourceType": "Bundle", "type": "batch"}'))
    transport.close()


@pytest.mark.parametrize("mode", ["unavailable", "throttled"])
def test_5xx_and_429_are_retryable(fhir_endpoint: FhirEndpoint, make_bundle: MakeBundle, mode: str) -> None:
    """503 and 429 are worth retrying: a DeliveryError that is not a refusal."""
    # source: RFC 9110 §15.6.4 (503), RFC 6585 §4 (429)
    fhir_endpoint.mode = mode
    transport = client(fhir_endpoint.url)

    with pytest.raises(DeliveryError) as caught:
        transport.deliver(outgoing(make_bundle()))
    transport.close()

    assert not isinstance(caught.value, Rejected)
    assert TOKEN not in str(caught.value)


def test_slow_server_times_out(fhir_endpoint: FhirEndpoint, make_bundle: MakeBundle) -> None:
    """No answer within the read timeout is DeliveryTimeout."""
    fhir_endpoint.mode, fhir_endpoint.delay = "slow", 0.5
    transport = client(fhir_endpoint.url, read_timeout=0.2)

    with pytest.raises(DeliveryTimeout):
        transport.deliver(outgoing(make_bundle()))
    transport.close()


def test_server_down_is_connect_failed(make_bundle: MakeBundle) -> None:
    """Nobody listening on the port is ConnectFailed."""
    transport = client(f"http://127.0.0.1:{free_port()}/fhir")

    with pytest.raises(ConnectFailed):
        transport.deliver(outgoing(make_bundle()))
    transport.close()


def test_hl7_payload_is_not_posted(fhir_endpoint: FhirEndpoint) -> None:
    """A message of another content type is refused before any request."""
    transport = client(fhir_endpoint.url)
    message = OutgoingMessage("fhir", "C-1", b"MSH|^~\\&|", HL7_V2_ER7)

    with pytest.raises(Rejected):
        transport.deliver(message)
    transport.close()

    assert [] == fhir_endpoint.content_types


def test_base_url_must_be_http() -> None:
    """A base URL that is not http(s) is a configuration error."""
    with pytest.raises(ConfigError):
        FhirRestTransport("ftp://127.0.0.1/fhir")


def test_operation_outcome_text_falls_back_to_details_and_code() -> None:
    """Each issue gives diagnostics, else details.text, else its code."""
    # source: FHIR R4 OperationOutcome.issue (diagnostics, details.text, code)
    body = (
        b'{"resourceType": "OperationOutcome", "issue": ['
        b'{"code": "invalid", "details": {"text": "bad unit"}}, {"code": "required"}]}'
    )

    assert "bad unit; required" == operation_outcome_text(body)
    assert "" == operation_outcome_text(b"<html>proxy error</html>")
