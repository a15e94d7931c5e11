"""`map check` counts what `convert` does with each record of the same sample, and exits by that count.

Each case runs `convert` on a sample through a map and reads its decisions from what it leaves
behind: a message written per record sent, an error line per record refused ("not emitted": the
gate). `map check` on the same sample and settings must count the same, and exit 0 exactly when
every record is readable and at least one is sent.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path

import pytest

from bridge.cli import main
from tests.maps.conftest import CSV_MAP, CSV_SAMPLE, HL7_MAP, HL7_SAMPLE

Change = Callable[[bytes], bytes]


def _same(data: bytes) -> bytes:
    return data


CASES: dict[str, tuple[Path, Path, Change, Change, list[str]]] = {
    # name: (map, sample, change to the map, change to the sample, extra flags)
    "the bundled CSV map": (CSV_MAP, CSV_SAMPLE, _same, _same, []),
    # HC-19-0077 carries an ERROR finding: the gate keeps it back, the other three are sent
    "the bundled HL7 map": (HL7_MAP, HL7_SAMPLE, _same, _same, []),
    "the HL7 map with that finding allowed": (
        HL7_MAP, HL7_SAMPLE, _same, _same, ["--allow", "HB_ADJUSTMENT_WRONG_DIRECTION"]
    ),
    # TLCO written in mmol/min/kPa but mapped as mL/min/mmHg: every record is 2.987x off, an ERROR finding
    "a wrong unit": (
        CSV_MAP,
        CSV_SAMPLE,
        lambda m: m.replace(b'column = "TLCO", unit = "mmol/min/kPa"', b'column = "TLCO", unit = "mL/min/mm[Hg]"'),
        _same,
        [],
    ),
    "an unreadable row": (CSV_MAP, CSV_SAMPLE, _same, lambda s: s.replace(b";4,62;", b";4.6.2;"), []),
    # on_bad_record = "refuse": the first record is unreadable, so the file is refused and nothing sent
    "an unreadable first row with refuse": (
        CSV_MAP,
        CSV_SAMPLE,
        lambda m: m.replace(b'on_bad_record = "skip"', b'on_bad_record = "refuse"'),
        lambda s: s.replace(b"19.08.1965", b"1965-08-19"),
        [],
    ),
}  # fmt: skip


def _convert(map_file: Path, sample: Path, out: Path, flags: list[str], capsys) -> tuple[int, int, int, int]:
    """convert's exit status and its decisions: records sent (messages written), refused by the gate, others."""
    code = main(["convert", str(sample), "--map", str(map_file), "--out", str(out), *flags])
    errors = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    sent = len(list(out.glob("*.oru.hl7")))
    gate = sum(": not emitted: " in line for line in errors)
    return code, sent, gate, len(errors) - gate


@pytest.mark.parametrize("case", CASES, ids=list(CASES))
def test_map_check_counts_and_exits_as_convert_decides(case, tmp_path, capsys):
    """The same counts as convert's decisions; exit 0 only with every record readable and one sent."""
    map_source, sample_source, change_map, change_sample, flags = CASES[case]
    map_file, sample = tmp_path / "map.toml", tmp_path / sample_source.name
    map_file.write_bytes(change_map(map_source.read_bytes()))
    sample.write_bytes(change_sample(sample_source.read_bytes()))
    convert_code, sent, gate, unreadable = _convert(map_file, sample, tmp_path / "out", flags, capsys)
    check_code = main(["map", "check", str(map_file), str(sample), "--json", *flags])
    doc = json.loads(capsys.readouterr().out)
    records = len(doc["records"])
    not_read = records - sent - gate - unreadable  # records after the one that refused the file
    expected_exit = 0 if sent and not unreadable and not not_read else 2
    assert (convert_code != 0) == (gate + unreadable + not_read > 0)  # the precondition: convert's own verdict
    assert (sent, gate, unreadable, not_read, expected_exit) == (
        doc["sent"],
        doc["refused_by_gate"],
        doc["unreadable"],
        doc["not_read"],
        check_code,
    )


def test_a_wrong_unit_says_no_record_would_be_sent(tmp_path, capsys):
    """The text report of the wrong-unit map: every record refused by the gate, the verdict said in words."""
    map_file = tmp_path / "map.toml"
    map_file.write_bytes(CASES["a wrong unit"][2](CSV_MAP.read_bytes()))
    code = main(["map", "check", str(map_file), str(CSV_SAMPLE)])
    out = capsys.readouterr().out
    expected = [
        "convert would send 0 record(s); 3 refused by the gate, 0 unreadable",
        "NO RECORD WOULD BE SENT: check each field's column and unit above",
    ]
    assert (2, expected) == (code, [line for line in out.splitlines() if line.startswith(("convert would", "NO "))])
