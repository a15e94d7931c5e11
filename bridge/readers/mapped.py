"""Applying a field map to one record's texts: each text -> a typed value -> a ``dlco-result/1`` tree (pure).

Owns: :class:`Cell` (one source text and the canonical field it feeds, with where it was found),
:class:`MappedRecord` (one session as a field-map reader saw it), and the value transforms a map
names: decimal comma, missing-value markers, percentages, date and date-time formats with the
site's time zone, sex codes, unit spellings. The tree goes through
:func:`bridge.readers.json_export.session_from_tree`, the JSON reader's own last step, so every
source meets the same model validation; the pipeline normalises it as it does any session.
Every failure is an :class:`bridge.errors.InputError` whose field names the row or message and
the column or code.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from datetime import datetime
from decimal import Decimal
from typing import Any

from bridge.errors import InputError, InvalidField, MissingField, UnitError, UnreadableInput
from bridge.model import Session
from bridge.readers.json_export import FORMAT, session_from_tree
from bridge.science.units import UnitCatalogue
from bridge.tables.field_map_model import ENCODINGS, FieldMap, FieldSource, has_time

_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d{1,3})?")


@dataclass(frozen=True, slots=True)
class Cell:
    """One source text, the canonical field it feeds, and where it was found."""

    source: FieldSource
    text: str
    where: str  # "line 4, column 'VI'" or "message 2, OBX 5 (code 'TLCO')"
    unit: str | None = None  # the unit text the source gave (fixed, a unit column or OBX-6)
    manoeuvre: int | None = None  # 0-based, for manoeuvre fields (and items of spirometry's manoeuvre lists)
    status: str | None = None  # the lab's status of this value (OBX-11, or the map's status column)


@dataclass(frozen=True, slots=True)
class MappedRecord:
    """One session read through a map: its cells, what nothing used, and the session or why not."""

    where: str  # "lines 2-4" or "message 3"
    cells: tuple[Cell, ...]
    session: Session | None = None
    error: InputError | None = None
    unmapped: tuple[str, ...] = ()  # source codes present in the record that the map does not name (findings)
    unused: tuple[str, ...] = ()  # source columns of the layout the map does not read (map check shows them)


def mapped_record(
    where: str,
    cells: Sequence[Cell],
    fmap: FieldMap,
    catalogue: UnitCatalogue,
    source: str,
    unmapped: Sequence[str] = (),
    unused: Sequence[str] = (),
) -> MappedRecord:
    """The session of one record, or the first error met building it (never raised)."""
    found = MappedRecord(where, tuple(cells), unmapped=tuple(unmapped), unused=tuple(unused))
    try:
        tree = record_tree(cells, fmap, catalogue)  # errors name the cell's row and column or code
    except InputError as exc:
        return replace(found, error=exc.with_source(source))
    try:
        session = session_from_tree(tree, catalogue)
    except InputError as exc:  # a canonical field the record lacks or cannot hold
        return replace(found, error=_at(exc, where, source))
    return replace(found, session=session)


def _at(exc: InputError, where: str, source: str) -> InputError:
    """The error with the record's place before its field (``lines 2-4: patient.height``)."""
    clone = exc.with_source(source)
    clone.field = f"{where}: {exc.field}"
    Exception.__init__(clone, clone.line())
    return clone


def record_tree(cells: Iterable[Cell], fmap: FieldMap, catalogue: UnitCatalogue) -> dict[str, Any]:
    """The ``dlco-result/1`` tree of one record; missing values are left out.

    A value's status (OBX-11, a status column) goes to ``lab_status`` under the value's path, also
    when the value itself is missing (``X``: results cannot be obtained); the map's ``[status]``
    words become codes.
    """
    tree: dict[str, Any] = {"format": FORMAT}
    items: dict[str, dict[int, dict[str, Any]]] = {}  # list path -> item number -> the item's tree
    statuses: list[tuple[str | None, int | None, str, str]] = []  # (list, item, path, code)
    for cell in cells:
        target = cell.source.target
        path, of = target.path, target.item_of
        status = (cell.status or "").strip()
        if status and status not in fmap.missing:
            statuses.append((of, cell.manoeuvre, path, fmap.status_codes.get(status, status)))
        value = cell_value(cell, fmap, catalogue)
        if value is None:
            continue
        if of is not None and cell.manoeuvre is not None:
            _put(items.setdefault(of, {}).setdefault(cell.manoeuvre, {}), path.removeprefix(of + "."), value)
        else:
            _put(tree, path, value)
    order = {of: sorted(numbered) for of, numbered in items.items()}  # numbers order the items; gaps close
    for of, numbers in order.items():
        _put(tree, of, [items[of][n] for n in numbers])
    if statuses:
        tree["lab_status"] = {
            _status_path(path, of, order[of].index(n) if of is not None and n is not None else None): code
            for of, n, path, code in statuses
            if of is None or n is None or n in items.get(of, {})
        }
    return tree


def _status_path(path: str, of: str | None, index: int | None) -> str:
    """``manoeuvres.reported.dlco`` of the second manoeuvre -> ``manoeuvres[1].reported.dlco``, as findings say."""
    if of is None or index is None:
        return path
    return f"{of}[{index}].{path.removeprefix(of + '.')}"


