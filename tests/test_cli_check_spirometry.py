"""`dlco-bridge check` shows spirometry: values, reference values of the site's set, grades, response (24.3)."""

from __future__ import annotations

import json
from datetime import date
from pathlib import Path

from pyspiro import GLI_2012

from bridge.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = json.loads((ROOT / "samples" / "01-healthy-adult.json").read_text())  # a man, 178 cm, born 1981-01-15


def _litres(value: float) -> dict:
    return {"value": value, "unit": "L"}


def _write(tmp_path: Path) -> Path:
    doc = json.loads(json.dumps(SAMPLE))
    doc["patient"]["ethnicity"] = "caucasian"
    doc["spirometry"] = {
        "pre": {
            "results": {
                "fev1": {"value": 2500, "unit": "mL"},
                "fvc": _litres(4.00),
                "pef": {"value": 480, "unit": "L/min"},
            },
            "manoeuvres": [
                {"fev1": _litres(2.50), "fvc": _litres(4.00), "fev1_status": "acceptable", "fvc_status": "acceptable"},
                {"fev1": _litres(2.45), "fvc": _litres(3.90), "fev1_status": "acceptable", "fvc_status": "usable"},
            ],
        },
        "post": {"results": {"fev1": _litres(2.95), "fvc": _litres(4.10)}},
        "bronchodilator": {"drug": "salbutamol", "dose": {"value": 400, "unit": "ug"}},
    }
    path = tmp_path / "spiro.json"
    path.write_text(json.dumps(doc))
    return path


def test_check_shows_spirometry_with_the_chosen_reference_set(tmp_path, capsys):
    """Each phase's values as sent, GLI-2012 when the flag asks for it, the 2019 grades and the response."""
    code = main(["check", "--spirometry-reference", "gli-2012", str(_write(tmp_path))])
    out = capsys.readouterr().out

    assert 0 == code
    assert "spirometry (reference values GLI-2012 (Quanjer 2012)" in out
    assert "(as sent: 2500 mL)" in out and "(as sent: 480 L/min)" in out
    assert "after the bronchodilator (salbutamol 400 ug)" in out
    # source: Graham et al., AJRCCM 2019, Table 10: two acceptable FEV1 0.05 L apart is B; one acceptable FVC is E
    assert "B (2 acceptable, 0 usable only)" in out and "E (1 acceptable, 1 usable only)" in out
    assert "FEV1 bronchodilator response" in out


def test_check_json_carries_the_z_scores_pyspiro_gives(tmp_path, capsys):
    """--json: the FEV1 z-score before the bronchodilator is GLI-2012's for a Caucasian man (pyspiro)."""
    main(["check", "--json", "--spirometry-reference", "gli-2012", str(_write(tmp_path))])
    report = json.loads(capsys.readouterr().out)
    record = report["files"][0]
    ours = record["derived"]["spirometry"]["pre"]["references"]["fev1"]["z_score"]
    # source: pyspiro 1.0.0, class GLI_2012 (Quanjer et al. 2012), ethnicity 1 = Caucasian, sex 1 = male;
    # common practice (GLI decimal age): days / 365.25
    age = (date(2026, 3, 2) - date(1981, 1, 15)).days / 365.25
    theirs = float(GLI_2012().zscore(1, age, 178.0, 1, GLI_2012.Parameters["FEV1"].value, 2.5))
    assert abs(theirs - ours) < 0.006


def test_check_names_the_labs_own_spirometry_set_beside_the_bridges(tmp_path, capsys):
    """spirometry.reference_set (docs/format.md) is shown beside the site's set, never instead of it."""
    doc = json.loads((ROOT / "samples" / "10-spirometry-and-dlco.json").read_text())
    doc["spirometry"]["reference_set"] = "GLI-2012"
    path = tmp_path / "named.json"
    path.write_text(json.dumps(doc))

    assert 0 == main(["check", str(ROOT / "samples" / "10-spirometry-and-dlco.json")])
    plain = next(line for line in capsys.readouterr().out.splitlines() if line.startswith("  spirometry ("))
    assert 0 == main(["check", str(path)])
    named = next(line for line in capsys.readouterr().out.splitlines() if line.startswith("  spirometry ("))

    assert "the lab's report used" not in plain
    assert plain.removesuffix(")") + "; the lab's report used GLI-2012)" == named
