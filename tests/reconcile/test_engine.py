"""The pure engine: classes, the precision sent, what a held resource says, the OR-list queries."""

from __future__ import annotations

from urllib.parse import unquote

import pytest

from bridge.reconcile.engine import Expected, Held, classify, held_of, same_value
from bridge.reconcile.search import MAX_PER_BATCH, Batch, batches, judge_batch

SYSTEM = "https://fenwick-hollow.example/dlco-bridge/observation-id"
LOINC = "http://loinc.org"


def _expected(value: str = "29.39", status: str = "final", kind: str = "Observation", ident: str = "lab.T-1.dlco"):
    # source: LOINC 19911-7 "Diffusion capacity.carbon monoxide"; UCUM mL/min/mm[Hg]
    return Expected(
        "fhir-store",
        "fhir",
        "Lab",
        "T-1",
        kind,
        SYSTEM,
        ident,
        LOINC,
        "19911-7",
        value,
        "mL/min/mm[Hg]",
        status,
        message_id="T-1.abc",
    )


def _held(value: str | None = "29.39", status: str = "final", rid: str = "1", unit: str = "mL/min/mm[Hg]") -> Held:
    return Held("Observation", rid, ((SYSTEM, "lab.T-1.dlco"),), status, ((LOINC, "19911-7"),), value, unit)


@pytest.mark.parametrize(
    ("sent", "held", "same"),
    [
        ("29.39", "29.390000000000001", True),  # a float's noise below the digits sent
        ("29.39", "29.4", False),  # 29.40 is not 29.39
        ("7.460", "7.46", True),  # 7.46 at three decimals is 7.460
        ("7.460", "7.4604", True),  # rounds to 7.460
        ("7.460", "7.4606", False),  # rounds to 7.461
        ("0.4", "0.35", True),  # a tie rounds to the even digit: 0.35 -> 0.4
        ("0.3", "0.25", False),  # ... and 0.25 -> 0.2, not 0.3
        ("97", "97.0", True),
        ("97", "96.5", False),  # 96.5 -> 96 (even)
        ("97", "not a number", False),
    ],
)
def test_values_are_compared_at_the_precision_sent(sent: str, held: str, same: bool):
    """The held value rounded, ties to even, to the decimals sent, then compared (worked by hand above)."""
    # source: IEC 60559:2011 (IEEE 754-2008) roundTiesToEven, the rounding the comparison names
    assert same == same_value(sent, held)


def test_one_copy_as_sent_is_present():
    """One copy, same code, value, unit and status: present, with the server's id."""
    verdict = classify(_expected(), [_held()])

    assert ("present", ("Observation/1",), "") == (verdict.verdict, verdict.held_ids, verdict.detail)


@pytest.mark.parametrize(
    ("held", "verdict"),
    [
        ([], "missing"),
        ([_held(rid="1"), _held(rid="2")], "duplicated"),
        ([_held(status="entered-in-error")], "withdrawn"),
        ([_held(value="30.12")], "different"),
        ([_held(unit="mmol/min/kPa")], "different"),
        ([_held(value=None)], "different"),
        ([_held(status="amended")], "different"),
    ],
)
def test_each_kind_of_copy_gets_its_class(held: list[Held], verdict: str):
    """None, two, entered-in-error, another value, unit, no value, another status."""
    # source: FHIR R4 ValueSet observation-status (final, amended, corrected, entered-in-error)
    assert verdict == classify(_expected(), held).verdict


def test_a_code_that_is_not_among_the_codings_is_different():
    """The code sent must be one of the copy's codings (system and code)."""
    copy = Held(
        "Observation",
        "1",
        ((SYSTEM, "lab.T-1.dlco"),),
        "final",
        (("http://snomed.info/sct", "1"),),
        "29.39",
        "mL/min/mm[Hg]",
    )

    verdict = classify(_expected(), [copy])

    assert ("different", f"code: sent {LOINC}|19911-7, held http://snomed.info/sct|1") == (
        verdict.verdict,
        verdict.detail,
    )


