"""The CSV reader against the Python standard library's csv module (RFC 4180), encodings, and bad rows."""

from __future__ import annotations

import csv
import io

import pytest

from bridge.errors import InputError, UnknownFormat, UnreadableInput
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.readers.csv_export import read_csv
from bridge.tables import Tables
from tests.maps.conftest import SMALL_CSV_MAP, small_csv_map

HEADER = ["id", "when", "patient", "family", "sex", "born", "height", "dlco", "dlco unit"]
# Names that need RFC 4180 quoting: an embedded delimiter, a doubled quote, a line break, a non-ASCII letter.
AWKWARD = ["Fictive, Jr", 'O"Fictive', "Fictive\nSecond line", "Fictivé"]


def _rows(decimal: str = ".") -> list[list[str]]:
    dlco = "24.6" if decimal == "." else "24,6"
    return [
        [f"T-{i}", "2026-03-02 09:15", f"FICT-{i}", name, "F", "1981-01-15", "178", dlco, "mL/min/mmHg"]
        for i, name in enumerate(AWKWARD, start=1)
    ]


def _written(rows: list[list[str]], delimiter: str, encoding: str = "utf-8", lineterminator: str = "\r\n") -> bytes:
    """The file as the stdlib csv writer writes it (the reference for what a valid file is)."""
    out = io.StringIO(newline="")
    writer = csv.writer(out, delimiter=delimiter, lineterminator=lineterminator, quoting=csv.QUOTE_MINIMAL)
    writer.writerow(HEADER)
    writer.writerows(rows)
    return out.getvalue().encode(encoding)


def _families(data: bytes, tables: Tables, **map_args: str) -> list[str | None]:
    fmap = small_csv_map(tables, **map_args)
    return [r.session.patient.family if r.session else None for r in read_csv(data, "x.csv", fmap, tables.units)]


@pytest.mark.parametrize("delimiter", [",", ";", "\t", "|"])
def test_quoted_fields_read_as_the_stdlib_reader_reads_them(delimiter, tables):
    """Embedded delimiters, doubled quotes and line breaks come back as csv.reader gives them."""
    # source: RFC 4180 section 2 (rules 5-7: quoted fields, embedded line breaks, doubled quotes)
    data = _written(_rows(), delimiter)
    reference = list(csv.reader(io.StringIO(data.decode(), newline=""), delimiter=delimiter))
    assert [row[3] for row in reference[1:]] == _families(data, tables, delimiter=delimiter)


@pytest.mark.parametrize("delimiter", [",", ";", "\t"])
def test_auto_delimiter_is_the_one_the_stdlib_sniffer_finds(delimiter, tables):
    """delimiter = "auto" reads a file as csv.Sniffer and csv.reader read it."""
    data = _written(_rows(), delimiter, lineterminator="\n")
    dialect = csv.Sniffer().sniff(data.decode(), delimiters=",;\t|")
    reference = list(csv.reader(io.StringIO(data.decode(), newline=""), dialect))
    assert [row[3] for row in reference[1:]] == _families(data, tables, delimiter="auto")


ENCODINGS = [("utf-8", b"", "utf-8"), ("utf-8", b"\xef\xbb\xbf", "utf-8"), ("latin-1", b"", "latin-1")]


@pytest.mark.parametrize(("encoding", "bom", "map_encoding"), ENCODINGS)
def test_encodings(encoding, bom, map_encoding, tables):
    """UTF-8 with or without a byte-order mark, and Latin-1, give the same names."""
    data = bom + _written(_rows(), ";", encoding)
    expected = list(AWKWARD)  # Python's own codecs are the reference for the bytes
    assert expected == _families(data, tables, delimiter=";", csv_extra=f'encoding = "{map_encoding}"')


def test_a_latin_1_file_read_as_utf_8_is_refused_naming_the_byte_and_the_likely_encoding(tables):
    """Bytes that are not UTF-8 under a UTF-8 map: one line naming the byte offset, the setting and Latin-1."""
    data = _written(_rows(), ";", "latin-1")
    offset = data.index(b"\xe9")  # source: ISO/IEC 8859-1 code table (é is 0xE9; UTF-8 writes it C3 A9)
    with pytest.raises(UnreadableInput) as caught:
        _families(data, tables, delimiter=";")
    expected = (
        f"x.csv: byte {offset}: utf-8 text as the map says (csv.encoding), got byte 0xe9; "
        'the file reads as latin-1 (set encoding = "latin-1")'
    )
    assert expected == str(caught.value)


def test_a_windows_1252_file_is_named_as_such_and_reads_with_that_encoding(tables):
    """Typographic quotes (0x84, 0x93 in Windows-1252) suggest cp1252, and a map saying cp1252 reads the names."""
    # source: WHATWG Encoding Standard, index windows-1252 (0x84 = U+201E, 0x93 = U+201C; C1 controls in ISO 8859-1)
    names = ["\u201eFictive\u201c", "Fictivé"]
    rows = [[*row[:3], name, *row[4:]] for row, name in zip(_rows(), names, strict=False)]
    data = _written(rows, ";", "cp1252")
    with pytest.raises(UnreadableInput) as caught:
        _families(data, tables, delimiter=";")
    suggested = 'the file reads as cp1252 (set encoding = "cp1252")'
    assert (True, names) == (
        str(caught.value).endswith(suggested),
        _families(data, tables, delimiter=";", csv_extra='encoding = "cp1252"'),
    )


