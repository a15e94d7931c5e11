"""Every fenced example of docs/field-maps.md runs: each TOML map reads its sample through `map check`.

A complete map (it has ``[map]``) reads the CSV or HL7 example that follows it on the page, or else
the bundled sample of its format; a TOML block without ``[map]`` is a variant of the map above it
(its lines replace that map's lines for the same keys) and reads the same sample. The page's unit
list and the error lines it quotes are checked against what the bridge says.
"""

from __future__ import annotations

import json
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path

import pytest

from bridge.cli import main
from tests.maps.conftest import CSV_SAMPLE, HL7_SAMPLE, ROOT

DOC = ROOT / "docs" / "field-maps.md"
PAGE = DOC.read_text(encoding="utf-8")
FENCE = re.compile(r"^```(\w*)\n(.*?)^```$", re.S | re.M)
BUNDLED = {"csv": CSV_SAMPLE, "hl7v2": HL7_SAMPLE}
KEY = re.compile(r'^\s*("[^"]+"|[A-Za-z_]+)\s*=')


@dataclass(frozen=True)
class Example:
    """One map example of the page and the sample it reads."""

    line: int  # where the TOML block starts on the page
    map_text: str
    sample: str | Path  # the page's own sample text, or a bundled sample file


def _blocks() -> list[tuple[int, str, str]]:
    return [(PAGE.count("\n", 0, m.start()) + 1, m.group(1), m.group(2)) for m in FENCE.finditer(PAGE)]


def _variant(base: str, fragment: str) -> str:
    """The base map with the fragment's lines in place of the base's lines for the same keys (same section)."""
    lines, section = base.splitlines(), ""
    for changed in fragment.splitlines():
        if changed.startswith("["):
            section = changed.strip()
            continue
        key = KEY.match(changed)
        if key is None:
            continue
        start = lines.index(section)
        at = next(i for i in range(start + 1, len(lines)) if (k := KEY.match(lines[i])) and k.group(1) == key.group(1))
        lines[at] = changed
    return "\n".join(lines) + "\n"


def examples() -> list[Example]:
    blocks = _blocks()
    found: list[Example] = []
    base: Example | None = None
    for index, (line, lang, body) in enumerate(blocks):
        if lang != "toml":
            continue
        if "[map]" not in body:
            assert base is not None, f"docs/field-maps.md line {line}: a variant with no map above it"
            found.append(Example(line, _variant(base.map_text, body), base.sample))
            continue
        after = blocks[index + 1] if index + 1 < len(blocks) else None
        fmt = tomllib.loads(body)["map"]["format"]
        sample = after[2] if after is not None and after[1] in ("csv", "hl7") else BUNDLED[fmt]
        base = Example(line, body, sample)
        found.append(base)
    return found


EXAMPLES = examples()


def _map_check(example: Example, tmp_path: Path) -> tuple[int, dict]:
    map_file = tmp_path / "example.toml"
    map_file.write_text(example.map_text, encoding="utf-8")
    if isinstance(example.sample, Path):
        sample = example.sample
    else:
        encoding = tomllib.loads(example.map_text).get("csv", {}).get("encoding", "utf-8")
        sample = tmp_path / "sample.txt"
        sample.write_bytes(example.sample.encode(encoding))
    code = main(["map", "check", str(map_file), str(sample), "--json"])
    return code, sample


