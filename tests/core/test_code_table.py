"""The code table (``mappings/codes.toml``): which systems it names, and what it refuses."""

from __future__ import annotations

import re
from pathlib import Path
from urllib.parse import quote

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.errors import MappingError
from bridge.tables import Code, Tables
from bridge.tables.codes import code_table

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
    table = code_table(WITHOUT_LOCAL)

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
        code_table(text)


def test_a_table_without_loinc_is_refused():
    """LOINC's URI stays required: FHIR codings of LOINC codes need it."""
    text = WITHOUT_LOCAL.replace(f'loinc = "{LOINC_URI}"', "")

    with pytest.raises(MappingError, match=r"^codes\.toml: systems: the key loinc, and of snomed those codes name$"):
        code_table(text)


def test_a_code_of_an_unknown_system_is_refused():
    """Only the systems the table names, and local, are systems a code may name."""
    text = WITHOUT_LOCAL.replace('system = "local"', 'system = "snomed"')

    with pytest.raises(MappingError, match=r"^codes\.toml: codes\.va: system \(loinc or local\), code and display$"):
        code_table(text)


@pytest.mark.parametrize("key", ["DLCO", "dlco-sb", "dlco|x", "dlco x", "2dlco", "dlço"])
def test_a_key_that_would_need_escaping_is_refused(key: str):
    """Keys go into identifiers and FHIR search URLs unencoded, so only a-z, 0-9 and _ are taken."""
    # source: RFC 3986 section 2.3, unreserved characters (letters, digits, - . _ ~): the table
    # keeps to the lower-case letters, digits and underscore among them
    text = WITHOUT_LOCAL.replace("[codes.va]", f'[codes."{key}"]')

    with pytest.raises(MappingError, match=r"a key of lower-case letters, digits and underscores"):
        code_table(text)


@settings(max_examples=200, deadline=None)
@given(key=st.from_regex(r"[a-z][a-z0-9_]{0,30}", fullmatch=True))
def test_every_key_the_table_admits_needs_no_encoding_in_a_fhir_search(key: str):
    """What the FHIR emitter relies on: a key the table loads is unchanged by percent-encoding and
    holds none of the characters FHIR search escapes (backslash, bar, comma, dollar)."""
    table = code_table(WITHOUT_LOCAL.replace("[codes.va]", f'[codes."{key}"]'))

    # source: Python's urllib.parse.quote (RFC 3986 percent-encoding, nothing kept safe) and the FHIR
    # R4 search page, "Escaping Search Parameters" (from memory)
    assert key in table.codes
    assert key == quote(key, safe="")
    assert not set(key) & set("\\|,$")


# ---------- standard codes beside local ones, and methods (issue 28, item 5) ----------

WITH_STANDARD = (
    WITHOUT_LOCAL.replace(f'loinc = "{LOINC_URI}"', f'loinc = "{LOINC_URI}"\nsnomed = "http://snomed.info/sct"')
    + """
method = "single_breath"

[codes.va.standard]
system = "snomed"
code = "251953007"
display = "Alveolar volume"

[methods.single_breath]
system = "snomed"
code = "264284001"
display = "Single-breath technique"
"""
)


def test_a_standard_code_and_a_method_load_with_their_code():
    """[codes.va.standard] and method = "single_breath" ([methods]) travel with the local VA code."""
    # source: PFT IG AlveolarVolume.fsh (SNOMED CT 251953007); MII ValueSet mii-vs-lufu-sct-technique (264284001)
    va = code_table(WITH_STANDARD).codes["va"]

    assert Code("snomed", "251953007", "Alveolar volume") == va.standard
    assert Code("snomed", "264284001", "Single-breath technique") == va.method


def test_an_unknown_method_is_refused_naming_the_methods():
    """A method must be a name in [methods]."""
    text = WITH_STANDARD.replace('method = "single_breath"', 'method = "rebreathing"')

    with pytest.raises(
        MappingError, match=r"^codes\.toml: codes\.va\.method: a name in \[methods\] \(single_breath\)$"
    ):
        code_table(text)


def test_a_standard_code_is_never_local():
    """The code beside a local one is a published one: a local "standard" is refused."""
    text = WITH_STANDARD.replace('[codes.va.standard]\nsystem = "snomed"', '[codes.va.standard]\nsystem = "local"')

    with pytest.raises(MappingError, match=r"^codes\.toml: codes\.va\.standard: system \(loinc or snomed\)"):
        code_table(text)


def test_every_published_code_of_the_bundled_table_names_its_source():
    """Each LOINC or SNOMED CT entry of mappings/codes.toml has a "source:" comment in its table."""
    text = (Path(__file__).resolve().parents[2] / "mappings" / "codes.toml").read_text(encoding="utf-8")
    tables = re.split(r"\n(?=\[)", text)
    published = [t for t in tables if re.search(r'^system = "(loinc|snomed)"', t, re.MULTILINE)]
    unsourced = [t.splitlines()[0] for t in published if "# source:" not in t]

    assert len(published) > 10
    assert [] == unsourced
