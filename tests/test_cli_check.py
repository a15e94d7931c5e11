"""`dlco-bridge check` as an integration engineer runs it."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from bridge.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"


def test_check_samples_reports_findings_and_the_bad_file(capsys):
    """Every good sample is checked, the malformed one is one stderr line, exit code 2."""
    code = main(["check", str(SAMPLES)])
    out, err = capsys.readouterr()

    assert code == 2
    assert len(err.strip().splitlines()) == 1
    assert "08-malformed.json: performed_at: " in err
    assert "UNIT_MISLABEL_PROBABLE" in out
    assert "HB_ADJUSTMENT_WRONG_DIRECTION" in out
    assert "not a medical device" in out


def test_check_good_file_exits_zero(capsys):
    """A readable file exits 0 even with findings."""
    code = main(["check", str(SAMPLES / "07-unit-mislabel.json")])

    assert code == 0
    assert "UNIT_MISLABEL_PROBABLE" in capsys.readouterr().out


def test_check_units_si_shows_si(capsys):
    """--units si shows DLCO in mmol/min/kPa with the lab's own digits."""
    main(["check", "--units", "si", str(SAMPLES / "01-healthy-adult.json")])

    assert "9.84 mmol/min/kPa" in capsys.readouterr().out


def test_check_json_is_machine_readable(capsys):
    """--json prints one JSON document with the caution, findings and errors."""
    code = main(["check", "--json", str(SAMPLES / "07-unit-mislabel.json"), str(SAMPLES / "08-malformed.json")])
    document = json.loads(capsys.readouterr().out)

    assert code == 2
    assert "not a medical device" in document["caution"]
    assert document["files"][0]["worst"] == "error"
    assert document["files"][0]["session"]["results"]["dlco"]["original"]["unit"] == "mmol/min/kPa"
    assert "performed_at" in document["files"][1]["error"]


def test_missing_file_is_one_line(capsys, tmp_path):
    """A file that does not exist is a one-line error; the others are still checked."""
    code = main(["check", str(tmp_path / "gone.json"), str(SAMPLES / "01-healthy-adult.json")])
    out, err = capsys.readouterr()

    assert code == 2
    assert "gone.json: (file): a readable file" in err
    assert "LOW-2026-0001" in out


def test_units_from_environment(tmp_path):
    """DLCO_BRIDGE_UNITS=si works like --units si (console script run as a subprocess)."""
    env = {"DLCO_BRIDGE_UNITS": "si", "PATH": "/usr/bin:/bin"}
    result = subprocess.run(
        [sys.executable, "-m", "bridge", "check", str(SAMPLES / "01-healthy-adult.json")],
        capture_output=True,
        text=True,
        env=env,
        check=False,
        cwd=ROOT,
    )

    assert result.returncode == 0, result.stderr
    assert "results (si units)" in result.stdout


def _poisoned(tmp_path: Path) -> Path:
    """A copy of a good sample whose DLCO is 1e308 (a corrupt export)."""
    document = json.loads((SAMPLES / "01-healthy-adult.json").read_bytes())
    document["results"]["dlco"]["value"] = 1e308
    poison = tmp_path / "00-poison.json"
    poison.write_text(json.dumps(document), encoding="utf-8")
    return poison


def test_a_poison_file_is_one_line_and_the_others_are_still_checked(tmp_path, capsys):
    """DLCO 1e308 is refused with one line naming file and field; the next file is still checked; exit 2."""
    code = main(["check", str(_poisoned(tmp_path)), str(SAMPLES / "02-anaemic-patient.json")])
    out, err = capsys.readouterr()

    assert 2 == code
    assert [f"{tmp_path / '00-poison.json'}: results.dlco.value"] == [
        line.split(": a finite")[0] for line in err.splitlines()
    ]
    assert "Traceback" not in err
    assert "HC-26-0142" in out


def test_internal_failure_is_one_line_naming_the_file():
    """An unexpected exception on one input becomes one InputError line naming file, type and message."""
    from bridge.errors import InputError, ProcessingFailed

    failed = ProcessingFailed.wrapping(ZeroDivisionError("float division by zero"), "inbox/a.json")

    assert isinstance(failed, InputError)
    assert "inbox/a.json: (internal): no internal error, got ZeroDivisionError: float division by zero" in str(failed)
    assert "\n" not in str(failed)


def _sample_with(tmp_path: Path, name: str, change) -> Path:
    doc = json.loads((SAMPLES / "01-healthy-adult.json").read_text())
    change(doc)
    path = tmp_path / name
    path.write_text(json.dumps(doc))
    return path


def test_impossible_records_are_refused_by_check_and_convert(tmp_path, capsys):
    """Born after the test, dated in the future, nothing measured: one line each, exit 2, nothing written."""
    from datetime import UTC, datetime, timedelta

    later = (datetime.now(UTC) + timedelta(days=30)).isoformat(timespec="seconds")  # the shell's clock decides
    files = [
        _sample_with(tmp_path, "born-later.json", lambda d: d["patient"].update(birth_date="2027-01-01")),
        _sample_with(tmp_path, "future.json", lambda d: d.update(performed_at=later)),
        _sample_with(tmp_path, "empty.json", lambda d: d.update(results={})),
    ]
    for command in ("check", "convert"):
        extra = ["--out", str(tmp_path / "out")] if command == "convert" else []
        code = main([command, *map(str, files), *extra])
        err = capsys.readouterr().err

        assert 2 == code
        fields = ("patient.birth_date", "performed_at", "results")
        expected = [f"{f}: {field}" for f, field in zip(files, fields, strict=True)]
        assert expected == [": ".join(line.split(": ")[:2]) for line in err.splitlines()]
    assert [] == list((tmp_path / "out").iterdir())


def test_check_shows_haemoglobin_in_the_unit_the_site_chose_as_the_outputs_do(tmp_path, capsys):
    """[emit] hemoglobin_unit = "g/L": check says 152 g/L, as the ORU it would send does, not the display 15.2 g/dL."""
    # source: 1 g/dL = 10 g/L (SI prefixes); sample 04 reports Hb 152 g/L
    config = tmp_path / "bridge.toml"
    config.write_text('[emit]\nhemoglobin_unit = "g/L"\n', encoding="utf-8")
    sample = str(SAMPLES / "04-raised-cohb.json")

    main(["check", sample])
    default_row = [line for line in capsys.readouterr().out.splitlines() if line.strip().startswith("haemoglobin")]
    main(["check", "--config", str(config), sample])
    chosen_row = [line for line in capsys.readouterr().out.splitlines() if line.strip().startswith("haemoglobin")]
    main(["check", "--json", "--config", str(config), sample])
    document = json.loads(capsys.readouterr().out)
    main(["convert", "--config", str(config), "--to", "hl7", "--out", str(tmp_path / "out"), sample])
    oru = next((tmp_path / "out").glob("*.hl7")).read_text(encoding="utf-8")

    assert ["haemoglobin", "15.2", "g/dL", "(as", "sent:", "152", "g/L)"] == default_row[0].split()  # no unit chosen
    assert ["haemoglobin", "152", "g/L"] == chosen_row[0].split()
    hb = document["files"][0]["session"]["conditions"]["hemoglobin"]
    assert (152, "g/L") == (hb["value"], hb["unit"])
    assert "152 g/L (718-7)" in oru  # the NTE beside the Hb-adjusted DLCO