def _checked(example: Example, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[int, dict]:
    code, _ = _map_check(example, tmp_path)
    return code, json.loads(capsys.readouterr().out)


def test_the_page_has_the_examples_it_describes():
    """The page shows a CSV map, an HL7 map, a map with fields from several columns and its date-only variant,
    and a map of lung volumes and the lab's reference sets."""
    assert 5 == len(EXAMPLES)
    used = {id(e.sample) for e in EXAMPLES if isinstance(e.sample, str)}
    samples = [body for _, lang, body in _blocks() if lang in ("csv", "hl7")]
    assert len(samples) == len(used)  # every sample on the page is read by a map


@pytest.mark.parametrize("example", EXAMPLES, ids=[f"line-{e.line}" for e in EXAMPLES])
def test_every_example_map_reads_its_sample(example, tmp_path, capsys):
    """map check on each example: exit 0, every record readable and sent, as the page promises."""
    code, doc = _checked(example, tmp_path, capsys)
    records = len(doc["records"])
    assert (0, records, 0, 0) == (code, doc["sent"], doc["refused_by_gate"], doc["unreadable"])
    assert records >= 2


def _fields(doc: dict, record: int) -> dict[str, str]:
    return {row["field"]: row["value"] for row in doc["records"][record]["fields"]}


def test_the_two_column_date_time_example_reads_date_and_time_together(tmp_path, capsys):
    """The page's own two-column map: 04.07.2026 + 10:05 in Europe/London is 10:05 at +01:00 (summer time)."""
    # source: Summer Time Order 2002 (UK; EU Directive 2000/84/EC): summer time, UTC+1, from the last Sunday
    # of March (29 March 2026) to the last Sunday of October, so 4 July 2026 is at +01:00
    example = next(e for e in EXAMPLES if '"Test time"' in e.map_text and "assume_time" not in e.map_text)
    code, doc = _checked(example, tmp_path, capsys)
    first, second = _fields(doc, 0), _fields(doc, 1)
    shown = [(f["test_id"], f["performed_at"], f["patient.family"]) for f in (first, second)]
    assert (0, [("NF-0042", "2026-07-04 10:05:00+01:00", "van Fictive"),
                ("NF-0043", "2026-07-04 14:30:00+01:00", "Fictivé")]) == (code, shown)  # fmt: skip
    row = next(r for r in doc["records"][0]["fields"] if r["field"] == "performed_at")
    assert ("columns 'Test date' + 'Test time'", "04.07.2026 10:05") == (row["source"], row["written"])


def test_the_date_only_variant_takes_the_time_it_says(tmp_path, capsys):
    """assume_time = "12:00": the date-only variant of the example puts every test at noon, local time."""
    example = next(e for e in EXAMPLES if "assume_time" in e.map_text)
    code, doc = _checked(example, tmp_path, capsys)
    times = [_fields(doc, i)["performed_at"] for i in range(2)]
    assert (0, ["2026-07-04 12:00:00+01:00", "2026-07-04 12:00:00+01:00"]) == (code, times)


def test_the_hl7_example_reads_timestamps_with_and_without_offset_and_msh_4(tmp_path, capsys):
    """OBR-7 with -0700 and OBR-7 without: both in Denver's winter offset; lab.site is MSH-4.1 as hl7apy reads it."""
    # source: US Energy Policy Act of 2005, s. 110 (daylight time from the second Sunday of March: 8 March 2026),
    # so 3 March 2026 in America/Denver is Mountain Standard Time, UTC-7
    from hl7apy.consts import VALIDATION_LEVEL
    from hl7apy.parser import parse_message

    example = next(e for e in EXAMPLES if "MSH-4.1" in e.map_text)
    code, doc = _checked(example, tmp_path, capsys)
    assert isinstance(example.sample, str)
    messages = ["MSH" + m.strip("\n") for m in example.sample.split("MSH")[1:]]
    facility = [
        parse_message(m.replace("\n", "\r"), validation_level=VALIDATION_LEVEL.TOLERANT).msh.msh_4.msh_4_1.value
        for m in messages
    ]
    read = [(_fields(doc, i)["performed_at"], _fields(doc, i)["lab.site"]) for i in range(2)]
    expected = [("2026-03-03 14:40:00-07:00", facility[0]), ("2026-03-03 15:30:00-07:00", facility[1])]
    assert (0, expected) == (code, read)


def test_the_unit_table_is_the_catalogue():
    """The page's unit list holds exactly the UCUM codes and [aliases] of mappings/units.toml, by dimension."""
    catalogue = tomllib.loads((ROOT / "mappings" / "units.toml").read_text(encoding="utf-8"))
    expected = {
        dimension.replace("_", " "): (
            sorted(c for c, u in catalogue["units"].items() if u["dimension"] == dimension),
            sorted(a for a, c in catalogue["aliases"].items() if catalogue["units"][c]["dimension"] == dimension),
        )
        for dimension in catalogue["dimensions"]
    }
    section = PAGE.split("## Units", 1)[1].split("\n## ", 1)[0]
    rows = [line.split("|")[1:4] for line in section.splitlines() if line.startswith("| ") and "`" in line]
    listed = {
        name.strip(): (sorted(re.findall(r"`([^`]+)`", codes)), sorted(re.findall(r"`([^`]+)`", spellings)))
        for name, codes, spellings in rows
    }
    assert expected == listed


def test_the_error_lines_the_page_quotes_are_the_bridges(tmp_path, capsys):
    """The missing-column and encoding lines of the page's table are what map check prints for its own example."""
    example = next(e for e in EXAMPLES if '"Test time"' in e.map_text and "assume_time" not in e.map_text)
    assert isinstance(example.sample, str)
    quoted = re.findall(r"\(`(x\.csv: [^`]+)`\)", PAGE)
    renamed = Example(example.line, example.map_text, example.sample.replace("Test time", "Testtime", 1))
    utf8 = Example(example.line, example.map_text.replace('"latin-1"', '"utf-8"'), example.sample)
    said = []
    for variant, written in ((renamed, "latin-1"), (utf8, "latin-1")):
        map_file = tmp_path / "m.toml"
        map_file.write_text(variant.map_text, encoding="utf-8")
        sample = tmp_path / "x.csv"
        sample.write_bytes(str(variant.sample).encode(written))
        assert 2 == main(["map", "check", str(map_file), str(sample)])
        said.append(capsys.readouterr().err.strip().replace(str(sample), "x.csv").replace(str(map_file), "m.toml"))
    offset = example.sample.encode("latin-1").index(b"\xe9")  # source: ISO/IEC 8859-1 code table (é is 0xE9)
    assert (quoted, f"byte {offset}:") == (said, said[1].split(" ", 1)[1][: len(f"byte {offset}:")])


def test_the_lung_volume_example_reads_the_volumes_and_the_labs_sets(tmp_path, capsys):
    """The page's lung-volume map: TM-1 names both sets and its volumes; TM-2 names none and gives TLC alone."""
    (example,) = [e for e in EXAMPLES if "lung_volumes.reference_set" in e.map_text]
    code, doc = _checked(example, tmp_path, capsys)
    first, second = _fields(doc, 0), _fields(doc, 1)
    keys = ("spirometry.reference_set", "lung_volumes.reference_set", "lung_volumes.method", "lung_volumes.tlc",
            "lung_volumes.frc", "lung_volumes.rv", "lung_volumes.rv_tlc")  # fmt: skip
    # by hand from the page's CSV: 7600 mL = 7.600 L (the digits written kept), 0,55 as a fraction = 55 %
    assert (0, ["GLI-2012", "ECSC 1993", "plethysmography", "7.600 L", "5.500 L", "4.200 L", "55 %"]) == (
        code,
        [first[k] for k in keys],
    )
    assert ["(empty)", "(empty)", "(empty)", "6.900 L", "(empty)", "(empty)", "(empty)"] == [second[k] for k in keys]
