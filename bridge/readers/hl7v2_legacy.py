"""Reader for ORU^R01 results from older HL7 v2 interfaces (2.3 to 2.5.1) through a field map (pure).

Owns: reading a file's messages (one or many; MLLP-framed or not; split by
``bridge.hl7.text.split_messages``), checking each MSH (ORU^R01 of a version the map accepts), and
reading each message with python-hl7: session fields from segment locations (``PID-5.2``),
observations from OBX by the local code in OBX-3.1, the value in OBX-5, the unit in OBX-6 or
fixed by the map, the manoeuvre number in OBX-4 (sub-ID) for manoeuvre fields (the DLCO test's
and spirometry's, unless the map numbers the field itself), and the lab's
status of each value in OBX-11 (table 0085: ``bridge.science.lab_status`` says what it does). Codes the
map does not name are reported with the record, never guessed at. One message, one session;
a bad message never stops the next.
"""

from __future__ import annotations

import re
from collections.abc import Iterator

import hl7

from bridge.errors import InputError, InvalidField, UnknownFormat, UnreadableInput
from bridge.hl7.text import SEGMENT_SEPARATOR, split_messages
from bridge.readers.mapped import Cell, MappedRecord, encoding_error, joined_text, mapped_record
from bridge.science.units import UnitCatalogue
from bridge.tables.field_map_model import FieldMap

_MSH = re.compile(r"MSH([^A-Za-z0-9\r\n])")


def read_hl7(data: bytes, source: str, fmap: FieldMap, catalogue: UnitCatalogue) -> Iterator[MappedRecord]:
    """Every message of a file as one record each (errors are returned in the record, not raised)."""
    if not data.strip():
        raise UnreadableInput("(file)", "a non-empty file of HL7 v2 messages, got an empty file", source)
    try:
        text = data.decode("utf-8-sig" if fmap.encoding == "utf-8" else fmap.encoding)
    except UnicodeDecodeError as exc:
        raise encoding_error(data, exc, fmap, "hl7.encoding", source) from None
    for number, segments in enumerate(split_messages(text), start=1):
        yield _record(number, segments, fmap, catalogue, source)


def _record(number: int, segments: list[str], fmap: FieldMap, catalogue: UnitCatalogue, source: str) -> MappedRecord:
    where = f"message {number}"
    try:
        message = _parsed(where, segments, fmap)
        cells, unmapped = _cells(where, message, fmap)
    except InputError as exc:
        return MappedRecord(where, (), error=exc.with_source(source))
    return mapped_record(where, cells, fmap, catalogue, source, unmapped)


def _parsed(where: str, segments: list[str], fmap: FieldMap) -> hl7.Message:
    """The message parsed by python-hl7 after its MSH is checked (type, version, delimiters)."""
    msh = segments[0]
    if not _MSH.match(msh) or len(msh) < 8:
        raise InvalidField(f"{where}: MSH", f"a message starting with MSH and its delimiters, got {msh[:12]!r}")
    # source: HL7 v2.5.1 ch. 2.14.9.2 (MSH-2: component, repetition, escape, subcomponent characters)
    encoding = msh[4:].split(msh[3], 1)[0]
    if not 3 <= len(encoding) <= 5 or len(set(encoding)) != len(encoding) or any(c.isalnum() for c in encoding):
        raise InvalidField(f"{where}: MSH-2", f"the encoding characters (such as ^~\\&), got {encoding!r}")
    try:
        message = hl7.parse(SEGMENT_SEPARATOR.join(segments))
        kind = (message.extract_field("MSH", 1, 9, 1, 1), message.extract_field("MSH", 1, 9, 1, 2))
        version = message.extract_field("MSH", 1, 12, 1, 1)
    except (ValueError, IndexError, KeyError, hl7.exceptions.ParseException) as exc:
        raise InvalidField(f"{where}: MSH", f"a parseable MSH segment ({exc})") from None
    if kind != ("ORU", "R01"):
        raise UnknownFormat(f"{where}: MSH-9", f"ORU^R01 (map {fmap.name}), got {'^'.join(kind)!r}")
    if version not in fmap.versions:
        raise UnknownFormat(
            f"{where}: MSH-12", f"a version of {', '.join(fmap.versions)} (map {fmap.name}), got {version!r}"
        )
    return message


def _cells(where: str, message: hl7.Message, fmap: FieldMap) -> tuple[list[Cell], list[str]]:
    first: dict[str, hl7.Segment] = {}  # each segment name's first segment, found in one pass
    observations: list[hl7.Segment] = []
    for segment in message:
        name = str(segment[0])
        first.setdefault(name, segment)
        if name == "OBX":
            observations.append(segment)
    cells: list[Cell] = []
    for source in fmap.fields:
        if source.value is not None:
            cells.append(Cell(source, source.value, f"{where}, (constant)"))
        elif source.locations:
            text = joined_text([_located(first, at) for at in source.locations], source, fmap)
            cells.append(Cell(source, text, f"{where}, {source.origin}", source.unit))
    codes = fmap.codes()
    unmapped: list[str] = []
    for index, obx in enumerate(observations, start=1):
        code = _field(obx, 3, 1)
        if code not in codes:
            unmapped.append(f"{where}, OBX {index} (code {code!r})")
            continue
        for source in codes[code]:
            at = f"{where}, OBX {index} (code {code!r})"
            unit = _field(obx, 6, 1) if source.unit_from_obx else source.unit
            manoeuvre = None
            if source.item is not None:  # a code of its own per manoeuvre: the map's number, not OBX-4
                manoeuvre = source.item - 1
            elif source.target.item_of is not None:
                manoeuvre = _manoeuvre(obx, at)
            # OBX-11: the lab's status of this one value (HL7 v2.5.1 ch. 7, table 0085)
            cells.append(Cell(source, _field(obx, 5, 1), at, unit, manoeuvre, _field(obx, 11, 1)))
    return cells, unmapped


def _located(first: dict[str, hl7.Segment], at: str) -> str:
    """The text at a location such as ``PID-5.2`` in the first segment of that name (empty when absent)."""
    name, _, rest = at.partition("-")
    field, _, component = rest.partition(".")
    segment = first.get(name)
    return _field(segment, int(field), int(component or 1)) if segment is not None else ""


def _field(segment: hl7.Segment, field: int, component: int) -> str:
    try:
        return str(segment.extract_field(1, field, 1, component, 1))
    except (IndexError, KeyError):
        return ""


def _manoeuvre(obx: hl7.Segment, where: str) -> int:
    """The 0-based manoeuvre of an OBX from its sub-ID (OBX-4: 1, 2, 3 ...)."""
    sub_id = _field(obx, 4, 1).strip()
    if not sub_id.isdigit() or int(sub_id) < 1:
        raise InvalidField(f"{where}, OBX-4", f"the manoeuvre number (1, 2, 3 ...), got {sub_id!r}")
    return int(sub_id) - 1
