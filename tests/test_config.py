"""The one settings object: file, then environment, then flags; every value checked when it is read."""

from __future__ import annotations

from pathlib import Path

import pytest

from bridge.cli import main
from bridge.config import load_settings, parse_settings
from bridge.errors import ConfigError
from bridge.pipeline import PipelineSettings

ROOT = Path(__file__).resolve().parent.parent
SAMPLE_CONFIG = ROOT / "samples" / "service" / "bridge.toml"


def _error(text: str, environ: dict[str, str] | None = None, flags: dict[str, object] | None = None) -> ConfigError:
    with pytest.raises(ConfigError) as caught:
        parse_settings(text, environ or {}, flags, source="site.toml")
    return caught.value


def test_no_file_no_environment_gives_the_documented_defaults():
    """Without a file, variables or flags every default is the one written in the settings classes."""
    settings = load_settings(None, {})

    assert ("traditional", 2.987, ("fhir", "hl7"), None) == (
        settings.units,
        settings.traditional_per_si,
        settings.to,
        settings.service,
    )
    assert PipelineSettings() == settings.pipeline


def test_environment_overrides_the_file_and_flags_override_both():
    """units: file says si, the environment traditional, the flag si again; each layer wins over the one below."""
    text = 'units = "si"\n[emit]\nsending_facility = "FROM-FILE"\n'
    environ = {"DLCO_BRIDGE_UNITS": "traditional", "DLCO_BRIDGE_EMIT_SENDING_FACILITY": "FROM-ENV"}

    from_env = parse_settings(text, environ)
    from_flag = parse_settings(text, environ, {"units": "si", "emit.sending_facility": "FROM-FLAG", "to": None})

    assert ("traditional", "FROM-ENV") == (from_env.units, from_env.pipeline.emit.sending_facility)
    assert ("si", "FROM-FLAG") == (from_flag.units, from_flag.pipeline.emit.sending_facility)


@pytest.mark.parametrize(
    ("text", "key", "expected"),
    [
        # source: HL7 v2.5.1 ch. 2, HD.1 namespace id (IS, at most 20 characters)
        ('[emit]\nsending_facility = "' + "F" * 30 + '"\n', "emit.sending_facility", "1 to 20 characters"),
        ('[emit]\nsending_application = "A|B"\n', "emit.sending_application", "without |"),
        # source: HL7 v2.5.1 table 0103 (processing id P, T, D)
        ('[emit]\nprocessing_id = "X"\n', "emit.processing_id", "one of P, T, D"),
        # source: RFC 3986 section 3 (an absolute URI has a scheme)
        ('[emit]\nidentifier_system = "observation ids"\n', "emit.identifier_system", "an absolute URI"),
        # source: RFC 8141 section 5.1 (URN namespaces are registered with IANA; "dlco-bridge" is not)
        ('[emit]\nlocal_code_system = "urn:dlco-bridge:local-code"\n', "emit.local_code_system", "urn:oid:"),
        ('[emit]\nsystem_base = "urn:oid:1.2.3"\n', "emit.system_base", "an https:// URL"),
        ('[emit]\nsystem_base = "https://site.example/x/"\n', "emit.system_base", "without a trailing /"),
        # source: HL7 v2.5.1 ch. 2, HD.1 namespace id (IS, at most 20 characters); CX.5 (ID)
        ('[emit.lab_facilities]\n"A lab" = "LAB|ONE"\n', "emit.lab_facilities.A lab", "without |"),
        ('[emit]\npatient_identifier_type = ""\n', "emit.patient_identifier_type", "1 to 20 characters"),
        ('units = "imperial"\n', "units", "one of si, traditional"),
        ("traditional_per_si = 3.0\n", "traditional_per_si", "2.987 or 2.986"),
        ('to = "pdf"\n', "to", "fhir, hl7 or fhir,hl7"),
        ("max_input_bytes = 0\n", "max_input_bytes", "a whole number from 1 to 1073741824, got 0"),
        # every input is read whole: a limit beyond 1 GiB, or a fraction of a byte, is a mistake
        ("max_input_bytes = 1e26\n", "max_input_bytes", "a whole number from 1 to 1073741824, got 1e+26"),
        ("max_input_bytes = 1500.5\n", "max_input_bytes", "a whole number from 1 to 1073741824, got 1500.5"),
        ('colour = "blue"\n', "colour", "samples/service/bridge.toml"),
        ("allow = 3\n", "allow", "a list of finding codes"),
        ('[emit]\nhemoglobin_unit = "mmol/L"\n', "emit.hemoglobin_unit", "one of g/L, g/dL"),
        ('allow = ["UNIT_MISLABEL_PROBABLE"]\nblocking = ["UNIT_MISLABEL_PROBABLE"]\n', "allow", "not also blocking"),
        ('map = "no-such-map.toml"\n', "map", "a field map file"),
        ('[maps]\n"*.csv" = "no-such-map.toml"\n', 'maps."*.csv"', "a field map file"),
        ('maps = "x.toml"\n', "maps", "a table of file-name pattern"),
    ],
    ids=lambda v: v if isinstance(v, str) and len(v) < 30 else None,
)
def test_a_bad_value_is_refused_when_read_naming_file_and_key(text, key, expected):
    """Each bad setting is one ConfigError naming the file and the key, before any input is touched."""
    error = _error(text)

    assert ("site.toml", key) == (error.source, error.key)
    assert expected in error.expected


