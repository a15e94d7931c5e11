"""What ``convert`` writes into its output folder: names that never collide, nothing replaced in silence (shell).

Owns :func:`output_stem` (a test id as a file name: percent-encoded, so that ``X/1``, ``X_1`` and
``X 1`` give three names and ``urllib.parse.unquote`` gives the test id back) and
:class:`OutputFolder`: each outcome's payloads written atomically (owner-only files), a second
input with the same test id but other content refused naming both files (unless ``overwrite``),
the same content written once, and a file of an earlier run that is replaced said so.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

from bridge.emit.fhir_json import indented
from bridge.errors import InvalidField
from bridge.model import Outcome, Session
from bridge.service.files import write_atomically
from bridge.service.transports.base import FHIR_JSON, HL7_V2_ER7

EXTENSIONS = {FHIR_JSON: ".bundle.json", HL7_V2_ER7: ".oru.hl7"}


def output_stem(test_id: str) -> str:
    """A test id as a file name: RFC 3986 percent-encoding of all but letters, digits and ``-._~``.

    No separator or control character survives, names of different test ids differ, and
    ``urllib.parse.unquote`` reverses it. A leading dot (a hidden name) is encoded too.
    """
    stem = quote(test_id, safe="")  # source: RFC 3986 section 2.3, unreserved characters are kept
    return "%2E" + stem[1:] if stem.startswith(".") else stem


@dataclass(frozen=True, slots=True)
class Written:
    """What became of one outcome: the files written, and a note for people (empty: nothing to say)."""

    files: tuple[Path, ...]
    note: str = ""


@dataclass(slots=True)
class OutputFolder:
    """``convert``'s output folder for one run."""

    folder: Path
    overwrite: bool = False  # a later input with the same test id and other content replaces the earlier one
    pretty: bool = False  # FHIR Bundles indented for people (convert --pretty); otherwise the bytes the service sends
    _first: dict[str, tuple[Path, Session]] = field(default_factory=dict)  # test id -> first input, its session
    _ours: dict[tuple[int, int], str] = field(default_factory=dict)  # (device, inode) of a file written -> test id

    def write(self, source: Path, outcome: Outcome) -> Written:
        """Write the payloads of ``outcome`` (read from ``source``); raises InvalidField on a conflict."""
        test_id = outcome.session.test_id
        earlier = self._first.get(test_id)
        note = ""
        if earlier is not None:
            if earlier[1] == outcome.session:
                return Written((), f"same test id and content as {earlier[0]}: written once")
            if not self.overwrite:
                raise InvalidField(
                    "test_id",
                    f"one content per test id in a run, got {test_id!r} also in {earlier[0]} with other content "
                    "(--overwrite writes the later file over it)",
                    str(source),
                )
            note = f"replaced the files of {earlier[0]} (--overwrite)"
        targets = [self.folder / (output_stem(test_id) + EXTENSIONS[p.content_type]) for p in outcome.payloads]
        for target in targets:
            owner = self._owner(target)
            if owner is not None and owner != test_id:  # a case-insensitive file system: Ab and AB are one name
                raise InvalidField(
                    "test_id",
                    f"a test id whose file name is free, got {test_id!r}: {target.name} is the file of test id "
                    f"{owner!r} on this file system (names differing only in case are one name here)",
                    str(source),
                )
            if owner is None and target.exists() and not note:
                note = "replaced a file of an earlier run"
        for target, payload in zip(targets, outcome.payloads, strict=True):
            pretty = self.pretty and payload.content_type == FHIR_JSON
            write_atomically(target, indented(payload.data) if pretty else payload.data)
            stat = target.stat()
            self._ours[(stat.st_dev, stat.st_ino)] = test_id
        self._first[test_id] = (source, outcome.session)
        return Written(tuple(targets), note)

    def _owner(self, target: Path) -> str | None:
        """The test id this run wrote ``target`` for (None: not written in this run, or absent)."""
        try:
            stat = os.stat(target)
        except FileNotFoundError:
            return None
        return self._ours.get((stat.st_dev, stat.st_ino))
