"""One scenario, three encodings: the legacy CSV and HL7 samples read to the same sessions as their JSON twins."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process, process_all
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.values import plain
from tests.maps.conftest import CSV_SAMPLE, HL7_SAMPLE, ROOT

# The sessions each legacy sample encodes, in file order (written from the JSON samples by hand).
CSV_TWINS = ("04-raised-cohb", "06-three-manoeuvres", "10-spirometry-and-dlco")
HL7_TWINS = (
    "02-anaemic-patient",
    "03-high-altitude",
    "05-child",
    "09-legacy-hb-wrong-direction",
    "10-spirometry-and-dlco",
)


def _leaves(tree: object, path: str = "") -> dict[str, object]:
    """Every leaf of a dumped session by its dotted path, so a difference names its field."""
    if isinstance(tree, dict):
        found: dict[str, object] = {}
        for key, value in tree.items():
            found |= _leaves(value, f"{path}.{key}" if path else key)
        return found
    if isinstance(tree, list | tuple):
        found = {}
        for i, value in enumerate(tree):
            found |= _leaves(value, f"{path}[{i}]")
        return found
    return {path: tree}


# What the Highcairn feed cannot say of sample 10, a session of the Lowmarsh lab: the lab (a
# constant of its map), its own test id, the order number and the GLI-2012 ethnicity it does not send.
OTHER_LAB = re.compile(r"(lab\.|test_id$|placer_order_number$|patient\.ethnicity$)")


def _carried(leaves: dict[str, object], sample: Path, twin: str) -> dict[str, object]:
    """The leaves the sample's feed carries of its twin: all of them, but what another lab's feed cannot say."""
    lab = "Highcairn" if sample == HL7_SAMPLE else "Lowmarsh"
    if lab in str(json.loads((ROOT / "samples" / f"{twin}.json").read_text())["lab"]["name"]):
        return leaves
    return {path: value for path, value in leaves.items() if not OTHER_LAB.match(path)}


def _mapped(sample: Path, fmap: FieldMap, tables: Tables) -> list[Outcome]:
    results = list(process_all(sample.read_bytes(), sample.name, tables, PipelineSettings(field_map=fmap)))
    assert [] == [r for r in results if not isinstance(r, Outcome)]
    return [r for r in results if isinstance(r, Outcome)]


@pytest.mark.parametrize(("sample", "twins", "map_name"), [(CSV_SAMPLE, CSV_TWINS, "csv_map"),
                                                            (HL7_SAMPLE, HL7_TWINS, "hl7_map")])  # fmt: skip
def test_legacy_samples_equal_their_json_twins_field_by_field(sample, twins, map_name, tables, request):
    """Each session read through its map has the same value, unit, reported digits and original as the JSON twin."""
    outcomes = _mapped(sample, request.getfixturevalue(map_name), tables)
    assert list(twins) == [_twin_stem(o.session.test_id) for o in outcomes]
    for outcome, twin in zip(outcomes, twins, strict=True):
        path = ROOT / "samples" / f"{twin}.json"
        expected = process(path.read_bytes(), path.name, tables)
        mine = _carried(_leaves(plain(outcome.session, "json")), sample, twin)
        assert _carried(_leaves(plain(expected.session, "json")), sample, twin) == mine


def _twin_stem(test_id: str) -> str:
    by_id = {
        "LOW-2026-0002": "04-raised-cohb", "LOW-2026-0003": "06-three-manoeuvres",
        "LOW-2026-0010": "10-spirometry-and-dlco", "HC-26-0142": "02-anaemic-patient",
        "HC-26-0143": "03-high-altitude", "HC-26-0150": "05-child", "HC-19-0077": "09-legacy-hb-wrong-direction",
        "HC-26-0199": "10-spirometry-and-dlco",
    }  # fmt: skip
    return by_id[test_id]


@pytest.mark.parametrize(("sample", "twins", "map_name"), [(CSV_SAMPLE, CSV_TWINS, "csv_map"),
                                                            (HL7_SAMPLE, HL7_TWINS, "hl7_map")])  # fmt: skip
def test_legacy_samples_give_the_same_derived_values_and_findings(sample, twins, map_name, tables, request):
    """What the bridge recomputes and finds is the same for the three encodings (unmapped codes aside)."""
    outcomes = _mapped(sample, request.getfixturevalue(map_name), tables)
    for outcome, twin in zip(outcomes, twins, strict=True):
        path = ROOT / "samples" / f"{twin}.json"
        expected = process(path.read_bytes(), path.name, tables)
        theirs = _leaves(plain(expected.derived, "json"))
        assert theirs == _leaves(plain(outcome.derived, "json"))
        mine = [f.code for f in outcome.findings if f.code != "UNMAPPED_SOURCE_CODE"]
        assert [f.code for f in expected.findings] == mine


def test_the_hl7_sample_reports_the_one_code_its_map_does_not_name(hl7_map, tables):
    """The technician comment (code HCCOMM) in message 2 is a finding naming file, message and code."""
    outcomes = _mapped(HL7_SAMPLE, hl7_map, tables)
    unmapped = [f.message for o in outcomes for f in o.findings if f.code == "UNMAPPED_SOURCE_CODE"]
    expected = [
        "highcairn-results.hl7: message 2, OBX 13 (code 'HCCOMM') is not in map "
        "mappings/maps/highcairn-hl7v23.toml; its value was not read"
    ]
    assert expected == unmapped