def test_a_bad_value_from_the_environment_is_refused_too():
    """DLCO_BRIDGE_EMIT_SENDING_FACILITY of 30 characters fails at start, not at the first file, naming the variable."""
    error = _error("", {"DLCO_BRIDGE_EMIT_SENDING_FACILITY": "F" * 30})

    assert ("DLCO_BRIDGE_EMIT_SENDING_FACILITY", "") == (error.key, error.source)


def test_a_fhir_url_without_a_host_is_refused():
    """A fhir-rest base_url must be an http(s) URL with a host."""
    text = 'inbox = "i"\narchive = "a"\nquarantine = "q"\nstate = "s"\n'
    text += '[destination.store]\npayload = "fhir"\ntransport = "fhir-rest"\nbase_url = "https:///fhir"\n'

    assert "destination.store.base_url" == _error(text).key


@pytest.mark.parametrize(("value", "expected"), [("0", "from 1 to"), ("2.5", "a whole number"), ("many", "a number")])
def test_reconcile_in_flight_is_a_whole_number_of_at_least_one(value, expected):
    """destination.NAME.reconcile_in_flight (here from the environment): 0, 2.5 or a word is refused, naming the
    variable it came from."""
    text = 'inbox = "i"\narchive = "a"\nquarantine = "q"\nstate = "s"\n'
    text += '[destination.store]\npayload = "fhir"\ntransport = "fhir-rest"\nbase_url = "https://h.example/fhir"\n'
    error = _error(text, {"DLCO_BRIDGE_DESTINATION_STORE_RECONCILE_IN_FLIGHT": value})

    assert ("DLCO_BRIDGE_DESTINATION_STORE_RECONCILE_IN_FLIGHT", True) == (error.key, expected in error.expected)


def test_service_settings_are_required_only_by_the_service():
    """A configuration without an inbox serves check and convert; the service refuses it with a clear error."""
    settings = parse_settings('[emit]\nsending_facility = "SITE"\n', {}, source="site.toml")

    with pytest.raises(ConfigError) as caught:
        settings.require_service()

    assert ("inbox", "site.toml") == (caught.value.key, caught.value.source)


def test_the_sample_configuration_is_valid_and_complete():
    """samples/service/bridge.toml, the documented example, reads without error and names three destinations."""
    settings = load_settings(SAMPLE_CONFIG, {"FHIR_STORE_TOKEN": "x"})

    assert ["records", "fhir-store", "drop"] == [d.name for d in settings.require_service().destinations]


def test_watch_without_a_configuration_file_refuses_to_start(capsys, monkeypatch):
    """`watch` with neither --config nor DLCO_BRIDGE_CONFIG is an error, never a start on ./bridge.toml."""
    monkeypatch.delenv("DLCO_BRIDGE_CONFIG", raising=False)

    code = main(["watch"])

    assert 1 == code
    assert "--config" in capsys.readouterr().err


def test_a_missing_configuration_file_is_one_line(tmp_path, capsys):
    """--config naming a file that does not exist is one line naming it; exit 1."""
    code = main(["check", "--config", str(tmp_path / "absent.toml"), str(ROOT / "samples" / "01-healthy-adult.json")])

    assert 1 == code
    assert f"{tmp_path / 'absent.toml'}: (file): a readable configuration file" in capsys.readouterr().err


