"""The settings are pydantic models: each field's check runs in pydantic, and its refusal is our one-line error
naming the file and key, the variable or the flag the value came from."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from pydantic import ValidationError

from bridge.config import parse_settings
from bridge.emit.settings import EmitSettings
from bridge.errors import ConfigError
from bridge.pipeline import PipelineSettings
from bridge.service.settings import Destination, ServiceSettings

SERVICE = 'inbox = "in"\narchive = "done"\nquarantine = "bad"\nstate = "state"\n'
MLLP = '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nport = 2575\n'


def _message(text: str, environ: dict[str, str] | None = None, flags: dict[str, object] | None = None) -> str:
    with pytest.raises(ConfigError) as caught:
        parse_settings(text, environ or {}, flags, source="site.toml")
    return str(caught.value)


def test_a_field_bound_checked_by_pydantic_names_the_file_and_key():
    """rescan_seconds has a floor of 0.05 s on the model's field; 0.01 in the file is one line naming file and key."""
    message = _message(SERVICE + "rescan_seconds = 0.01\n" + MLLP)
    assert "site.toml: rescan_seconds: a number >= 0.05, got 0.01" == message


def test_a_destination_field_refused_from_the_environment_names_the_variable():
    """A destination's connect_timeout (floor 0.01 s) set to 0 by its documented variable: the variable is named."""
    environ = {"DLCO_BRIDGE_DESTINATION_RECORDS_CONNECT_TIMEOUT": "0"}
    expected = "DLCO_BRIDGE_DESTINATION_RECORDS_CONNECT_TIMEOUT: a number >= 0.01, got '0'"
    assert expected == _message(SERVICE + MLLP, environ)


def test_a_field_refused_from_a_flag_names_the_flag():
    """--sending-facility with an HL7 field separator in it: the flag is named, not the file."""
    # source: HL7 v2.5.1 ch. 2, HD.1 namespace id (IS, at most 20 characters); | is the field separator
    message = _message('[emit]\nsending_facility = "SITE"\n', flags={"emit.sending_facility": "A|B"})
    assert "--sending-facility: 1 to 20 characters without | ^ ~ \\ & or control characters, got 'A|B'" == message


def test_an_mllp_destination_without_a_port_is_refused_by_its_model():
    """The port's check sees the transport: an MLLP receiver needs one of 1-65535; fhir-rest and file need none."""
    assert "site.toml: destination.records.port: a port number 1-65535, got 0" == _message(
        SERVICE + '[destination.records]\npayload = "hl7"\ntransport = "mllp"\n'
    )
    with pytest.raises(ValidationError):
        Destination(name="records", payload="hl7", transport="mllp")
    assert 0 == Destination(name="drop", payload="fhir", transport="file", folder=Path("out")).port


def test_the_models_check_their_fields_without_the_configuration():
    """Built in code, the models refuse the same values the configuration does (the check is on the field)."""
    with pytest.raises(ValidationError) as caught:
        EmitSettings(patient_reference="by-name")  # one of identifier, conditional-create
    assert "one of identifier, conditional-create, got 'by-name'" in str(caught.value)
    with pytest.raises(ValidationError):
        PipelineSettings(max_input_bytes=1024**3 + 1)  # every input is read whole: at most 1 GiB
    with pytest.raises(ValidationError):
        ServiceSettings(Path(), Path(), Path(), Path(), (), metrics_host="0.0.0.0")  # health stays on loopback


def test_the_models_are_frozen_and_read_text_as_the_environment_gives_it():
    """A setting cannot be changed after reading; text from a variable is typed by the field ("2.5" is 2.5 s)."""
    service = parse_settings(SERVICE + MLLP, {"DLCO_BRIDGE_STABLE_SECONDS": "2.5"}).require_service()
    assert 2.5 == service.stable_seconds
    with pytest.raises(dataclasses.FrozenInstanceError):
        service.stable_seconds = 1.0  # type: ignore[misc]


def test_settings_reading_through_a_map_keep_every_other_setting():
    """The same map gives the same settings object; another map, the same settings but the map."""
    # common practice: a validated immutable value is reused, never rebuilt for each use
    from bridge.tables.files import load_field_map, load_tables

    fmap = load_field_map(Path(__file__).parents[1] / "mappings" / "maps" / "lowmarsh-csv.toml", load_tables())
    site = PipelineSettings(allow=frozenset({"COHB_RAISED"}), repeatability="2005")
    mapped = site.reading_with(fmap)

    assert site.reading_with(None) is site
    assert mapped.reading_with(fmap) is mapped
    assert (mapped.field_map, dataclasses.replace(mapped, field_map=None)) == (fmap, site)
