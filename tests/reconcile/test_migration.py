"""``reconcile PATH... --fhir-base URL``, the migration form: an archive loaded with ``convert``'s bytes, checked.

The archive is converted by ``dlco-bridge convert`` and every Bundle written is POSTed to the
stand-in over the real FHIR transport, as a migration team would load it; reconcile then runs the
one pipeline over the same archive and asks the stand-in for each resource. Inputs are invented.
"""

from __future__ import annotations

import csv
import json
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from bridge import cli
from bridge.service.receiver import FhirPeer, ResourceStore
from bridge.service.transports.base import FHIR_JSON, OutgoingMessage
from bridge.service.transports.fhir_rest import FhirRestTransport
from tests.conftest import ROOT, SAMPLES


@pytest.fixture
def peer(tmp_path: Path) -> Iterator[FhirPeer]:
    store = ResourceStore(tmp_path / "stand-in" / "resources.sqlite3")
    fhir = FhirPeer(store)
    fhir.start()
    yield fhir
    fhir.stop()
    store.close()


def _load(peer: FhirPeer, out: Path) -> int:
    """POST every Bundle ``convert`` wrote to the stand-in; how many."""
    transport = FhirRestTransport(peer.url)
    bundles = sorted(out.glob("*.bundle.json"))
    for path in bundles:
        transport.deliver(OutgoingMessage("migration", path.stem, path.read_bytes(), FHIR_JSON))
    transport.close()
    return len(bundles)


def _reconcile(tmp_path: Path, *args: str) -> tuple[int, list[dict[str, str]], dict[str, Any]]:
    report = tmp_path / "report"
    shutil.rmtree(report, ignore_errors=True)
    code = cli.main(["reconcile", *args, "--report", str(report)])
    with (report / "reconcile.csv").open(encoding="utf-8") as stream:
        rows = list(csv.DictReader(stream))
    return code, rows, json.loads((report / "summary.json").read_text())


@pytest.fixture
def archive(tmp_path: Path) -> Path:
    """Six good samples and one the gate refuses (07: a probable unit mislabel, an ERROR finding)."""
    folder = tmp_path / "archive"
    folder.mkdir()
    for path in sorted(SAMPLES.glob("0[1-7]-*.json")):
        shutil.copy(path, folder / path.name)
    return folder


def test_an_archive_loaded_with_converts_bytes_is_complete(peer: FhirPeer, archive: Path, tmp_path: Path):
    """Every resource of every Bundle convert wrote is held as sent; the refused session is not expected."""
    assert 2 == cli.main(["convert", str(archive), "--to", "fhir", "--units", "si", "--out", str(tmp_path / "out")])
    loaded = _load(peer, tmp_path / "out")
    held = len(peer.store.all())

    code, rows, summary = _reconcile(tmp_path, str(archive), "--fhir-base", peer.url, "--units", "si")

    assert (6, 0, []) == (loaded, code, rows)
    assert {"present": held} == summary["counts"]
    assert 1 == summary["destinations"][0]["refused_inputs"]


def test_a_lost_and_an_extra_resource_are_reported_exactly(peer: FhirPeer, archive: Path, tmp_path: Path):
    """One Observation lost, one stored under a value the archive never produced: missing and unexpected."""
    cli.main(["convert", str(archive), "--to", "fhir", "--units", "si", "--out", str(tmp_path / "out")])
    _load(peer, tmp_path / "out")
    values = [r.body["identifier"][0]["value"] for r in peer.store.all() if r.type == "Observation"]
    folder = str(tmp_path / "stand-in")
    assert 0 == cli.main(["stand-in", "--folder", folder, "--lose", values[4], "--extra", values[9]])

    code, rows, summary = _reconcile(tmp_path, str(archive), "--fhir-base", peer.url, "--units", "si")

    assert 1 == code
    assert {("missing", values[4]), ("unexpected", values[9] + "-extra")} == {
        (r["class"], r["identifier_value"]) for r in rows
    }
    assert "checked" == summary["destinations"][0]["unexpected"]


def test_values_are_expected_in_the_units_of_the_load(peer: FhirPeer, archive: Path, tmp_path: Path):
    """Loaded in SI, reconciled as traditional: every quantity differs in unit (and value), none is missing."""
    cli.main(["convert", str(archive / "01-healthy-adult.json"), "--to", "fhir", "--units", "si",
              "--out", str(tmp_path / "out")])  # fmt: skip
    _load(peer, tmp_path / "out")

    code, rows, _ = _reconcile(
        tmp_path, str(archive / "01-healthy-adult.json"), "--fhir-base", peer.url, "--units", "traditional"
    )

    # source: UCUM, mmol/min/kPa (SI) and mL/min/mm[Hg] (traditional) are different units of DLCO
    dlco = next(r for r in rows if r["identifier_value"].endswith(".dlco"))
    assert (1, "different") == (code, dlco["class"])
    assert "unit: sent mL/min/mm[Hg], held mmol/min/kPa" in dlco["detail"]
    assert "missing" not in {r["class"] for r in rows}


def test_a_csv_export_read_through_its_field_map(peer: FhirPeer, tmp_path: Path):
    """A lab's CSV (three sessions in one file) through its map: each session's resources found, its own Provenance
    (keyed on the session, FHIR R4 Provenance.target its own resources) among them."""
    csv_export = ROOT / "samples" / "legacy" / "lowmarsh-results.csv"
    field_map = ROOT / "mappings" / "maps" / "lowmarsh-csv.toml"
    cli.main(["convert", str(csv_export), "--map", str(field_map), "--to", "fhir", "--out", str(tmp_path / "out")])
    _load(peer, tmp_path / "out")
    provenances = sum(1 for r in peer.store.all() if r.type == "Provenance")

    code, rows, summary = _reconcile(tmp_path, str(csv_export), "--map", str(field_map), "--fhir-base", peer.url)

    assert (0, [], 3) == (code, rows, provenances)
    assert len(peer.store.all()) == summary["counts"]["present"]


@pytest.mark.parametrize(
    ("args", "said"),
    [
        (["--units", "si"], "--fhir-base"),
        (["--fhir-base", "http://127.0.0.1:9/fhir", "--resend"], "--resend"),
        (["--fhir-base", "ftp://127.0.0.1/fhir"], "an http:// or https:// URL"),
    ],
)
def test_the_migration_form_without_what_it_needs_could_not_run(archive: Path, args: list[str], said: str, capsys):
    """No --fhir-base, a feed-only flag, or a base URL that is no http(s) URL: exit 2, naming the flag."""
    code = cli.main(["reconcile", str(archive), *args])

    assert (2, True) == (code, said in capsys.readouterr().err)


def test_an_empty_folder_could_not_run(tmp_path: Path, capsys):
    """A folder with no input: nothing to expect, exit 2 (as convert and check say of an empty folder)."""
    (tmp_path / "empty").mkdir()

    code = cli.main(["reconcile", str(tmp_path / "empty"), "--fhir-base", "http://127.0.0.1:9/fhir"])

    assert (2, True) == (code, "found none" in capsys.readouterr().err)
