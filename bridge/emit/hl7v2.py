"""HL7 v2.5.1 ORU^R01 in ER7 text: one message per outcome, built with string joins.

Owns: the segment layout (MSH, PID, ORC, OBR, NTE, one OBX per result item with its NTEs),
which fields are free text and which are not (escaping itself is ``bridge.hl7.text``), the
stable message control id (MSH-10), and the length rules (``docs/hl7v2.md``). What is emitted (items, values,
ranges, flags, notes) comes from :func:`bridge.emit.observations.build_content`, shared with the
FHIR emitter.

Must not: read the clock, draw random numbers, do I/O, or import hl7apy (about 50 ms per
message; a string join takes well under a millisecond). hl7apy and python-hl7 check the
output in the tests.

The decisions behind each field (escaping, lengths, OBX-7, PID-5, OBX-5, OBX-6, identity of
the order and the lab, blood values, results that cannot be obtained, OBX-3, MSH-10) are
written out in ``docs/hl7v2.md``.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterable
from datetime import date, datetime
from decimal import Decimal
from functools import cache
from types import MappingProxyType
from urllib.parse import urlsplit

from bridge.emit.content import ReportContent, ResultItem
from bridge.emit.identifiers import observation_identifier
from bridge.emit.notes import supporting_text
from bridge.emit.observations import OUTPUT_REVISION, build_content
from bridge.emit.settings import EmitContext
from bridge.emit.status import ItemStatus, OrderGroup, Statuses, Withdrawn, order_groups, resolve
from bridge.errors import ConfigError, InvalidField, MappingError
from bridge.hl7.text import ENCODING_CHARACTERS, FIELD_SEPARATOR, IS_LENGTH, SEGMENT_SEPARATOR, escape, escape_formatted
from bridge.model import Outcome, Patient
from bridge.tables import Code, Tables

VERSION = "2.5.1"
MESSAGE_TYPE = "ORU^R01^ORU_R01"
CHARACTER_SET = "UNICODE UTF-8"  # HL7 table 0211; names may hold any Unicode letter

CONTROL_ID_LENGTH = 20  # MSH-10 length in v2.5.1  # from memory
ST_LENGTH = 199  # hl7apy base data type ST
NM_LENGTH = 16  # hl7apy base data type NM
PRELIMINARY = "P"  # HL7 tables 0085 (OBX-11) and 0123 (OBR-25): preliminary
# OBX-11 (table 0085) and OBR-25 (table 0123) of each status: F final, C correction, P preliminary
STATUS_LETTERS: MappingProxyType[ItemStatus, str] = MappingProxyType(
    {"final": "F", "corrected": "C", "preliminary": PRELIMINARY}
)
DELETED = "D"  # table 0085: "Deletes the OBX record": a result a correction withdraws
FT_LENGTH = 65536  # hl7apy base data type FT (NTE-3)
ELLIPSIS = "..."

CODING_SYSTEMS = MappingProxyType({"loinc": "LN", "snomed": "SCT", "local": "L"})  # HL7 table 0396
CANNOT_BE_OBTAINED = "X"  # HL7 table 0085 (OBX-11): results cannot be obtained for this observation
UNIT_SYSTEM = "UCUM"
COMMENT_SOURCE = "L"  # HL7 table 0105: ancillary (filler) department is the source
UNNAMED = "^^^^^^U"  # XPN-7 name type U (unspecified, HL7 table 0200) when the record has no name


def to_oru(
    outcome: Outcome,
    tables: Tables,
    context: EmitContext,
    content: ReportContent | None = None,
    statuses: Statuses | None = None,
) -> str:
    """The ORU^R01 message for one outcome, segments separated by carriage returns.

    ``content`` is :func:`build_content` of the outcome in ``context.units`` and ``statuses``
    :func:`resolve` of it in ``context``; pass them when they are already at hand (another
    emitter built them), otherwise they are built here.
    """
    if content is None:
        content = build_content(
            outcome, tables, context.units, context.site.hemoglobin_unit, context.site.charted_predicted
        )
    if statuses is None:
        statuses = resolve(outcome, content, tables, context)
    lab = outcome.session.lab.name
    key = "lab_facilities" if any(name == lab for name, _ in context.site.lab_facilities) else "sending_facility"
    facility = _namespace_setting(key, context.site.facility_of(lab))
    msh, now = _msh(outcome, context, facility)
    performed = hl7_timestamp(outcome.session.performed_at)
    orders = _order_numbers(outcome, facility)
    performer = _performer(outcome, facility)
    segments = [msh, _pid(outcome.session.patient, context.site.patient_identifier_type, tables)]
    # The DLCO test, then each further test group (a spirometry phase), each an order group of its
    # own in the same ORU: ORC (only the first: the others share its order), OBR, then its OBX with
    # set ids from 1, a withdrawn result under the OBR it was sent under. OBR-25 (HL7 table 0123):
    # P when a value is preliminary (the lab's status, an allowed error finding).
    # source: HL7 v2.5.1 ch. 7, ORU^R01: {ORDER_OBSERVATION: [ORC] OBR {[NTE]} ... {OBSERVATION}} repeats
    for number, group in enumerate(order_groups(content, statuses, tables), start=1):
        if group.key is None:
            segments.append(_segment("ORC", "RE", *orders))
        segments.append(_obr(orders, tables, now, performed, STATUS_LETTERS[group.status], group.code, number))
        if group.key is None:
            segments += _ntes(content.notes)
        segments += _observations(group, statuses, performed, performer)
    return SEGMENT_SEPARATOR.join(segments) + SEGMENT_SEPARATOR


def control_id(outcome: Outcome, context: EmitContext, revision: int = OUTPUT_REVISION) -> str:
    """MSH-10: the same for a resend of the same content, new for a correction, other units or a new output revision.

    The test (lab and test id) is part of it: a file read through a field map may hold many
    sessions, each its own message with its own control id.
    """
    flag = "correction" if context.correction else "original"
    test = observation_identifier(outcome, "")
    basis = f"{outcome.source_sha256}|{test}|{context.units}|{flag}|revision {revision}"
    return hashlib.sha256(basis.encode("utf-8")).hexdigest()[:CONTROL_ID_LENGTH]


def numeric_text(text: str) -> str:
    """An NM value: plain decimal digits, never exponent notation (``1e-05`` -> ``0.00001``)."""
    if "e" not in text and "E" not in text:
        return text
    return format(Decimal(text), "f")


def hl7_timestamp(moment: datetime) -> str:
    """A DTM value with seconds and the UTC offset, e.g. ``20260310120000+0000``."""
    if moment.utcoffset() is None:
        raise ValueError(f"an HL7 timestamp needs a time zone; got naive {moment.isoformat()}")
    return moment.strftime("%Y%m%d%H%M%S%z")


def hl7_date(day: date) -> str:
    """A DT value, e.g. ``19790214``."""
    return day.strftime("%Y%m%d")


# ---------- segments ----------


def _msh(outcome: Outcome, context: EmitContext, sending_facility: str) -> tuple[str, str]:
    """MSH (MSH-4: the lab's facility id, escaped), and the message time as a TS (OBR-22 repeats it)."""
    sending_application = _namespace_setting("sending_application", context.site.sending_application)
    receiving_application = _namespace_setting("receiving_application", context.site.receiving_application)
    receiving_facility = _namespace_setting("receiving_facility", context.site.receiving_facility)
    now = hl7_timestamp(context.now)
    return _segment(
        "MSH",
        ENCODING_CHARACTERS,
        sending_application,
        sending_facility,
        receiving_application,
        receiving_facility,
        now,
        "",
        MESSAGE_TYPE,
        control_id(outcome, context),
        _namespace_setting("processing_id", context.site.processing_id),
        VERSION,
        "",
        "",
        "",
        "",
        "",
        CHARACTER_SET,
    ), now


def _pid(patient: Patient, identifier_type: str, tables: Tables) -> str:
    identifier = _identifier("patient.id", patient.id)
    kind = _namespace_setting("patient_identifier_type", identifier_type)
    name = _components(_name_part("patient.family", patient.family), _name_part("patient.given", patient.given))
    if not name:
        name = UNNAMED  # PID-5 is required; never "" (that means "delete" to many receivers)
    return _segment(
        "PID",
        "1",
        "",
        f"{identifier}^^^{_assigning_authority(patient.id_system)}^{kind}",  # CX.1, CX.4 (HD), CX.5
        "",
        name,
        "",
        hl7_date(patient.birth_date),
        tables.hl7.sex_codes[patient.sex],  # PID-8 (HL7 table 0001, mappings/hl7_tables.toml)
    )


def _order_numbers(outcome: Outcome, facility: str) -> tuple[str, str]:
    """Placer and filler order numbers (EI): the export's placer number, if any; the lab's test id."""
    session = outcome.session
    placer = session.placer_order_number
    placer_ei = _identifier("placer_order_number", placer) if placer is not None else ""
    return placer_ei, f"{_identifier('test_id', session.test_id)}^{facility}"  # EI.1 entity id, EI.2 namespace


def _performer(outcome: Outcome, facility: str) -> str:
    """OBX-23 (XON): XON.1 the lab's name, XON.10 its facility id."""
    name = _identifier("lab.name", outcome.session.lab.name)
    return f"{name}^^^^^^^^^{facility}"


def _obr(
    orders: tuple[str, str], tables: Tables, now: str, performed: str, status: str, code: Code | None = None, n: int = 1
) -> str:
    fields = [""] * 25
    fields[0] = str(n)  # OBR-1 set id: the order group's number in the message
    fields[1] = orders[0]  # OBR-2 placer order number (= ORC-2)
    fields[2] = orders[1]  # OBR-3 filler order number (= ORC-3)
    fields[3] = _coded(code or tables.codes.panel, "panel")  # OBR-4: the DLCO panel, or the test group's code
    fields[6] = performed  # OBR-7 observation date/time
    fields[21] = now  # OBR-22 results report/status change
    fields[23] = tables.hl7.service_section  # OBR-24 (HL7 table 0074)
    fields[24] = status  # OBR-25 result status (HL7 table 0123)
    return _segment("OBR", *fields)


def _observations(group: OrderGroup, statuses: Statuses, observed: str, performer: str) -> Iterable[str]:
    """The OBX (and NTE) of one order group's items, then of what it withdraws."""
    for set_id, item in enumerate(group.items, start=1):
        # OBX-11 (HL7 table 0085): P "preliminary results" for a value the lab marked preliminary
        # or with an allowed error finding (the finding follows in NTE); C only when it replaces a
        # final result sent before. Table 0078 (OBX-8) has no code for a questionable value, so
        # OBX-8 keeps the L/N flag.  # source: HL7 v2.5.1 ch. 7 and table 0085
        yield _obx(set_id, item, STATUS_LETTERS[statuses.of(item.key)], observed, performer)
        if item.notes or item.supporting:
            yield from _ntes((*item.notes, *(supporting_text(value) for value in item.supporting)))
    for set_id, gone in enumerate(group.withdrawn, start=len(group.items) + 1):
        yield _deleted_obx(set_id, gone, observed, performer)
        yield from _ntes((gone.reason,))


def _deleted_obx(set_id: int, gone: Withdrawn, observed: str, performer: str) -> str:
    """OBX-11 ``D`` for a result a correction withdraws: the code it was sent under, no value.

    OBX-3 (with OBX-4 empty, as sent) names the OBX under this order that is deleted; OBX-2 and
    OBX-5 are empty (OBX-2 is needed only with a value).  # source: HL7 v2.5.1 ch. 7, OBX-2, OBX-11, table 0085 D
    """
    coded = _coded(gone.code, gone.key)
    fields = [""] * 23
    fields[0], fields[2], fields[10], fields[13], fields[22] = str(set_id), coded, DELETED, observed, performer
    return "|".join(("OBX", *fields))  # OBX-1, -3, -11, -14 and -23 (the last field is never empty)


def _obx(set_id: int, item: ResultItem, status: str, observed: str, performer: str) -> str:
    """OBX-1 set id, -2 NM, -3 code, -5 value, -6 unit^unit^UCUM, -7 range, -8 flag, -11 status (HL7 table
    0085), -14 date/time of the observation, -17 method (CE), -23 performing organisation (XON).

    OBX-4 stays empty: no code repeats under the OBR (build_content sends one result per code).
    Without a value (a stated absence) OBX-2, -5 and -6 are empty and OBX-11 is X.
    """
    fields = [""] * 23
    fields[0], fields[2], fields[13], fields[22] = str(set_id), _coded(item.code, item.key), observed, performer
    if item.code.method is not None:
        fields[16] = _coded(item.code.method, f"{item.key}.method")
    quantity, low_q = item.quantity, item.low
    if quantity is None:
        fields[10] = CANNOT_BE_OBTAINED
        return "OBX|" + FIELD_SEPARATOR.join(fields)  # the last field is never empty: nothing to trim
    value = numeric_text(quantity.text())
    if len(value) > NM_LENGTH:
        raise InvalidField(item.key, f"a value of at most {NM_LENGTH} characters for HL7 NM, got {value}")
    unit = _unit_text(quantity.unit, item.key)
    # OBX-7 "LLN-ULN" when both limits are known (GLI-2017), ">LLN" for a lower limit alone; the
    # reference set and the other set's values are named in the item's NTEs (build_content).
    if low_q is not None and item.high is not None:
        low = f"{numeric_text(low_q.text())}-{numeric_text(item.high.text())}"
    else:
        low = f">{numeric_text(low_q.text())}" if low_q is not None else ""
    fields[1], fields[4], fields[5], fields[6] = "NM", value, f"{unit}^{unit}^{UNIT_SYSTEM}", low
    fields[7], fields[10] = item.flag or "", status  # HL7 table 0078; table 0085
    return "OBX|" + FIELD_SEPARATOR.join(fields)


def _ntes(notes: Iterable[str]) -> list[str]:
    return [
        _segment("NTE", str(i), COMMENT_SOURCE, _free_text(note, FT_LENGTH, formatted=True))
        for i, note in enumerate(notes, start=1)
    ]


# ---------- fields ----------


def _segment(name: str, *fields: str) -> str:
    return FIELD_SEPARATOR.join((name, *fields)).rstrip(FIELD_SEPARATOR)


def _components(*parts: str) -> str:
    return "^".join(parts).rstrip("^")


# The CE of a code and the text of a unit depend on the code table's entries alone (immutable):
# each is built once per process, not once per OBX.
@cache
def _unit_text(unit: str, key: str) -> str:
    """OBX-6 text of a UCUM code."""
    return _code_text(unit, "units.toml", f"unit of {key}")


@cache
def _coded(code: Code, key: str) -> str:
    """CE: identifier^text^coding system, then the standard code's as the alternate (OBR-4, OBX-3, OBX-17)."""
    identifier = _code_text(code.code, "codes.toml", f"codes.{key}.code")
    parts = [identifier, _free_text(code.display, ST_LENGTH), CODING_SYSTEMS[code.system]]
    if code.standard is not None:
        standard = code.standard
        alternate = _code_text(standard.code, "codes.toml", f"codes.{key}.standard.code")
        parts += [alternate, _free_text(standard.display, ST_LENGTH), CODING_SYSTEMS[standard.system]]
    return _components(*parts)


def _code_text(text: str, table: str, where: str) -> str:
    escaped = escape(text)
    if len(escaped) > ST_LENGTH:
        raise MappingError(table, where, f"a code of at most {ST_LENGTH} characters for HL7")
    return escaped


def _identifier(field: str, value: str) -> str:
    escaped = escape(value)
    if len(escaped) > ST_LENGTH:
        raise InvalidField(field, f"at most {ST_LENGTH} characters once HL7-escaped (identifiers are never cut)")
    return escaped


def _name_part(field: str, value: str | None) -> str:
    if value is None:
        return ""
    escaped = escape(value)
    if len(escaped) > ST_LENGTH:
        raise InvalidField(field, f"at most {ST_LENGTH} characters once HL7-escaped (names are never cut)")
    return escaped


def _namespace_setting(key: str, value: str) -> str:
    escaped = escape(value)
    if not escaped or len(escaped) > IS_LENGTH:
        raise ConfigError(key, f"1 to {IS_LENGTH} characters for an HL7 namespace id, got {value!r}")
    return escaped


def _free_text(text: str, limit: int, *, formatted: bool = False) -> str:
    """Escaped free text, cut at a character boundary with ``...`` when over ``limit``."""
    render = escape_formatted if formatted else escape
    escaped = render(text)
    if len(escaped) <= limit:
        return escaped
    # The escaped length grows with the kept prefix: find the longest prefix that fits.
    low, high = 0, len(text)
    while low < high:
        middle = (low + high + 1) // 2
        if len(render(text[:middle])) + len(ELLIPSIS) <= limit:
            low = middle
        else:
            high = middle - 1
    kept = text[:low]
    return render(kept) + ELLIPSIS


def _assigning_authority(system: str) -> str:
    """HD with subcomponents: namespace id & universal id & universal id type (HL7 table 0301)."""
    if system.startswith("urn:oid:"):
        universal, kind = system.removeprefix("urn:oid:"), "ISO"
    else:
        universal, kind = system, "URI"
    escaped = escape(universal)
    if len(escaped) > ST_LENGTH:
        raise InvalidField("patient.id_system", f"at most {ST_LENGTH} characters once HL7-escaped")
    return "&".join((namespace_id(system), escaped, kind))


def namespace_id(system: str) -> str:
    """A short readable HD namespace id for an identifier system, e.g. ``FENWICK-HOLLOW``.

    The host's first label for a URL, the whole text otherwise; letters, digits and hyphens,
    upper case, at most 20 characters. The full system travels as the universal id.
    """
    parts = urlsplit(system)
    host = (parts.hostname or "").removeprefix("www.")
    label = host.split(".")[0] if host else system
    cleaned = re.sub(r"[^A-Za-z0-9]+", "-", label).strip("-").upper()
    return cleaned[:IS_LENGTH].rstrip("-") or "UNKNOWN"
