"""Spirometry read through the HL7 field map equals the JSON sample's, field by field.

The CSV map's twin (samples/legacy/lowmarsh-results.csv, LOW-2026-0010) is compared in
test_three_encodings.py; the legacy HL7 sample holds no spirometry yet, so this message is
written here: the Highcairn feed's layout with the spirometry values of
samples/10-spirometry-and-dlco.json (invented, fictional).
"""

from __future__ import annotations

from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process, process_all
from tests.maps.conftest import ROOT
from tests.maps.test_three_encodings import _leaves

TWIN = ROOT / "samples" / "10-spirometry-and-dlco.json"
MESSAGE = "\r".join(
    [
        r"MSH|^~\&|HCPFT|HIGHCAIRN|RESULTS|FENWICK|202603051040||ORU^R01|HCM00099|P|2.3",
        "PID|1||FICT-1010^^^HCMRN||Fictive^Briar||19680721|F",
        "OBR|1||HC-26-0199|HCDLCO^Single-breath transfer factor^L|||202603051040-0700",
        "OBX|1|NM|HCHT^Height^L||164|cm|||||F",
        "OBX|2|NM|HCDL^TLCO^L||18.3|mL/min/mmHg|||||F",
        "OBX|3|NM|HCFEV1PRE^FEV1 pre^L||1.92|L|||||F",
        "OBX|4|NM|HCFVCPRE^FVC pre^L||3.05|L|||||F",
        "OBX|5|NM|HCFERPRE^FEV1/FVC pre^L||63|%|||||F",
        "OBX|6|NM|HCFEFPRE^FEF25-75 pre^L||1.21|L/s|||||F",
        "OBX|7|NM|HCPEFPRE^PEF pre^L||5.4|L/s|||||F",
        "OBX|8|NM|HCFEV1PST^FEV1 post^L||2.31|L|||||F",
        "OBX|9|NM|HCFVCPST^FVC post^L||3.24|L|||||F",
        "OBX|10|NM|HCFERPST^FEV1/FVC post^L||71|%|||||F",
        "OBX|11|NM|HCFEFPST^FEF25-75 post^L||1.66|L/s|||||F",
        "OBX|12|NM|HCPEFPST^PEF post^L||6.1|L/s|||||F",
        "OBX|13|ST|HCBD^Bronchodilator^L||salbutamol||||||F",
        "OBX|14|NM|HCBDDOSE^Bronchodilator dose^L||400|ug|||||F",
    ]
)


def test_the_hl7_map_reads_the_spirometry_of_its_json_twin_field_by_field(hl7_map, tables):
    """Every spirometry value (value, unit, reported digits, original) and the bronchodilator equal the JSON's."""
    (outcome,) = [r for r in process_all(MESSAGE.encode(), "spiro.hl7", tables, PipelineSettings(field_map=hl7_map))]
    assert isinstance(outcome, Outcome)
    expected = process(TWIN.read_bytes(), TWIN.name, tables).session.spirometry
    assert expected is not None and outcome.session.spirometry is not None
    theirs = expected.model_dump(mode="json")
    for phase in ("pre", "post"):
        theirs[phase].pop("manoeuvres")  # a map cannot carry spirometry's manoeuvre lists
    mine = outcome.session.spirometry.model_dump(mode="json")
    for phase in ("pre", "post"):
        assert [] == mine[phase].pop("manoeuvres")
    assert _leaves(theirs) == _leaves(mine)
