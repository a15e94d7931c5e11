"""The HL7 v2 tables the bridge writes or reads (``mappings/hl7_tables.toml``) as one typed value (pure).

Owns: parsing that table into :class:`Hl7Tables` (every error a MappingError naming the key) and
what each code means to the bridge: the sex code of PID-8 (table 0001), what an ACK's MSA-1 asks
the sender to do and which codes the stand-in answers (table 0008), the section a report is filed
under (table 0074) and the processing ids a site may set (table 0103). ``bridge.tables.files``
reads the file once; the core gets it as ``Tables.hl7``, the shell from ``hl7_tables()`` there.
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any, Literal

from bridge.errors import MappingError
from bridge.model import Sex

NAME = "hl7_tables.toml"
Answer = Literal["accept", "error", "reject"]
_ANSWERS: tuple[Answer, ...] = ("accept", "error", "reject")
_MODES = ("original", "enhanced")


@dataclass(frozen=True, slots=True)
class Hl7Tables:
    """The codes of HL7 tables 0001, 0008, 0074 and 0103 and what each means to the bridge."""

    sex_codes: Mapping[Sex, str]  # table 0001: the record's sex -> PID-8
    acknowledgments: Mapping[str, Answer]  # table 0008: MSA-1 -> what the sender does
    original_acknowledgments: tuple[str, ...]  # table 0008, original mode: what a receiver answers
    service_section: str  # table 0074: OBR-24 of a lung-function report
    service_section_display: str
    processing_ids: tuple[str, ...]  # table 0103: MSH-11

    @property
    def sex_of_code(self) -> Mapping[str, str]:
        """Table 0001 read back: code -> the record's sex value (a field map's default ``[sex]``)."""
        return MappingProxyType({code: sex.value for sex, code in self.sex_codes.items()})

    def answered_with(self, answer: Answer) -> frozenset[str]:
        """The MSA-1 codes that mean ``answer`` (accept, error or reject)."""
        return frozenset(code for code, meant in self.acknowledgments.items() if meant == answer)


def hl7_tables(text: str, name: str = NAME) -> Hl7Tables:
    """Parse ``hl7_tables.toml``; a missing or unknown entry is a MappingError naming its key."""
    try:
        tree = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise MappingError(name, "file", f"valid TOML ({exc})") from exc
    table = _table(tree, "table", name)
    sexes = _table(_table(table, "0001", name, "table."), "sex", name, "table.0001.")
    known = {sex.value: sex for sex in Sex}
    if set(sexes) != set(known):
        raise MappingError(name, "table.0001.sex", f"one code for each of {', '.join(known)}")
    sex_table = _codes(table, "0001", name)
    for sex, code in sexes.items():
        if code not in sex_table:
            raise MappingError(name, f"table.0001.sex.{sex}", f"a code of table 0001, got {code!r}")
    acks: dict[str, Answer] = {}
    original: list[str] = []
    for code, entry in _codes(table, "0008", name).items():
        where = f"table.0008.codes.{code}"
        answer, mode = entry.get("answer") if isinstance(entry, dict) else None, entry.get("mode")
        if answer not in _ANSWERS or mode not in _MODES:
            raise MappingError(name, where, f"answer one of {', '.join(_ANSWERS)} and mode one of {', '.join(_MODES)}")
        acks[code] = answer
        if mode == "original":
            original.append(code)
    section = _table(table, "0074", name, "table.").get("service_section")
    if not isinstance(section, str) or section not in _codes(table, "0074", name):
        raise MappingError(name, "table.0074.service_section", f"a code of table 0074, got {section!r}")
    return Hl7Tables(
        sex_codes=MappingProxyType({known[sex]: code for sex, code in sexes.items()}),
        acknowledgments=MappingProxyType(acks),
        original_acknowledgments=tuple(original),
        service_section=section,
        service_section_display=str(_codes(table, "0074", name)[section]),
        processing_ids=tuple(_codes(table, "0103", name)),
    )


def _table(tree: Mapping[str, Any], key: str, name: str, prefix: str = "") -> Mapping[str, Any]:
    value = tree.get(key)
    if not isinstance(value, dict) or not value:
        raise MappingError(name, prefix + key, "a table")
    return value


def _codes(table: Mapping[str, Any], number: str, name: str) -> Mapping[str, Any]:
    return _table(_table(table, number, name, "table."), "codes", name, f"table.{number}.")
