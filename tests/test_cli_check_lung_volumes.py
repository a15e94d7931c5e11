"""`dlco-bridge check` shows static lung volumes: the method, each volume against GLI-2021, what was recomputed."""

from __future__ import annotations

import json
from datetime import date
from pathlib import Path

from pyspiro import GLI_2021

from bridge.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = ROOT / "samples" / "11-whole-report.json"  # a man, 176 cm, born 1959-11-03, tested 2026-03-06


def test_check_shows_the_lung_volumes(capsys):
    """The method, TLC as sent with its GLI-2021 predicted value (pyspiro 1.0.0), RV/TLC, IC and ERV by hand."""
    assert 0 == main(["check", str(SAMPLE)])
    out = capsys.readouterr().out
    assert "lung volumes (body plethysmography; reference values GLI-2021 (Hall 2021)" in out
    # source: pyspiro 1.0.0, class GLI_2021 (Hall et al. 2021): predicted TLC of this man
    age = (date(2026, 3, 6) - date(1959, 11, 3)).days / 365.25  # common practice: decimal age
    predicted = float(GLI_2021().lms(1, age, 176.0, GLI_2021.Parameters["TLC"].value, None)[1])
    tlc_lines = out[out.index("    TLC ") :].splitlines()[:2]
    assert "7.60 L" in tlc_lines[0] and f"predicted {predicted:.2f} L" in tlc_lines[1]
    # hand computation from the sample's volumes: 100 x 4.20 / 7.60 = 55.26 %; 7.60 - 5.50; 5.50 - 4.20
    assert "RV/TLC recomputed               55.3 %" in out
    assert "IC = TLC - FRC                  2.10 L" in out
    assert "ERV = FRC - RV                  1.30 L" in out


def test_check_names_the_labs_own_lung_volume_set_beside_the_bridges(tmp_path, capsys):
    """lung_volumes.reference_set (docs/format.md) is shown beside GLI-2021, whose values stay charted."""
    doc = json.loads(SAMPLE.read_text())
    doc["lung_volumes"]["reference_set"] = "ECSC 1993"
    path = tmp_path / "named.json"
    path.write_text(json.dumps(doc))

    assert 0 == main(["check", str(path)])
    out = capsys.readouterr().out

    assert "lung volumes (body plethysmography; reference values GLI-2021 (Hall 2021)" in out
    assert "computed by dlco-bridge; the lab's report used ECSC 1993)" in out