def test_lab_facilities_come_from_a_table_or_the_environment():
    """[emit.lab_facilities] maps lab names to HL7 facility ids; DLCO_BRIDGE_EMIT_LAB_FACILITIES uses name=ID;..."""
    text = '[emit.lab_facilities]\n"Lowmarsh Lab" = "LOWMARSH-PFT"\n'
    environ = {"DLCO_BRIDGE_EMIT_LAB_FACILITIES": "Highcairn Unit=HIGHCAIRN-PFT; Lowmarsh Lab=LOW-2"}

    from_file = parse_settings(text, {}).pipeline.emit.lab_facilities
    from_env = parse_settings(text, environ).pipeline.emit.lab_facilities

    assert ((("Lowmarsh Lab", "LOWMARSH-PFT"),), (("Highcairn Unit", "HIGHCAIRN-PFT"), ("Lowmarsh Lab", "LOW-2"))) == (
        from_file,
        from_env,
    )


def test_allow_comes_from_file_environment_and_repeated_flags():
    """allow is a set of codes: a TOML list, a comma-separated variable, or --allow given twice."""
    from_file = parse_settings('allow = ["UNIT_MISLABEL_PROBABLE"]\n', {})
    from_env = parse_settings("", {"DLCO_BRIDGE_ALLOW": "UNIT_MISLABEL_PROBABLE,NO_ACCEPTABLE_MANOEUVRE"})
    from_flags = parse_settings("", {}, {"allow": ["UNIT_MISLABEL_PROBABLE", "NO_ACCEPTABLE_MANOEUVRE"]})

    assert frozenset({"UNIT_MISLABEL_PROBABLE"}) == from_file.pipeline.allow
    both = frozenset({"UNIT_MISLABEL_PROBABLE", "NO_ACCEPTABLE_MANOEUVRE"})
    assert both == from_env.pipeline.allow == from_flags.pipeline.allow
    assert frozenset() == PipelineSettings().allow  # the default: every ERROR finding refuses a record


def test_maps_per_file_pattern_keep_their_order_and_resolve_beside_the_file():
    """[maps] is read in the file's order (first match wins), paths relative to the configuration's folder."""
    root = Path(__file__).resolve().parent.parent
    text = '[maps]\n"*.hl7" = "mappings/maps/highcairn-hl7v23.toml"\n"*" = "mappings/maps/lowmarsh-csv.toml"\n'
    settings = parse_settings(text, {}, base=root)
    maps = root / "mappings" / "maps"
    expected = (("*.hl7", maps / "highcairn-hl7v23.toml"), ("*", maps / "lowmarsh-csv.toml"))
    assert expected == settings.maps


def test_the_sample_configuration_reads_where_the_service_guide_copies_it(tmp_path):
    """docs/service.md copies samples/service/bridge.toml into another folder, where it still reads."""
    copy = tmp_path / "trial" / "bridge.toml"
    copy.parent.mkdir()
    copy.write_bytes(SAMPLE_CONFIG.read_bytes())

    settings = load_settings(copy, {"FHIR_STORE_TOKEN": "x"})

    assert tmp_path / "trial" / "run" / "inbox" == settings.require_service().inbox


def test_repeatability_and_reference_basis_from_file_environment_and_flags():
    """The two ways of judging a result: the file's choice, the environment's over it, the flag's over both."""
    text = 'repeatability = "2005"\nreference_basis = "measured"\n'
    environ = {"DLCO_BRIDGE_REPEATABILITY": "2017", "DLCO_BRIDGE_REFERENCE_BASIS": "hb_adjusted"}

    from_file = parse_settings(text, {}).pipeline
    from_env = parse_settings(text, environ).pipeline
    from_flag = parse_settings(text, environ, {"repeatability": "2005", "reference_basis": "pressure_adjusted"})

    assert ("2005", "measured") == (from_file.repeatability, from_file.reference_basis)
    assert ("2017", "hb_adjusted") == (from_env.repeatability, from_env.reference_basis)
    assert ("2005", "pressure_adjusted") == (from_flag.pipeline.repeatability, from_flag.pipeline.reference_basis)
    # the defaults: the current standard, and the value adjusted to sea level
    assert ("2017", "pressure_adjusted") == (PipelineSettings().repeatability, PipelineSettings().reference_basis)
    assert "2005" == parse_settings("repeatability = 2005\n", {}).pipeline.repeatability  # a number is the name