def _put(tree: dict[str, Any], path: str, value: Any) -> None:
    *parents, last = path.split(".")
    node = tree
    for name in parents:
        node = node.setdefault(name, {})
    node[last] = value


def is_missing(text: str, fmap: FieldMap) -> bool:
    return text.strip() in fmap.missing


def cell_value(cell: Cell, fmap: FieldMap, catalogue: UnitCatalogue) -> Any:
    """The value of one cell as the tree holds it (None when the source wrote a missing marker)."""
    text = cell.text.strip()
    if text in fmap.missing:
        return None
    target = cell.source.target
    if target.kind == "quantity":
        return {"value": number(text, fmap, cell.where), "unit": unit_of(cell, fmap, catalogue)}
    if target.kind == "number":
        value = number(text, fmap, cell.where)
        return value / 100 if cell.source.percent else value
    if target.kind == "date":
        return _moment(text, fmap.formats_for(cell.source), cell.where, "date")[0].date().isoformat()
    if target.kind == "datetime":
        moment, fmt = _moment(text, fmap.formats_for(cell.source), cell.where, "date-time")
        if not has_time(fmt) and cell.source.assume_time is not None:  # the map says which time (never guessed)
            moment = datetime.combine(moment.date(), cell.source.assume_time)
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=fmap.zone)
        return moment.isoformat()
    if target.kind == "sex":
        sex = fmap.sex_codes.get(text)
        if sex is None:
            raise InvalidField(cell.where, f"a sex code of the map ({', '.join(fmap.sex_codes)}), got {text!r}")
        return sex
    return text


def number(text: str, fmap: FieldMap, where: str) -> Decimal:
    """A decimal number as written (digits kept), with the map's decimal separator."""
    written = text.replace(",", ".") if fmap.decimal == "," and "." not in text else text
    if not _NUMBER.fullmatch(written):
        sep = "a decimal comma" if fmap.decimal == "," else "a decimal point"
        raise InvalidField(where, f"a number with {sep}, got {text!r}")
    return Decimal(written)


def unit_of(cell: Cell, fmap: FieldMap, catalogue: UnitCatalogue) -> str:
    """The unit spelling the tree carries: the map's alias target, else the source's own (known) spelling."""
    written = (cell.unit or "").strip()
    if not written or written in fmap.missing - {""}:
        raise MissingField(cell.where, "a unit (the map reads it from the source, which gave none)")
    spelling = fmap.unit_aliases.get(written, written)
    unit = catalogue.resolve(spelling)
    if unit is None:
        raise UnitError(cell.where, written, "is not in mappings/units.toml nor in [units] of the map")
    if unit.dimension != cell.source.target.dimension:
        dimension = str(cell.source.target.dimension).replace("_", " ")
        raise UnitError(
            cell.where, written, f"is a {unit.dimension.replace('_', ' ')} unit; expected a {dimension} unit"
        )
    return spelling


def _moment(text: str, formats: Sequence[str], where: str, what: str) -> tuple[datetime, str]:
    """The moment the first format that reads ``text`` gives, and that format."""
    for fmt in formats:
        try:
            return datetime.strptime(text, fmt), fmt
        except ValueError:
            continue
    shown = f"format {formats[0]}" if len(formats) == 1 else f"formats {' or '.join(formats)}"
    raise InvalidField(where, f"a {what} in the map's {shown}, got {text!r}")


def joined_text(texts: Sequence[str], source: FieldSource, fmap: FieldMap) -> str:
    """The text of a field read from one or several sources: the written parts joined (a missing part left out).

    A field whose every part is missing is missing (its first part's marker stands for it).
    """
    if len(texts) == 1:
        return texts[0]
    written = [t.strip() for t in texts if not is_missing(t, fmap)]
    return source.join.join(written) if written else texts[0] if texts else ""


def encoding_error(data: bytes, exc: UnicodeDecodeError, fmap: FieldMap, key: str, source: str) -> UnreadableInput:
    """The file is not in the map's encoding: the byte offset, the byte, and the encoding the bytes read as."""
    likely = likely_encoding(data)
    got = f"got byte 0x{data[exc.start]:02x}" if exc.start < len(data) else "got a truncated character"
    if likely not in ENCODINGS:
        advice = f"; the file looks like {likely}, which a map does not read: export it as UTF-8"
    else:
        advice = f'; the file reads as {likely} (set encoding = "{likely}")' if likely != fmap.encoding else ""
    return UnreadableInput(f"byte {exc.start}", f"{fmap.encoding} text as the map says ({key}), {got}{advice}", source)


def likely_encoding(data: bytes) -> str:
    """The encoding the bytes most likely are: UTF-16 when a byte-order mark says so; UTF-8 if they decode
    as it; else cp1252 if they use its printable bytes 0x80-0x9F (Windows quotes, dashes, the euro sign);
    else Latin-1, which reads any byte."""
    # source: Unicode Standard, section 23.8 (U+FEFF as a byte-order mark: FF FE or FE FF opens UTF-16)
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        return "utf-16"
    # source: WHATWG Encoding Standard, windows-1252 index (0x80-0x9F are C1 controls in ISO 8859-1)
    for codec in ("utf-8", "cp1252"):
        if codec == "cp1252" and not any(0x80 <= b <= 0x9F for b in data):
            continue
        try:
            data.decode(codec)
        except UnicodeDecodeError:
            continue
        return codec
    return "latin-1"
