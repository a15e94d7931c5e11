"""mappings/codes_whole_report.toml: every LOINC code of spirometry and lung volumes, with its source."""

from __future__ import annotations

import re
import tomllib

import pytest

from bridge.tables.files import mappings_dir

TABLE = tomllib.loads((mappings_dir() / "codes_whole_report.toml").read_text(encoding="utf-8"))["loinc"]
STATUSES = {"verified", "candidate", "not_found"}
QUANTITIES = ("fev1", "fvc", "fev1_fvc", "fef25_75", "pef", "tlc", "frc", "rv", "vc", "rv_tlc", "ic", "erv")


def loinc_check_digit(number: str) -> int:
    """The LOINC Mod 10 check digit of the digits before the hyphen.

    # source: LOINC Users' Guide, "Calculating Mod 10 check digits": from the right, the digits in
    # odd positions form a number that is doubled; the digits in even positions are written in front
    # of it; the check digit takes the sum of all those digits up to the next multiple of ten.
    """
    from_right = number[::-1]
    odd = "".join(from_right[0::2])[::-1]
    even = "".join(from_right[1::2])[::-1]
    total = sum(int(d) for d in even + str(int(odd) * 2))
    return (10 - total % 10) % 10


def test_check_digit_on_known_codes():
    """Worked by hand: 20150 -> odd 2,1,0 = 210 x 2 = 420, even 0,5; 0+5+4+2+0 = 11 -> 9."""
    # source: LOINC 20150-9 (FEV1) and 19868-9 (FVC), whose check digits are 9
    assert (9, 9, 5) == (loinc_check_digit("20150"), loinc_check_digit("19868"), loinc_check_digit("19926"))


@pytest.mark.parametrize("key", list(TABLE))
def test_every_entry_names_code_source_and_status(key):
    """Each entry has a display name, a UCUM unit, a status and a source; codes are LOINC-shaped."""
    entry = TABLE[key]

    assert {"code", "display", "unit", "status", "source"} <= set(entry)
    assert entry["status"] in STATUSES and entry["source"].strip() and entry["display"].strip()
    if entry["status"] == "not_found":
        assert "" == entry["code"]
        assert entry["source"].startswith("searched:")
    else:
        match = re.fullmatch(r"(\d{1,7})-(\d)", entry["code"])
        assert match, entry["code"]
        # a code whose check digit is wrong was mistyped
        assert int(match.group(2)) == loinc_check_digit(match.group(1))


def test_every_quantity_is_listed_and_codes_are_unique():
    """Each quantity of the whole report has an entry; no two entries share a code."""
    codes = [e["code"] for e in TABLE.values() if e["code"]]

    assert [] == [q for q in QUANTITIES if q not in TABLE]
    assert len(codes) == len(set(codes))
    # source: PFT IG (pulmonary function FHIR implementation guide 0.1.0), spirometry profiles
    assert ("20150-9", "19876-2", "19874-7", "20157-4", "20155-8", "19926-5") == tuple(
        TABLE[k]["code"] for k in ("fev1", "fvc_pre", "fvc_post", "fev1_pre", "fev1_post", "fev1_fvc")
    )


def test_flows_by_phase_are_the_published_codes():
    """FEF25-75 and PEF before and after the bronchodilator carry the LOINC codes the MII IG lists."""
    # source: Medizininformatik-Initiative, Kerndatensatz-Modul Lungenfunktion IG 2027.0.0-ballot,
    # ValueSets mii-vs-lufu-lnc-mef (69972-8 "FEF 25-75% --pre bronchodilation", 69973-6 "--post")
    # and mii-vs-lufu-lnc-pef (69975-1 / 69976-9 "Maximum expiratory gas flow Respiratory system
    # airway --pre / --post bronchodilation")
    keys = ("fef25_75_pre", "fef25_75_post", "pef_pre", "pef_post")

    assert ("69972-8", "69973-6", "69975-1", "69976-9") == tuple(TABLE[k]["code"] for k in keys)
    assert {"verified"} == {TABLE[k]["status"] for k in keys}
    assert TABLE["pef_pre"]["display"].endswith("--pre bronchodilation")