def test_a_correction_held_with_its_old_content_is_superseded():
    """Sent as corrected, held as final with another value: the content from before the correction."""
    verdict = classify(_expected(value="15.4", status="corrected"), [_held(value="15.1", status="final")])

    assert ("superseded", "value: sent 15.4, held 15.1; status: sent corrected, held final") == (
        verdict.verdict,
        verdict.detail,
    )


def test_held_of_reads_an_observation_and_a_provenance():
    """Identifier, status, codings, value and unit of an Observation; a Provenance's entity identifier."""
    # source: FHIR R4 Observation (identifier, status, code.coding, valueQuantity.value/code) and
    # Provenance.entity.what (a Reference whose identifier names the source)
    observation = {
        "resourceType": "Observation",
        "id": "7",
        "identifier": [{"system": SYSTEM, "value": "v"}],
        "status": "final",
        "code": {"coding": [{"system": LOINC, "code": "19911-7"}]},
        "valueQuantity": {"value": 4.507, "unit": "mL/min/mmHg/L", "code": "mL/min/mm[Hg]/L"},
    }
    provenance = {
        "resourceType": "Provenance",
        "id": "8",
        "target": [{"reference": "Observation/7"}],
        "entity": [{"role": "source", "what": {"identifier": {"system": "urn:x", "value": "sha256:ab"}}}],
    }

    assert Held("Observation", "7", ((SYSTEM, "v"),), "final", ((LOINC, "19911-7"),), "4.507", "mL/min/mm[Hg]/L") == (
        held_of(observation)
    )
    assert (("urn:x", "sha256:ab"),) == held_of(provenance).identifiers


def test_a_batch_query_escapes_and_percent_encodes_each_token():
    """``\\``, ``|`` and ``,`` in a value are escaped with a backslash, then percent-encoded (worked by hand)."""
    # source: FHIR R4 search.html "Escaping Search Parameters"; RFC 3986 §2.1 (\ = %5C, , = %2C, | = %7C)
    odd = _expected(ident="a,b|c")
    plain = _expected(ident="lab.T-1.va")

    query = Batch("Observation", (odd, plain)).query()

    assert (f"Observation?identifier={SYSTEM}|a%5C%2Cb%5C%7Cc,{SYSTEM}|lab.T-1.va&_count=10") == query
    assert f"{SYSTEM}|a\\,b\\|c,{SYSTEM}|lab.T-1.va" == unquote(query.split("=", 1)[1].split("&")[0])


def test_batches_keep_each_query_short_and_every_resource_once():
    """A thousand expected resources of two types: every one in exactly one batch of its type, each query short."""
    items = [_expected(ident=f"lab.T-{i}.dlco", kind=("Observation", "DiagnosticReport")[i % 2]) for i in range(1000)]

    made = list(batches(items, limit=2000))

    assert sorted(e.identifier_value for b in made for e in b.expected) == sorted(e.identifier_value for e in items)
    assert all(len(b.query()) <= 2000 and len(b.expected) <= MAX_PER_BATCH for b in made)
    assert all({e.resource_type} == {b.resource_type} for b in made for e in b.expected)


def test_a_batch_is_judged_from_every_resource_returned_each_id_once():
    """A resource returned on two pages counts once; another type in the search set is ignored."""
    found = {
        "resourceType": "Observation",
        "id": "1",
        "identifier": [{"system": SYSTEM, "value": "lab.T-1.dlco"}],
        "status": "final",
        "code": {"coding": [{"system": LOINC, "code": "19911-7"}]},
        "valueQuantity": {"value": 29.39, "code": "mL/min/mm[Hg]"},
    }
    outcome = {"resourceType": "OperationOutcome", "issue": []}

    (verdict,) = judge_batch(Batch("Observation", (_expected(),)), [found, outcome, found])

    assert "present" == verdict.verdict
