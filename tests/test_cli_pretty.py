"""`convert` writes compact Bundles (what the service sends); `--pretty` the same document indented for people."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

import pytest

from bridge.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = ROOT / "samples" / "06-three-manoeuvres.json"


def convert(out: Path, *flags: str) -> bytes:
    assert 0 == main(["convert", str(SAMPLE), "--to", "fhir", "--out", str(out), *flags])
    [written] = [p for p in out.iterdir() if p.name.endswith(".bundle.json")]
    return written.read_bytes()


class _OneInstant(datetime):
    """The shell's clock stopped: two runs issue their resources at the same time (each reads it once)."""

    @classmethod
    def now(cls, tz: object = None) -> datetime:  # type: ignore[override]
        return datetime(2026, 3, 10, 12, 0, 0, tzinfo=UTC)


def test_convert_writes_a_compact_bundle_and_pretty_the_same_document_indented(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Default: one line, no insignificant whitespace; --pretty: the same JSON document, numbers in the same digits."""
    monkeypatch.setattr("bridge.cli.files.datetime", _OneInstant)  # two runs either side of a second differed
    compact = convert(tmp_path / "compact")
    pretty = convert(tmp_path / "pretty", "--pretty")
    # source: RFC 8259 §2 (whitespace between tokens is insignificant); read by the stdlib json module,
    # numbers kept as their text so 7.460 and 7.46 would differ
    as_text = {"parse_float": str, "parse_int": str}

    assert json.loads(compact, **as_text) == json.loads(pretty, **as_text)
    assert (0, True) == (compact.count(b"\n"), pretty.count(b"\n") > 500)
    assert b'"resourceType":"Bundle"' in compact and b'"resourceType": "Bundle"' in pretty
    assert b'"issued":"2026-03-10T12:00:00' in compact  # both runs read the stopped clock


def test_pretty_changes_only_fhir_bundles_not_hl7(tmp_path: Path) -> None:
    """--pretty leaves the ORU^R01 bytes alone (segments separated by CR, no line feeds)."""
    plain = main(["convert", str(SAMPLE), "--to", "hl7", "--out", str(tmp_path / "a")])
    pretty = main(["convert", str(SAMPLE), "--to", "hl7", "--out", str(tmp_path / "b"), "--pretty"])
    [a] = list((tmp_path / "a").iterdir())
    [b] = list((tmp_path / "b").iterdir())

    assert (0, 0, a.read_bytes()) == (plain, pretty, b.read_bytes())
