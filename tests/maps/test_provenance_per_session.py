"""One Provenance per session: a file of three sessions gives three, each naming its own resources."""

from __future__ import annotations

import json
from dataclasses import replace
from datetime import UTC, datetime

from bridge.emit.fhir import to_bundle
from bridge.emit.fhir_ndjson import to_ndjson
from bridge.emit.manifest import fhir_carried
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from tests.maps.conftest import CSV_SAMPLE

NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
CONTEXT = EmitContext(now=NOW, units="si", site=EmitSettings(patient_reference="conditional-create"))


def _sessions(tables: Tables, csv_map: FieldMap) -> list[Outcome]:
    found = list(process_all(CSV_SAMPLE.read_bytes(), CSV_SAMPLE.name, tables, PipelineSettings(field_map=csv_map)))
    assert all(isinstance(o, Outcome) for o in found)
    return [o for o in found if isinstance(o, Outcome)]


def test_two_sessions_of_one_file_get_two_provenances(tables: Tables, csv_map: FieldMap) -> None:
    """lowmarsh-results.csv: three sessions, three Provenances with distinct fullUrl and conditional key."""
    # source: FHIR R4 http.html#ccreate: a conditional create that matches one resource creates
    # nothing, so two sessions sharing one key would leave the second without a Provenance.
    outcomes = _sessions(tables, csv_map)
    provenances = [to_bundle(o, tables, CONTEXT)["entry"][-1] for o in outcomes]

    assert ["LOW-2026-0002", "LOW-2026-0003", "LOW-2026-0010"] == [o.session.test_id for o in outcomes]
    assert 1 == len({o.source_sha256 for o in outcomes})  # one file
    assert ["Provenance", "Provenance", "Provenance"] == [p["resource"]["resourceType"] for p in provenances]
    assert 3 == len({p["fullUrl"] for p in provenances})
    assert 3 == len({p["request"]["ifNoneExist"] for p in provenances})


def test_each_provenance_targets_its_own_session_and_names_file_and_session(tables: Tables, csv_map: FieldMap) -> None:
    """Each Provenance targets exactly its session's entries; its entities are the session and the file's hash."""
    # source: FHIR R4 provenance.html: target "The Reference(s) that were generated or updated by the
    # activity"; entity "An entity used in this activity"
    for outcome in _sessions(tables, csv_map):
        bundle = to_bundle(outcome, tables, CONTEXT)
        provenance = bundle["entry"][-1]["resource"]
        identifiers = [e["what"]["identifier"] for e in provenance["entity"]]
        session_value = f"sha256:{outcome.source_sha256}/lowmarsh-respiratory-physiology-lab-fictional." + (
            outcome.session.test_id
        )

        assert [{"reference": e["fullUrl"]} for e in bundle["entry"][:-1]] == provenance["target"]
        assert [  # the session first: it keys the Provenance; the file's hash, shared by both sessions, second
            {"system": "https://pft-site.example/dlco-bridge/source-session", "value": session_value},
            {"system": "https://pft-site.example/dlco-bridge/source-file", "value": f"sha256:{outcome.source_sha256}"},
        ] == identifiers


def test_ndjson_keeps_one_provenance_per_session(tables: Tables, csv_map: FieldMap) -> None:
    """The bulk-load NDJSON of the three-session file has three Provenances, each targeting its own report."""
    outcomes = _sessions(tables, csv_map)
    files = to_ndjson(outcomes, tables, replace(CONTEXT, site=EmitSettings(patient_reference="identifier")))
    provenances = [json.loads(line) for line in files["Provenance"].splitlines()]
    reports = {json.loads(line)["id"] for line in files["DiagnosticReport"].splitlines()}
    targeted = [
        {t["reference"].removeprefix("DiagnosticReport/") for t in p["target"] if t["reference"].startswith("Diag")}
        for p in provenances
    ]

    assert 3 == len({p["id"] for p in provenances})
    assert 3 == len(reports)
    assert [1, 1, 1] == [len(t) for t in targeted]
    assert reports == targeted[0] | targeted[1] | targeted[2]


def test_the_ledger_records_each_provenance_under_its_session(tables: Tables, csv_map: FieldMap) -> None:
    """What the ledger keeps of what was sent names each session's Provenance by the session, not the shared file."""
    # source: FHIR R4 provenance.html: Provenance has no identifier; the session entity is the key the
    # conditional create (ifNoneExist) and reconcile search by, so the sent record must use the same one
    keys = []
    for outcome in _sessions(tables, csv_map):
        bundle = to_bundle(outcome, tables, CONTEXT)
        (carried,) = [c for c in fhir_carried(bundle) if c.resource_type == "Provenance"]
        query = bundle["entry"][-1]["request"]["ifNoneExist"]
        keys.append((carried.identifier_system, carried.identifier_value))

        assert carried.identifier_system.endswith("/source-session")
        assert query.endswith(carried.identifier_value.replace("|", "\\|"))
    assert 3 == len(set(keys))
