"""The stand-in's FHIR search over real HTTP: OR-lists, ``system|``, escapes, pages, and the R4 schema."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from urllib.parse import quote

import httpx
import pytest

from bridge import cli
from bridge.service.receiver import FhirPeer, ResourceStore
from bridge.service.receiver.damage import plant
from bridge.service.receiver.fhir_peer import process_transaction
from tests.fhir_schema import bundle_errors, shared_validators

SYSTEM = "https://fenwick-hollow.example/dlco-bridge/observation-id"
OTHER = "urn:oid:1.2.3.4"  # another system (the OID arc is illustrative)


def _observation(system: str, value: str, number: float) -> dict[str, Any]:
    return {
        "fullUrl": f"urn:uuid:00000000-0000-0000-0000-{len(value):012d}",
        "resource": {
            "resourceType": "Observation",
            "status": "final",
            "identifier": [{"system": system, "value": value}],
            "code": {"text": "DLCO"},
            "valueQuantity": {"value": number, "code": "mL/min/mm[Hg]"},
        },
        "request": {"method": "POST", "url": "Observation", "ifNoneExist": f"identifier={system}|{value}"},
    }


@pytest.fixture
def peer(tmp_path: Path) -> Iterator[FhirPeer]:
    """A stand-in holding five Observations under SYSTEM (one with , and | in its value) and one under OTHER."""
    store = ResourceStore(tmp_path / "stand-in" / "resources.sqlite3")
    values = ["T-1.dlco", "T-1.va", "T-2.dlco", "T-2.va", "odd,va|lue"]
    entries = [_observation(SYSTEM, v, 20.0 + i) for i, v in enumerate(values)] + [_observation(OTHER, "T-1.dlco", 9.9)]
    for entry in entries:  # one transaction each, so ids follow this order
        process_transaction(store, {"resourceType": "Bundle", "type": "transaction", "entry": [entry]})
    fhir = FhirPeer(store)
    fhir.start()
    yield fhir
    fhir.stop()
    store.close()


def _get(peer: FhirPeer, query: str) -> httpx.Response:
    with httpx.Client(trust_env=False) as client:
        return client.get(f"{peer.url}/{query}")


def _values(bundle: dict[str, Any]) -> list[str]:
    return [e["resource"]["identifier"][0]["value"] for e in bundle["entry"]]


def test_or_list(peer: FhirPeer):
    """``identifier=S|a,S|b`` finds a and b; the same value under another system is not found."""
    # source: FHIR R4 search.html, a comma between values of one parameter matches any of them
    answer = _get(peer, f"Observation?identifier={SYSTEM}|T-1.dlco,{SYSTEM}|T-2.va")

    assert (200, ["T-1.dlco", "T-2.va"]) == (answer.status_code, _values(answer.json()))


def test_a_system_alone_finds_everything_under_it(peer: FhirPeer):
    """``identifier=S|`` finds every Observation with an identifier in S, and none in another system."""
    # source: FHIR R4 search.html, token [system]| matches any code within the system
    answer = _get(peer, f"Observation?identifier={quote(SYSTEM, safe=':/')}|")

    assert ["T-1.dlco", "T-1.va", "T-2.dlco", "T-2.va", "odd,va|lue"] == _values(answer.json())


def test_an_escaped_comma_and_bar_are_part_of_the_value(peer: FhirPeer):
    """``odd\\,va\\|lue`` (percent-encoded) is one value, not two tokens."""
    # source: FHIR R4 search.html "Escaping Search Parameters" (\, and \| inside a value)
    answer = _get(peer, f"Observation?identifier={SYSTEM}|odd%5C%2Cva%5C%7Clue")

    assert ["odd,va|lue"] == _values(answer.json())


def test_pages_follow_link_next_without_repeats(peer: FhirPeer):
    """_count=2 over five matches: three pages chained by link "next", every match once, in order."""
    # source: FHIR R4 http.html "Paging": the Bundle's link with relation next
    seen, url, pages = [], f"{peer.url}/Observation?identifier={SYSTEM}|&_count=2", 0
    with httpx.Client(trust_env=False) as client:
        while url and pages < 10:
            page = client.get(url).json()
            seen += _values(page)
            url = next((link["url"] for link in page["link"] if link["relation"] == "next"), None)
            pages += 1

    assert (3, ["T-1.dlco", "T-1.va", "T-2.dlco", "T-2.va", "odd,va|lue"]) == (pages, seen)


def test_the_searchset_is_a_valid_r4_bundle(peer: FhirPeer):
    """A page of search results passes the official FHIR R4 JSON schema."""
    answer = _get(peer, f"Observation?identifier={SYSTEM}|&_count=2").json()

    assert ("searchset", []) == (answer["type"], bundle_errors(answer, shared_validators()))


def test_a_provenance_is_found_by_its_entity_identifier(peer: FhirPeer):
    """``Provenance?entity:identifier=S|sha256:...`` finds the Provenance naming that source."""
    # source: FHIR R4 search.html, the :identifier modifier on a reference parameter (Provenance.entity)
    provenance = {
        "resourceType": "Provenance",
        "recorded": "2026-01-01T00:00:00Z",
        "target": [{"reference": "Observation/1"}],
        "agent": [{"who": {"display": "dlco-bridge"}}],
        "entity": [{"role": "source", "what": {"identifier": {"system": "urn:x", "value": "sha256:ab"}}}],
    }
    entry = {
        "resource": provenance,
        "request": {"method": "POST", "url": "Provenance", "ifNoneExist": "entity:identifier=urn:x|sha256:ab"},
    }
    process_transaction(peer.store, {"resourceType": "Bundle", "type": "transaction", "entry": [entry]})

    answer = _get(peer, "Provenance?entity:identifier=urn:x|sha256:ab,urn:x|sha256:cd").json()

    assert ["Provenance"] == [e["resource"]["resourceType"] for e in answer["entry"]]


@pytest.mark.parametrize("query", ["Observation?code=19911-7", "Observation?_count=2", "Medication?identifier=a|b"])
def test_a_search_it_does_not_do_is_a_400(peer: FhirPeer, query: str):
    """Another parameter, no identifier, another type: 400 with an OperationOutcome, never an empty match."""
    answer = _get(peer, query)

    assert (400, "OperationOutcome") == (answer.status_code, answer.json()["resourceType"])


def test_planted_damage_changes_what_a_search_finds(peer: FhirPeer):
    """lose, duplicate and extra change what is found; alter and withdraw change what it says."""
    for kind, value in (
        ("lose", "T-1.va"),
        ("duplicate", "T-2.dlco"),
        ("extra", "T-2.va"),
        ("alter", "T-1.dlco"),
        ("withdraw", "odd,va|lue"),
    ):
        plant(peer.store, kind, value)

    found = _get(peer, f"Observation?identifier={SYSTEM}|").json()["entry"]
    said = {
        (e["resource"]["identifier"][0]["value"], e["resource"]["status"], e["resource"]["valueQuantity"]["value"])
        for e in found
    }

    # alter: 20.0 plus one in its last digit (20.0 -> 20.1); the others keep 20.0 + their index
    assert {
        ("T-1.dlco", "final", 20.1),
        ("T-2.dlco", "final", 22.0),
        ("T-2.va", "final", 23.0),
        ("T-2.va-extra", "final", 23.0),
        ("odd,va|lue", "entered-in-error", 24.0),
    } == said
    assert 6 == len(found)  # T-2.dlco twice


def test_damage_to_a_value_nobody_holds_is_refused(peer: FhirPeer, tmp_path: Path, capsys: Any):
    """``stand-in --lose VALUE`` for a value no resource has: exit 2, saying so."""
    code = cli.main(["stand-in", "--folder", str(tmp_path / "stand-in"), "--lose", "no-such-value"])

    assert 2 == code
    assert "no resource found" in capsys.readouterr().err


def test_an_old_stand_in_folder_is_indexed_when_opened(tmp_path: Path):
    """A store written before the index existed is indexed on opening: its resources are found."""
    store = ResourceStore(tmp_path / "r.sqlite3")
    process_transaction(
        store, {"resourceType": "Bundle", "type": "transaction", "entry": [_observation(SYSTEM, "T-9.dlco", 1.0)]}
    )
    store._conn.execute("DROP TABLE search_index")
    store.close()

    reopened = ResourceStore(tmp_path / "r.sqlite3")
    bodies, more = reopened.search("Observation", "identifier", [(SYSTEM, "T-9.dlco")], 0, 10)
    reopened.close()

    assert (["T-9.dlco"], False) == ([json.loads(b)["identifier"][0]["value"] for _, b in bodies], more)
