"""Every default written once: a value read from the configuration reaches where it is used, and no two
places say different things (one test per disagreement found before)."""

from __future__ import annotations

import argparse
import csv
import json
import re
from dataclasses import fields, replace
from pathlib import Path

import pytest

from bridge.audit.run import AuditSettings, run_audit
from bridge.cli.parser import build_parser
from bridge.cli.service import build_transport
from bridge.config import parse_settings
from bridge.config.reader import SETTING_KEYS, Settings
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.service.backoff import next_delay
from bridge.service.delivery import Backoff
from bridge.service.settings import Destination, ServiceSettings
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.mllp import MllpTransport
from bridge.tables.files import samples_dir
from tests.audit.conftest import JOB

SERVICE = 'inbox = "in"\narchive = "done"\nquarantine = "bad"\nstate = "state"\n'
MLLP = '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nport = 2575\n'
FHIR = '[destination.store]\npayload = "fhir"\ntransport = "fhir-rest"\nbase_url = "http://127.0.0.1:9/fhir"\n'


def _destinations(text: str, environ: dict[str, str] | None = None) -> dict[str, Destination]:
    service = parse_settings(SERVICE + text, environ or {}, source="site.toml").require_service()
    return {d.name: d for d in service.destinations}


def _fhir_timeouts(transport: FhirRestTransport) -> tuple[float | None, float | None]:
    timeout = transport._client.timeout  # httpx's own Timeout of the client the transport sends with
    return timeout.connect, timeout.read


def test_configured_timeouts_reach_the_mllp_and_fhir_transports():
    """connect_timeout and read_timeout set in the file (or a variable) are the ones the built transports use."""
    text = (MLLP + "connect_timeout = 2.5\nread_timeout = 7.5\n") + (FHIR + "connect_timeout = 3.5\n")
    destinations = _destinations(text, {"DLCO_BRIDGE_DESTINATION_STORE_READ_TIMEOUT": "42"})
    mllp = build_transport(destinations["records"])
    fhir = build_transport(destinations["store"])
    try:
        assert isinstance(mllp, MllpTransport) and isinstance(fhir, FhirRestTransport)
        assert (2.5, 7.5) == (mllp.connect_timeout, mllp.read_timeout)
        assert (3.5, 42.0) == _fhir_timeouts(fhir)
    finally:
        fhir.close()


def test_unset_timeouts_are_the_transports_own_defaults_when_built_from_the_configuration():
    """Without timeouts in the configuration, a transport built from it waits as one built with no settings does
    (before, the FHIR transport's 60 s read timeout became 30 s when built from the configuration)."""
    destinations = _destinations(MLLP + FHIR)
    fhir, mllp = build_transport(destinations["store"]), build_transport(destinations["records"])
    plain_fhir, plain_mllp = FhirRestTransport("http://127.0.0.1:9/fhir"), MllpTransport("127.0.0.1", 2575)
    try:
        assert isinstance(fhir, FhirRestTransport) and isinstance(mllp, MllpTransport)
        assert _fhir_timeouts(plain_fhir) == _fhir_timeouts(fhir)
        assert (plain_mllp.connect_timeout, plain_mllp.read_timeout) == (mllp.connect_timeout, mllp.read_timeout)
        assert _fhir_timeouts(fhir)[1] != mllp.read_timeout  # a server answers a transaction only once processed
    finally:
        for transport in (fhir, mllp, plain_fhir, plain_mllp):
            transport.close()


def test_a_destination_without_units_gets_the_same_default_as_check_and_convert():
    """The destination's units default is the settings' own (one default, not three)."""
    destination = _destinations(MLLP)["records"]
    assert Settings().units == destination.units
    assert EmitContext(now=JOB.now).units == destination.units


def test_the_retry_defaults_of_the_service_and_the_back_off_agree():
    """The back-off used without settings caps and starts where the service's settings do."""
    service = ServiceSettings(Path(), Path(), Path(), Path(), ())
    plain = Backoff()
    assert (service.retry_base_seconds, service.retry_cap_seconds) == (plain.base, plain.cap)
    # a delay drawn at the top of the jitter range (rand = 1) of a late attempt is the cap itself
    assert service.retry_cap_seconds == next_delay(40, rand=lambda: 1.0)