def test_a_utf_16_file_is_named_and_not_read_as_latin_1(tables):
    """A UTF-16 byte-order mark: the line says to export as UTF-8 rather than suggest a single-byte encoding."""
    data = _written(_rows(), ";", "utf-16")  # Python's utf-16 codec writes the byte-order mark first
    with pytest.raises(UnreadableInput) as caught:
        _families(data, tables, delimiter=";")
    expected = "x.csv: byte 0: utf-8 text as the map says (csv.encoding), got byte 0xff; the file looks like utf-16"
    assert expected == str(caught.value)[: len(expected)]


def test_decimal_comma_keeps_the_reported_digits(tables):
    """24,60 with a decimal-comma map is 24.60 with two reported decimals."""
    rows = _rows(",")
    rows[0][7] = "24,60"
    fmap = small_csv_map(tables, delimiter=";", decimal=",")
    first = next(read_csv(_written(rows[:1], ";"), "x.csv", fmap, tables.units))
    assert first.session is not None
    dlco = first.session.results.dlco
    assert dlco is not None and dlco.original is not None
    # read and normalised in one step: the canonical UCUM unit, the lab's own text kept as the original
    assert (24.6, 2, "mL/min/mm[Hg]", "24.60", "mL/min/mmHg") == (
        dlco.value,
        dlco.decimals,
        dlco.unit,
        dlco.original.value,
        dlco.original.unit,
    )


def test_a_file_without_the_maps_columns_is_not_its_format(tables):
    """A header lacking a mapped column is UnknownFormat naming the map and the column, never guessed at."""
    data = b"id,when,patient\nT-1,2026-03-02 09:15,FICT-1\n"
    with pytest.raises(UnknownFormat) as caught:
        _families(data, tables)
    line = next(i for i, t in enumerate(SMALL_CSV_MAP.splitlines(), 1) if t.startswith('"patient.family"'))
    expected = (
        f"x.csv: (header): the columns of map small.toml; missing 'family' (map line {line}, "
        'fields."patient.family"); no column of the header is close'
    )
    assert expected == str(caught.value)


def test_a_misspelt_column_names_the_map_line_the_field_and_the_closest_column(tables):
    """A header that writes 'Family name' where the map reads 'family': the map line, the field and the near miss."""
    data = b"id,when,patient,Family name,sex,born,height,dlco,dlco unit\n"
    with pytest.raises(UnknownFormat) as caught:
        _families(data, tables)
    # the map line: counted in the map's text itself
    line = next(i for i, t in enumerate(SMALL_CSV_MAP.splitlines(), 1) if t.startswith('"patient.family"'))
    expected = (
        f"x.csv: (header): the columns of map small.toml; missing 'family' (map line {line}, "
        "fields.\"patient.family\"); closest in the header: 'Family name'"
    )
    assert expected == str(caught.value)


# ---- bad rows: one line naming the file, the row and the column; the other rows go on -------------


def _bad(change, tables: Tables) -> list[str]:
    rows = _rows()
    change(rows)
    data = _written(rows, ",")
    fmap = small_csv_map(tables)
    results = list(process_all(data, "lab/x.csv", tables, PipelineSettings(field_map=fmap)))
    assert 3 == sum(isinstance(r, Outcome) for r in results)  # the three good rows went on
    return [str(r) for r in results if isinstance(r, InputError)]


def test_a_short_row(tables):
    """A row with too few columns names its line."""
    assert ["lab/x.csv: line 3: 9 columns as in the header, got 8"] == _bad(lambda rows: rows[1].pop(), tables)


def test_an_unparseable_number(tables):
    """A number that is not one names its line and column."""

    def change(rows):
        rows[0][6] = "17x"

    assert ["lab/x.csv: line 2, column 'height': a number with a decimal point, got '17x'"] == _bad(change, tables)


def test_a_date_not_in_the_maps_format(tables):
    """A birth date in another format names its line, column and the format expected."""

    def change(rows):
        rows[2][5] = "15/01/1981"

    expected = ["lab/x.csv: line 4, column 'born': a date in the map's format %Y-%m-%d, got '15/01/1981'"]
    assert expected == _bad(change, tables)  # the row starts on line 4 (its quoted name spans lines 4-5)


def test_a_unit_the_map_does_not_know(tables):
    """A unit neither the catalogue nor the map knows names its line and column."""

    def change(rows):
        rows[3][8] = "furlongs"

    expected = [
        "lab/x.csv: line 6, column 'dlco': unit 'furlongs' is not in mappings/units.toml nor in [units] of the map"
    ]
    assert expected == _bad(change, tables)


def test_refuse_setting_refuses_the_file_at_the_first_bad_row(tables):
    """on_bad_record = "refuse": the first bad row is raised, refusing the whole file."""
    rows = _rows()
    rows[1][6] = "tall"
    fmap = small_csv_map(tables, map_extra='on_bad_record = "refuse"')
    with pytest.raises(InputError) as caught:
        list(process_all(_written(rows, ","), "x.csv", tables, PipelineSettings(field_map=fmap)))
    assert "x.csv: line 3, column 'height': a number with a decimal point, got 'tall'" == str(caught.value)


def test_streams_sessions_one_at_a_time(tables):
    """The reader yields the first session before it has read the rest of the file (a generator of lines)."""
    fmap = small_csv_map(tables)
    header = ",".join(HEADER) + "\n"
    row = "T-1,2026-03-02 09:15,FICT-1,Fictive,F,1981-01-15,178,24.6,mL/min/mmHg\n"
    consumed = []

    def lines():
        for i, line in enumerate([header, row, row.replace("T-1", "T-2"), *[row] * 50]):
            consumed.append(i)
            yield line

    from bridge.readers.csv_export import read_csv_lines

    first = next(read_csv_lines(lines(), "x.csv", fmap, tables.units))
    assert "T-1" == (first.session.test_id if first.session else None)
    assert len(consumed) < 30  # the sniff window and the next row, not the 53 lines
