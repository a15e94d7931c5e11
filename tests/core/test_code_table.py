"""The code table (``mappings/codes.toml``): which systems it names, and what it refuses."""

from __future__ import annotations

from urllib.parse import quote

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.errors import MappingError
from bridge.tables import Code, CodeTable, Tables

# source: HL7 FHIR R4 terminology, "Using LOINC with HL7 Standards": the LOINC system URI
LOINC_URI = "http://loinc.org"

# A table written out by hand: no [systems].local, one LOINC and one local code.
WITHOUT_LOCAL = f"""
[systems]
loinc = "{LOINC_URI}"

[panel]
system = "loinc"
code = "81458-2"
display = "Pulmonary function test panel"

[codes.dlco]
system = "loinc"
code = "19911-7"
display = "Diffusion capacity.carbon monoxide"

[codes.va]
system = "local"
code = "VA"
display = "Alveolar volume (BTPS)"
"""


def test_a_table_without_a_local_system_loads():
    """[systems] names LOINC only; codes of system "local" still load (the site names their system)."""
    table = CodeTable.from_toml(WITHOUT_LOCAL)

    assert {"loinc": LOINC_URI} == dict(table.systems)
    assert Code("loinc", "81458-2", "Pulmonary function test panel") == table.panel
    assert Code("local", "VA", "Alveolar volume (BTPS)") == table.codes["va"]
    assert Code("loinc", "19911-7", "Diffusion capacity.carbon monoxide") == table.codes["dlco"]


# source: HL7 FHIR R4 terminology, "Using SNOMED CT with HL7 Standards": the SNOMED CT system URI
SNOMED_URI = "http://snomed.info/sct"


def test_the_bundled_table_names_no_local_system(tables: Tables):
    """The bundled codes.toml carries no local-system URI that nothing would read."""
    assert {"loinc": LOINC_URI, "snomed": SNOMED_URI} == dict(tables.codes.systems)
    assert "local" in {code.system for code in tables.codes.codes.values()}


def test_a_left_over_local_system_is_refused_with_where_it_is_set():
    """A [systems].local would look like the local codes' system but is not: refused, naming the setting."""
    text = WITHOUT_LOCAL.replace("[panel]", 'local = "https://site.example/local"\n\n[panel]')

    with pytest.raises(MappingError, match=r"^codes\.toml: systems\.local: no entry \(emit\.local_code_system"):
        CodeTable.from_toml(text)


def test_a_table_without_loinc_is_refused():
    """LOINC's URI stays required: FHIR codings of LOINC codes need it."""
    text = WITHOUT_LOCAL.replace(f'loinc = "{LOINC_URI}"', "")

    with pytest.raises(MappingError, match=r"^codes\.toml: systems: the key loinc, and of snomed those codes name$"):
        CodeTable.from_toml(text)


def test_a_code_of_an_unknown_system_is_refused():
    """Only the systems the table names, and local, are systems a code may name."""
    text = WITHOUT_LOCAL.replace('system = "local"', 'system = "snomed"')

    with pytest.raises(MappingError, match=r"^codes\.toml: codes\.va: system \(loinc or local\), code and display$"):
        CodeTable.from_toml(text)


@pytest.mark.parametrize("key", ["DLCO", "dlco-sb", "dlco|x", "dlco x", "2dlco", "dlço"])
def test_a_key_that_would_need_escaping_is_refused(key: str):
    """Keys go into identifiers and FHIR search URLs unencoded, so only a-z, 0-9 and _ are taken."""
    # source: RFC 3986 section 2.3, unreserved characters (letters, digits, - . _ ~): the table
    # keeps to the lower-case letters, digits and underscore among them
    text = WITHOUT_LOCAL.replace("[codes.va]", f'[codes."{key}"]')

    with pytest.raises(MappingError, match=r"a key of lower-case letters, digits and underscores"):
        CodeTable.from_toml(text)


@settings(max_examples=200, deadline=None)
@given(key=st.from_regex(r"[a-z][a-z0-9_]{0,30}", fullmatch=True))
def test_every_key_the_table_admits_needs_no_encoding_in_a_fhir_search(key: str):
    """What the FHIR emitter relies on: a key the table loads is unchanged by percent-encoding and
    holds none of the characters FHIR search escapes (backslash, bar, comma, dollar)."""
    table = CodeTable.from_toml(WITHOUT_LOCAL.replace("[codes.va]", f'[codes."{key}"]'))

    # source: Python's urllib.parse.quote (RFC 3986 percent-encoding, nothing kept safe) and the FHIR
    # R4 search page, "Escaping Search Parameters" (from memory)
    assert key in table.codes
    assert key == quote(key, safe="")
    assert not set(key) & set("\\|,$")
