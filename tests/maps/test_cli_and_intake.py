"""`map check`, `--map` on check and convert, and the service's intake of a file with many sessions."""

from __future__ import annotations

import json
import time
from pathlib import Path

from bridge.cli import main
from bridge.config import Settings, parse_settings
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.tables.files import load_map_choice, load_tables
from tests.maps.conftest import CSV_MAP, CSV_SAMPLE, HL7_MAP, HL7_SAMPLE


def test_map_check_shows_each_column_beside_its_field_and_value(capsys):
    """The text report puts the column, what it holds, the canonical field and the canonical value on one line."""
    code = main(["map", "check", str(CSV_MAP), str(CSV_SAMPLE)])
    out, _ = capsys.readouterr()
    line = next(x for x in out.splitlines() if "column 'Pbar kPa'" in x)
    # 100.6 kPa = 754.6 mmHg (1 kPa = 7.50062 mmHg)  # source: BIPM SI Brochure, 9th ed., table 8 (mmHg = 133.322 Pa)
    # map check is text for people: the trade's mmHg, not UCUM's mm[Hg] (issue 19.8; --json keeps UCUM)
    expected = ["column 'Pbar kPa'", "100,6 [kPa]", "->", "conditions.barometric_pressure", "=", "754.6", "mmHg"]
    assert (0, expected) == (code, _cells(line))
    assert "unused in the sample: column 'Trial', column 'Operator note'" in out


def _cells(line: str) -> list[str]:
    left, right = line.split("->")
    source, written = left.strip().split("  ", 1)
    field, value = right.split("=")
    return [source, written.strip(), "->", field.strip(), "=", *value.split()]


def test_map_check_json_lists_unused_codes_and_empty_fields(capsys):
    """--json: the unmapped HL7 code, the fields no message filled, and what convert would do, for machines.

    HC-19-0077 (sample 09's twin) carries an ERROR finding, so the gate keeps it back; the map is fine (exit 0)."""
    code = main(["map", "check", str(HL7_MAP), str(HL7_SAMPLE), "--json"])
    doc = json.loads(capsys.readouterr().out)
    decided = (doc["sent"], doc["refused_by_gate"], doc["unreadable"])
    assert (0, (4, 1, 0), ["OBX 13 (code 'HCCOMM')"]) == (code, decided, doc["unused_sources"])
    assert "manoeuvres.inspired_volume" in doc["empty_fields"]


def test_map_check_of_an_invalid_map_exits_1_naming_file_line_and_key(tmp_path, capsys):
    """A map with an unknown canonical field stops with exit 1 and one line naming it."""
    broken = tmp_path / "broken.toml"
    broken.write_text(CSV_MAP.read_text(encoding="utf-8").replace('"patient.weight"', '"patient.mass"'))
    code = main(["map", "check", str(broken), str(CSV_SAMPLE)])
    _, err = capsys.readouterr()
    line = next(i for i, t in enumerate(broken.read_text().splitlines(), 1) if '"patient.mass"' in t)
    expected = f'dlco-bridge: {broken}: line {line}: fields."patient.mass": a canonical field of dlco-result/1'
    assert (1, expected) == (code, err.strip()[: len(expected)])


def test_map_check_with_a_bad_row_exits_2_and_names_it(tmp_path, capsys):
    """A sample with an unparseable number: the record is shown refused and the command exits 2."""
    sample = tmp_path / "bad.csv"
    sample.write_bytes(CSV_SAMPLE.read_bytes().replace(b";4,62;", b";4.6.2;"))
    code = main(["map", "check", str(CSV_MAP), str(sample)])
    out, _ = capsys.readouterr()
    assert 2 == code
    assert "lines 3-5: REFUSED  bad.csv: line 3, column 'VIN L': a number with a decimal comma, got '4.6.2'" in out


def test_convert_with_map_writes_one_message_per_session(tmp_path, capsys):
    """convert --map on the HL7 feed writes an ORU and a Bundle for each of its five sessions.

    HC-19-0077 is sample 09's twin: its lab value is Hb-adjusted the wrong way round (an ERROR), so it
    goes out only with that code allowed (and then as preliminary)."""
    allowed = ["--allow", "HB_ADJUSTMENT_WRONG_DIRECTION"]
    code = main(["convert", str(HL7_SAMPLE), "--map", str(HL7_MAP), "--out", str(tmp_path), *allowed])
    capsys.readouterr()
    expected = ["HC-19-0077", "HC-26-0142", "HC-26-0143", "HC-26-0150", "HC-26-0199"]
    assert (0, expected) == (code, sorted(p.name.removesuffix(".oru.hl7") for p in tmp_path.glob("*.oru.hl7")))