def _convert_parser() -> argparse.ArgumentParser:
    commands = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    return commands.choices["convert"]


def test_the_help_shows_the_defaults_the_settings_hold():
    """Each default --help prints is the settings object's own default."""
    convert = _convert_parser()
    text = " ".join(convert.format_help().split())
    site, defaults = EmitSettings(), Settings()
    for key, value in (
        ("units", defaults.units),
        ("traditional_per_si", defaults.traditional_per_si),
        ("max_input_bytes", defaults.pipeline.max_input_bytes),
        ("repeatability", defaults.pipeline.repeatability),
        ("emit.sending_facility", site.sending_facility),
        ("emit.patient_reference", site.patient_reference),
        ("emit.charted_predicted", site.charted_predicted),
    ):
        assert f"(key {key}; default {value})" in text, key


def test_every_setting_a_flag_sets_is_a_key_of_the_configuration():
    """A flag that sets a setting uses a key the configuration reads (its dest is the key), so none is ignored."""
    convert = _convert_parser()
    keyed = {re.sub(r"^emit\.", "", a.dest) for a in convert._actions if "(key " in (a.help or "")}
    known = {re.sub(r"^emit\.", "", key) for key in SETTING_KEYS}
    assert set() == keyed - known


def test_the_emitters_context_does_not_repeat_the_site_settings():
    """EmitContext carries the site's settings as one value, not a copy of each field."""
    assert set() == {f.name for f in fields(EmitContext)} & {f.name for f in fields(EmitSettings)}
    site = EmitSettings(sending_facility="FENWICK-PFT")
    assert site is site.context(JOB.now, "si").site


def _two_visits(archive: Path, second_dlco: float) -> None:
    """Two sessions of one patient, DLCO 10 then ``second_dlco`` mmol/min/kPa (KCO and predicted left out)."""
    archive.mkdir()
    for visit, (dlco, day) in enumerate(((10.0, "2024-03-02"), (second_dlco, "2025-03-04"))):
        doc = json.loads((samples_dir() / "01-healthy-adult.json").read_text())
        doc["test_id"] = f"FICT-JUMP-{visit}"
        doc["performed_at"] = f"{day}T09:15:00+00:00"
        doc["results"]["dlco"]["value"] = dlco
        del doc["results"]["kco"], doc["results"]["predicted"]
        (archive / f"visit-{visit}.json").write_text(json.dumps(doc))


def _checks(report: Path) -> set[str]:
    with open(report / "findings.csv", newline="", encoding="utf-8") as handle:
        return {row["check"] for row in csv.DictReader(handle)}


@pytest.mark.parametrize(("factor", "jumped"), [(2.987, True), (2.986, False)])
def test_a_sites_factor_reaches_the_audits_unit_jump_check(tmp_path: Path, factor: float, jumped: bool):
    """The audit's series check uses the site's traditional_per_si (2.986 where chosen), not a 2.987 of its own."""
    # DLCO 10 then 34.345: ratio 3.4345. The check's tolerance is 15 % (SERIES_JUMP_TOLERANCE):
    # 3.4345 / 2.987 = 1.14982 (within 15 %: a jump); 3.4345 / 2.986 = 1.15020 (not within: no jump).
    _two_visits(tmp_path / "archive", 34.345)
    job = replace(JOB, traditional_per_si=factor, map_patterns=())
    run_audit([tmp_path / "archive"], tmp_path / "report", job, AuditSettings(workers=1))
    assert jumped == ("SERIES_UNIT_JUMP" in _checks(tmp_path / "report"))


def test_only_the_configuration_package_reads_settings_from_the_environment():
    """pydantic-settings (BaseSettings, its sources) is imported under bridge/config/ alone; the core's settings
    stay plain values."""
    bridge = Path(__file__).resolve().parents[1] / "bridge"
    importing = sorted(
        str(module.relative_to(bridge))
        for module in bridge.rglob("*.py")
        if "pydantic_settings" in module.read_text("utf-8")
    )
    assert ["config/sources.py"] == importing
