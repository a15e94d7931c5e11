"""Finding codes are checked like every other setting (issue 19.1): the known codes, and codes in settings."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

from bridge.cli import main
from bridge.config import parse_settings
from bridge.errors import ConfigError
from bridge.tables.files import finding_codes

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"
FINDINGS_DOC = (ROOT / "docs" / "findings.md").read_text(encoding="utf-8")
# Where findings are made: the rules, the field-map step of the pipeline, the audit's checks.
EMITTERS = (*sorted((ROOT / "bridge" / "science").glob("*.py")), ROOT / "bridge" / "pipeline.py",
            ROOT / "bridge" / "audit" / "rows.py", ROOT / "bridge" / "audit" / "reduce.py")  # fmt: skip
CODE = re.compile(r"[A-Z][A-Z0-9]*(?:_[A-Z0-9]+)+")


def _documented() -> dict[str, str]:
    """docs/findings.md: every code of its tables with the severity beside it."""
    found = {}
    for codes, severity in re.findall(r"^\| ((?:`[A-Z_]+`(?:, )?)+) \| (\w+) \|", FINDINGS_DOC, re.M):
        for code in re.findall(r"`([A-Z_]+)`", codes):
            found[code] = severity
    return found


def test_every_code_written_in_the_rules_and_the_audit_is_known():
    """Each code literal where findings are made is in mappings/finding_codes.toml."""
    trees = [ast.parse(path.read_text(encoding="utf-8")) for path in EMITTERS]
    exported = {  # names in __all__ are Python names, not finding codes
        element.value
        for tree in trees
        for node in ast.walk(tree)
        if isinstance(node, ast.Assign) and any(isinstance(t, ast.Name) and t.id == "__all__" for t in node.targets)
        for element in ast.walk(node.value)
        if isinstance(element, ast.Constant)
    }
    written = {
        node.value
        for tree in trees
        for node in ast.walk(tree)
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and CODE.fullmatch(node.value)
    } - exported

    assert set() == written - set(finding_codes().severities)
    assert len(written) > 25  # the scan reads the modules (30 literal codes when this was written)


def test_the_documented_codes_are_the_known_codes_with_the_same_severity():
    """docs/findings.md lists exactly the codes of mappings/finding_codes.toml, each with its severity."""
    known = {code: severity.value for code, severity in finding_codes().severities.items()}

    assert known == _documented()


@pytest.mark.parametrize(
    ("flags", "environ", "text", "where", "expected"),
    [
        ({"blocking": ["COHB_RAISE"]}, {}, "", "--blocking", "got 'COHB_RAISE' (closest known: COHB_RAISED)"),
        ({"blocking": ["cohb_raised"]}, {}, "", "--blocking", "got 'cohb_raised' (closest known: COHB_RAISED)"),
        ({}, {}, 'blocking = ["COHB_RAISE"]\n', "site.toml: blocking", "(closest known: COHB_RAISED)"),
        ({}, {"DLCO_BRIDGE_BLOCKING": "COHB_RAISE"}, "", "DLCO_BRIDGE_BLOCKING", "(closest known: COHB_RAISED)"),
        ({"allow": ["UNIT_MISLABELED"]}, {}, "", "--allow", "(closest known: UNIT_MISLABEL_PROBABLE)"),
        ({}, {"DLCO_BRIDGE_ALLOW": "HB_WRONG_DIRECTION"}, "", "DLCO_BRIDGE_ALLOW", "closest known: HB_ADJUSTMENT"),
        ({}, {}, 'allow = ["NO_SUCH_THING_AT_ALL"]\n', "site.toml: allow", "got 'NO_SUCH_THING_AT_ALL'"),
        # a warning never stops a record: allowing it would do nothing
        ({"allow": ["COHB_RAISED"]}, {}, "", "--allow", "got COHB_RAISED, a warning (it never stops a record)"),
    ],
    ids=lambda v: v if isinstance(v, str) and v.startswith(("--", "DLCO", "site")) else None,
)
def test_an_unknown_code_is_refused_naming_where_it_came_from_and_the_closest(flags, environ, text, where, expected):
    """A code the bridge cannot report stops the command at start: the flag, variable or file key, the closest code."""
    with pytest.raises(ConfigError) as caught:
        parse_settings(text, environ, flags, source="site.toml")

    assert str(caught.value).startswith(f"{where}: ")
    assert expected in str(caught.value)


def test_a_misspelt_blocking_code_stops_convert_before_anything_is_written(tmp_path, capsys):
    """convert --blocking COHB_RAISE (a typo): exit 1, one line, nothing written (it used to write, exit 0)."""
    out = tmp_path / "out"

    code = main(["convert", str(SAMPLES / "04-raised-cohb.json"), "--blocking", "COHB_RAISE", "--out", str(out)])
    err = capsys.readouterr().err

    assert (1, False) == (code, out.exists())
    assert err.startswith("dlco-bridge: --blocking: ") and err.count("\n") == 1


@pytest.mark.parametrize("option", ["--blocking", "--allow", "--to"])
def test_a_repeated_list_flag_keeps_every_value(option, tmp_path):
    """--blocking A --blocking B blocks both (it kept only the last); --allow and --to accumulate alike."""
    values = {
        "--blocking": (["KCO_INCONSISTENT", "COHB_RAISED"], "blocking"),
        "--allow": (["UNIT_MISLABEL_PROBABLE", "NO_ACCEPTABLE_MANOEUVRE"], "allow"),
        "--to": (["hl7", "fhir"], "to"),
    }[option]
    from bridge.cli import build_parser
    from bridge.cli.parser import settings_of

    args = build_parser().parse_args(["convert", "x.json", option, values[0][0], option, values[0][1]])
    settings = settings_of(args, {})
    chosen = settings.to if option == "--to" else getattr(settings.pipeline, values[1])

    assert set(values[0]) == set(chosen)


def test_a_second_blocking_flag_blocks_its_record(tmp_path, capsys):
    """--blocking KCO_INCONSISTENT --blocking COHB_RAISED refuses sample 04 (its finding is COHB_RAISED)."""
    out = tmp_path / "out"

    code = main(["convert", str(SAMPLES / "04-raised-cohb.json"), "--blocking", "KCO_INCONSISTENT",
                 "--blocking", "COHB_RAISED", "--out", str(out)])  # fmt: skip

    assert 2 == code
    assert "COHB_RAISED is configured as blocking" in capsys.readouterr().err
    assert [] == list(out.glob("LOW-2026-0002.*"))


def test_a_misspelt_variable_name_is_refused_naming_the_closest():
    """DLCO_BRIDGE_BLOKING (a typo) is not ignored: it names DLCO_BRIDGE_BLOCKING."""
    with pytest.raises(ConfigError) as caught:
        parse_settings("", {"DLCO_BRIDGE_BLOKING": "COHB_RAISED"})

    assert str(caught.value).startswith("DLCO_BRIDGE_BLOKING: ")
    assert "(closest: DLCO_BRIDGE_BLOCKING)" in str(caught.value)


def test_a_bad_flag_value_names_the_flag_not_a_configuration_file(capsys):
    """--units imperial is an argparse choice; --max-input-bytes 0 is checked by the settings: it names the flag."""
    code = main(["check", str(SAMPLES / "01-healthy-adult.json"), "--max-input-bytes", "0"])
    err = capsys.readouterr().err

    assert 1 == code
    assert "dlco-bridge: --max-input-bytes: a whole number from 1 to 1073741824, got 0\n" == err