def test_check_without_a_map_refuses_a_csv_file_as_an_unknown_format(capsys):
    """A CSV file with no map chosen is UnknownFormat, never guessed at."""
    code = main(["check", str(CSV_SAMPLE)])
    _, err = capsys.readouterr()
    expected = f"{CSV_SAMPLE}: (file): dlco-result/1 JSON, or a field map that claims the file (--map; map or [maps])"
    assert (2, expected) == (code, err.strip())


def _service_reading_csv_through_the_map(tmp_path: Path) -> Settings:
    """A service whose inbox reads ``*.csv`` through the bundled CSV map, one HL7 file destination."""
    config = (
        'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n'
        f'[maps]\n"*.csv" = "{CSV_MAP}"\n'
        '[destination.drop]\npayload = "hl7"\ntransport = "file"\nfolder = "out"\n'
    )
    settings = parse_settings(config, {}, base=tmp_path)
    settings.require_service().inbox.mkdir()
    return settings


def _intake(settings: Settings, ledger: Ledger) -> Intake:
    """The intake the composition root builds: the service's settings, the pipeline's, and the maps they name."""
    tables = load_tables()
    maps = load_map_choice(settings.field_map, settings.maps, tables)
    return Intake(settings.require_service(), settings.pipeline, maps, tables, ledger, Metrics(time.time))


def test_intake_enqueues_every_good_session_and_quarantines_the_bad_row(tmp_path):
    """A CSV with one bad session: the good ones are enqueued, the bad one gets its report, the file is archived."""
    settings = _service_reading_csv_through_the_map(tmp_path)
    service = settings.require_service()
    path = service.inbox / "lowmarsh.csv"
    path.write_bytes(CSV_SAMPLE.read_bytes().replace(b"19.08.1965", b"1965-08-19"))  # row 1: not the map's format
    with Ledger.open(service.ledger_path) as ledger:
        result = _intake(settings, ledger).take(path, time.time())
        pending = [row.test_id for row in ledger.rows("pending")]
    reports = sorted(service.quarantine.glob("*.error.json"))
    reason = json.loads(reports[0].read_text())["reason"]
    assert ("processed", ["LOW-2026-0003", "LOW-2026-0010"], 1) == (result.result, pending, len(reports))
    assert "lowmarsh.csv: line 2, column 'Born': a date in the map's format %d.%m.%Y, got '1965-08-19'" == reason
    assert [] == list(service.inbox.iterdir())


def test_a_later_file_for_the_second_session_of_a_many_session_file_is_a_correction(tmp_path):
    """Every test id of a many-session file counts for correction detection, not only the first.

    The sample holds LOW-2026-0002 then LOW-2026-0003; a later file with new content for
    LOW-2026-0003 alone is a correction (HL7 v2.5.1 OBR-25 / OBX-11 "C": corrected results).
    """
    # source: HL7 v2.5.1 chapter 7, tables 0123 and 0085 (C: correction of a result already sent)
    settings = _service_reading_csv_through_the_map(tmp_path)
    service = settings.require_service()
    lines = CSV_SAMPLE.read_bytes().split(b"\n")
    header, second = lines[0], [line for line in lines if line.startswith(b"LOW-2026-0003;")]
    first = service.inbox / "lowmarsh.csv"
    first.write_bytes(CSV_SAMPLE.read_bytes())
    later = service.inbox / "lowmarsh-0003-corrected.csv"
    # the reported TLCO of LOW-2026-0003, 9,77 -> 9,87 mmol/min/kPa: new content for that test
    later.write_bytes(b"\n".join([header, *(line.replace(b";9,77;", b";9,87;") for line in second)]) + b"\n")
    with Ledger.open(service.ledger_path) as ledger:
        intake = _intake(settings, ledger)
        results = [intake.take(path, time.time()).result for path in (first, later)]
        pending = [(row.test_id, row.message_id) for row in ledger.rows("pending")]

    assert ["processed", "correction"] == results
    assert ["LOW-2026-0002", "LOW-2026-0003", "LOW-2026-0010", "LOW-2026-0003"] == [test_id for test_id, _ in pending]
    assert len({message_id for _, message_id in pending}) == 4  # each message has a control id of its own
