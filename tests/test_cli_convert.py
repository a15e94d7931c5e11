"""`dlco-bridge convert`, `demo` and `show` as an integration engineer runs them."""

from __future__ import annotations

import json
from pathlib import Path

import hl7

from bridge.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"


def test_convert_writes_both_outputs_and_reports_the_bad_file(tmp_path, capsys):
    """Good samples give .bundle.json and .oru.hl7; those with an ERROR finding and the malformed one are refused."""
    code = main(["convert", str(SAMPLES), "--to", "fhir,hl7", "--out", str(tmp_path)])
    _, err = capsys.readouterr()

    assert 2 == code
    refused = [Path(line.split(":")[0]).name for line in err.strip().splitlines()]
    assert ["07-unit-mislabel.json", "08-malformed.json", "09-legacy-hb-wrong-direction.json"] == refused
    bundles = sorted(p.name for p in tmp_path.glob("*.bundle.json"))
    messages = sorted(p.name for p in tmp_path.glob("*.oru.hl7"))
    assert 8 == len(bundles) == len(messages)
    assert "LOW-2026-0001.bundle.json" in bundles
    assert [] == [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary files left


def test_converted_oru_is_cr_separated_and_parses(tmp_path):
    """The ORU file is ER7 with segments separated by CR, readable by python-hl7."""
    # source: HL7 v2.5.1 ch. 2 (segment terminator CR), parsed by the independent python-hl7
    main(["convert", str(SAMPLES / "01-healthy-adult.json"), "--to", "hl7", "--out", str(tmp_path)])
    text = (tmp_path / "LOW-2026-0001.oru.hl7").read_bytes().decode("utf-8")

    assert "\n" not in text
    message = hl7.parse(text)
    assert "ORU^R01^ORU_R01" == str(message.segment("MSH")[9])


def test_error_finding_refuses_the_file(tmp_path, capsys):
    """By default (as in the service) a session with an ERROR finding is refused and nothing is written."""
    code = main(["convert", str(SAMPLES / "07-unit-mislabel.json"), "--out", str(tmp_path)])
    _, err = capsys.readouterr()

    assert 2 == code
    assert "UNIT_MISLABEL_PROBABLE is an error finding" in err
    assert "--allow UNIT_MISLABEL_PROBABLE" in err
    assert [] == list(tmp_path.iterdir())


def test_an_empty_blocking_list_does_not_let_an_error_through(tmp_path, capsys):
    """--blocking '' only clears the extra codes: an ERROR finding still refuses the file."""
    code = main(["convert", str(SAMPLES / "07-unit-mislabel.json"), "--out", str(tmp_path), "--blocking", ""])

    assert 2 == code
    assert [] == list(tmp_path.iterdir())


def test_allowed_error_is_written_as_preliminary_with_its_finding(tmp_path, capsys):
    """--allow CODE writes the session; the questioned DLCO is preliminary in FHIR and P in OBX-11, with an NTE."""
    code = main(
        ["convert", str(SAMPLES / "07-unit-mislabel.json"), "--out", str(tmp_path), "--allow", "UNIT_MISLABEL_PROBABLE"]
    )
    out = capsys.readouterr().out
    bundle = json.loads(next(tmp_path.glob("*.bundle.json")).read_text())
    message = hl7.parse(next(tmp_path.glob("*.oru.hl7")).read_bytes().decode("utf-8"))
    dlco = next(
        e["resource"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation" and e["resource"]["code"]["coding"][0]["code"] == "19911-7"
    )
    segments = [str(s[0]) for s in message]
    obx_dlco = next(s for s in message if str(s[0]) == "OBX" and str(s[3]).startswith("19911-7^"))
    following = segments[segments.index("OBX") :]

    assert 0 == code
    assert "UNIT_MISLABEL_PROBABLE" in out
    # source: FHIR R4 Observation.status (ValueSet observation-status): preliminary, not final
    assert "preliminary" == dlco["status"]
    assert any("UNIT_MISLABEL_PROBABLE" in n["text"] for n in dlco["note"])
    # source: HL7 v2.5.1 ch. 7, OBX-11 observation result status, table 0085: P = preliminary results
    assert "P" == str(obx_dlco[11])
    # source: HL7 v2.5.1 ch. 7, OBR-25 result status, table 0123: P = preliminary
    assert "P" == str(message.segment("OBR")[25])
    assert "NTE" in following


def test_units_do_not_change_codes(tmp_path):
    """SI and traditional Bundles carry the same LOINC codes and values in ratio 2.987."""
    # source: GLI 2017 intercepts give the SI <-> traditional factor 2.987 (see test_units)
    values = {}
    for units in ("si", "traditional"):
        out = tmp_path / units
        main(
            [
                "convert",
                str(SAMPLES / "01-healthy-adult.json"),
                "--to",
                "fhir",
                "--units",
                units,
                "--out",
                str(out),
            ]
        )
        bundle = json.loads((out / "LOW-2026-0001.bundle.json").read_text())
        dlco = next(
            e["resource"]
            for e in bundle["entry"]
            if e["resource"]["resourceType"] == "Observation"
            and e["resource"]["code"]["coding"][0]["code"] == "19911-7"
        )
        values[units] = dlco["valueQuantity"]["value"]

    assert 9.84 == values["si"]
    assert abs(values["traditional"] - 9.84 * 2.987) < 0.05


def test_demo_runs_end_to_end(capsys):
    """The demo converts the scenario, refuses the malformed file and those with an ERROR finding, exits 0."""
    code = main(["demo"])
    out = capsys.readouterr().out

    assert 0 == code
    assert "8 sessions converted, 3 refused" in out
    assert "HB_ADJUSTMENT_WRONG_DIRECTION" in out
    assert "not a medical device" in out


def test_show_names_hl7_fields(tmp_path, capsys):
    """show on an ORU prints fields with their HL7 names."""
    main(["convert", str(SAMPLES / "02-anaemic-patient.json"), "--to", "hl7,fhir", "--out", str(tmp_path)])
    capsys.readouterr()

    main(["show", str(tmp_path / "HC-26-0142.oru.hl7")])
    out = capsys.readouterr().out

    assert "PID-5" in out
    assert "Patient Name" in out
    assert "Fictive^Bryony" in out


def test_show_summarises_a_bundle(tmp_path, capsys):
    """show on a Bundle lists its Observations with code and value."""
    main(["convert", str(SAMPLES / "02-anaemic-patient.json"), "--to", "fhir", "--out", str(tmp_path)])
    capsys.readouterr()

    main(["show", str(tmp_path / "HC-26-0142.bundle.json")])
    out = capsys.readouterr().out

    assert "Bundle type=transaction" in out
    assert "19911-7" in out
    assert "15.1 mL/min/mmHg" in out  # common practice: people read mmHg; UCUM mm[Hg] stays in the Bundle


def test_convert_validate_passes_good_samples(tmp_path, capsys):
    """--validate checks each output with fhir.resources and hl7apy STRICT; the samples pass."""
    # source: fhir.resources R4B models and hl7apy STRICT (independent libraries from PyPI)
    code = main(["convert", str(SAMPLES / "06-three-manoeuvres.json"), "--validate", "--out", str(tmp_path)])

    assert 0 == code
    assert 2 == len(list(tmp_path.iterdir()))


def test_validate_reports_an_invalid_payload():
    """An ORU that hl7apy cannot parse and a Bundle with an unknown element are both reported."""
    from bridge.emit.outputs import FHIR_JSON, HL7_V2_ER7
    from bridge.emit.validation import problems
    from bridge.model import Payload

    oru_text = b"MSH|^~\\&|A|B|C|D|20260310||ORU^R01^ORU_R01|1|P|9.9\r"
    oru = Payload(kind="hl7", units="si", message_id="x", content_type=HL7_V2_ER7, data=oru_text)
    bundle_text = b'{"resourceType": "Bundle", "type": "transaction", "entri": []}'
    bundle = Payload(kind="fhir", units="si", message_id="x", content_type=FHIR_JSON, data=bundle_text)

    assert [] != problems(oru)
    assert ["entri: Extra inputs are not permitted"] == problems(bundle)


def test_convert_writes_the_good_files_around_a_poison_file(tmp_path, capsys):
    """A corrupt export (DLCO 1e308) is one stderr line; the file after it is still converted; exit 2."""
    document = json.loads((SAMPLES / "01-healthy-adult.json").read_bytes())
    document["results"]["dlco"]["value"] = 1e308
    poison = tmp_path / "poison.json"
    poison.write_text(json.dumps(document), encoding="utf-8")
    out = tmp_path / "out"

    code = main(["convert", str(poison), str(SAMPLES / "02-anaemic-patient.json"), "--out", str(out)])
    err = capsys.readouterr().err

    assert 2 == code
    assert 1 == len(err.splitlines())
    assert f"{poison}: results.dlco.value: " in err
    assert ["HC-26-0142.bundle.json", "HC-26-0142.oru.hl7"] == sorted(p.name for p in out.iterdir())