@pytest.mark.parametrize(
    ("text", "environ", "message"),
    [
        ('repeatability = "2010"\n', {}, "site.toml: repeatability: one of 2017, 2005, got '2010'"),
        ("repeatability = 2010\n", {}, "site.toml: repeatability: one of 2017, 2005, got '2010'"),  # a number
        (
            "",
            {"DLCO_BRIDGE_REFERENCE_BASIS": "hb"},
            "DLCO_BRIDGE_REFERENCE_BASIS: one of pressure_adjusted, measured, hb_adjusted, got 'hb'",
        ),
    ],
    ids=["unknown criterion", "unknown criterion as a number", "unknown basis"],
)
def test_a_bad_repeatability_or_reference_basis_names_key_and_expected_values(text, environ, message):
    """One line: the file, the key, the values it may take and the value given."""
    assert message == str(_error(text, environ))


def test_spirometry_reference_from_file_environment_and_flags():
    """The spirometry equations: the file's, the environment's over it, the flag's over both; GLI Global by default."""
    text = 'spirometry_reference = "gli-2012"\n'
    environ = {"DLCO_BRIDGE_SPIROMETRY_REFERENCE": "gli-global"}

    assert "gli-2012" == parse_settings(text, {}).pipeline.spirometry_reference
    assert "gli-global" == parse_settings(text, environ).pipeline.spirometry_reference
    assert "gli-2012" == parse_settings("", environ, {"spirometry_reference": "gli-2012"}).pipeline.spirometry_reference
    # source: ATS statement on race and ethnicity in PFT interpretation (Bhakta et al., AJRCCM 2023):
    # race-neutral average equations such as GLI Global
    assert "gli-global" == PipelineSettings().spirometry_reference


def test_a_bad_spirometry_reference_names_key_and_expected_values():
    """One line: the key, the values it may take and the value given."""
    expected = "site.toml: spirometry_reference: one of gli-global, gli-2012, got 'gli-2017'"
    assert expected == str(_error('spirometry_reference = "gli-2017"\n', {}))


def test_charted_predicted_from_file_environment_and_flags():
    """Whose predicted values are charted: the file's choice, the environment's over it, the flag's over both."""
    text = '[emit]\ncharted_predicted = "lab"\n'
    environ = {"DLCO_BRIDGE_EMIT_CHARTED_PREDICTED": "gli-2017"}

    assert "lab" == parse_settings(text, {}).pipeline.emit.charted_predicted
    assert "gli-2017" == parse_settings(text, environ).pipeline.emit.charted_predicted
    assert "lab" == parse_settings(text, environ, {"emit.charted_predicted": "lab"}).pipeline.emit.charted_predicted
    assert "gli-2017" == PipelineSettings().emit.charted_predicted  # the default: the bridge's GLI-2017 values


def test_a_bad_charted_predicted_names_key_and_expected_values():
    """One line: the variable it came from, the values it may take and the value given."""
    message = "DLCO_BRIDGE_EMIT_CHARTED_PREDICTED: one of gli-2017, lab, got 'both'"

    assert message == str(_error("", {"DLCO_BRIDGE_EMIT_CHARTED_PREDICTED": "both"}))


def test_check_takes_the_repeatability_flag(capsys):
    """check --repeatability 2005 says the criterion beside the verdict (sample 06: trials 28.49 and 29.89)."""
    code = main(["check", str(ROOT / "samples" / "06-three-manoeuvres.json"), "--repeatability", "2005"])

    assert 0 == code
    out = capsys.readouterr().out
    assert "repeatable (ATS/ERS 2005: within 3 mL/min/mmHg or 10 % of the highest)" in out


def test_a_variable_for_a_destination_the_file_lacks_names_the_variable():
    """DLCO_BRIDGE_DESTINATION_RECORD_PORT (RECORDS misspelt) makes a destination without a transport: named."""
    text = 'inbox = "i"\narchive = "a"\nquarantine = "q"\nstate = "s"\n'
    text += '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nport = 2575\n'

    error = _error(text, {"DLCO_BRIDGE_DESTINATION_RECORD_PORT": "2576"})

    assert ("DLCO_BRIDGE_DESTINATION_RECORD_PORT", "") == (error.key, error.source)


def test_an_unknown_output_kind_is_named_as_typed():
    """--to given twice, one of them mistyped: the error names the mistyped word, not the list the flags became."""
    with pytest.raises(ConfigError) as caught:
        parse_settings("", {}, flags={"to": ["fhir", "hl8"]})

    assert ("--to", "fhir, hl7 or fhir,hl7, got 'hl8'") == (caught.value.key, caught.value.expected)
