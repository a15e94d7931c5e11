"""The command line without traps: each test failed before issue 11 was fixed."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from bridge.cli import build_parser, main

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"
README = (ROOT / "README.md").read_text(encoding="utf-8")
SERVICE_DOC = (ROOT / "docs" / "service.md").read_text(encoding="utf-8")


@pytest.mark.parametrize(
    ("name", "data"),
    [
        ("note.txt", b"hello\n"),
        ("noise.bin", bytes(range(256)) * 2),
        ("export.json", (SAMPLES / "01-healthy-adult.json").read_bytes()),
        ("patient.json", b'{"resourceType": "Patient", "id": "x"}'),
    ],
)
def test_show_refuses_what_is_neither_er7_nor_a_bundle(tmp_path, capsys, name, data):
    """show on a text file, random bytes, a lab export or another resource: one stderr line, exit 2."""
    path = tmp_path / name
    path.write_bytes(data)

    code = main(["show", str(path)])
    out, err = capsys.readouterr()

    assert (2, "", 1) == (code, out, len(err.strip().splitlines()))
    assert err.startswith(f"{path}: ")
    assert "an HL7 v2 message (MSH segment first) or a FHIR Bundle" in err


def test_show_still_reads_an_mllp_framed_message(tmp_path, capsys):
    """An ER7 message kept with its MLLP start and end blocks is shown, exit 0."""
    # source: HL7 v2.5.1 MLLP (Appendix C): <VT> message <FS><CR>
    path = tmp_path / "framed.hl7"
    path.write_bytes(b"\x0bMSH|^~\\&|LAB|SITE|||20260101120000||ACK|1|P|2.5.1\rMSA|AA|1\r\x1c\r")

    code = main(["show", str(path)])

    assert 0 == code
    assert "MSA-1" in capsys.readouterr().out


@pytest.mark.parametrize("command", ["check", "convert"])
def test_a_path_without_inputs_says_so_and_exits_2(tmp_path, capsys, command):
    """check/convert on an empty folder: one line saying no export was found, exit 2, nothing written."""
    empty = tmp_path / "empty"
    empty.mkdir()
    extra = ["--out", str(tmp_path / "out")] if command == "convert" else []

    code = main([command, str(empty), *extra])
    err = capsys.readouterr().err

    assert 2 == code
    assert f"{empty}: (inputs): at least one export file, found none\n" == err
    assert not (tmp_path / "out").exists()


def test_a_missing_configuration_file_is_a_clear_error(tmp_path, capsys):
    """watch --config on a file that does not exist stops at once with one line naming it (exit 1)."""
    missing = tmp_path / "nope.toml"

    code = main(["watch", "--config", str(missing)])

    assert 1 == code
    assert f"dlco-bridge: {missing}: (file): a readable configuration file" in capsys.readouterr().err


@pytest.mark.parametrize("command", ["watch", "status", "resend", "prune"])
def test_service_commands_without_a_configuration_refuse(capsys, command, monkeypatch):
    """Without --config or DLCO_BRIDGE_CONFIG no service command starts from ./bridge.toml (exit 1)."""
    monkeypatch.delenv("DLCO_BRIDGE_CONFIG", raising=False)
    extra = {"resend": ["--rejected"], "prune": ["--older-than", "30"]}.get(command, [])

    code = main([command, *extra])

    assert 1 == code
    assert "a configuration file (--config FILE or $DLCO_BRIDGE_CONFIG" in capsys.readouterr().err


def _options(parser):
    for action in parser._actions:  # argparse keeps no public list of its options
        if hasattr(action, "choices") and isinstance(action.choices, dict):
            for sub in action.choices.values():
                yield from _options(sub)
        else:
            yield parser.prog, action


def test_every_option_and_argument_has_help_text():
    """Every flag and positional argument of every command says what it is in --help."""
    missing = [f"{prog} {a.dest}" for prog, a in _options(build_parser()) if not a.help and a.dest != "command"]

    assert [] == missing


def test_messages_point_to_paths_that_exist():
    """The sample configuration named in --help and errors is a file of the project."""
    from bridge.config import SAMPLE_CONFIG

    assert (ROOT / SAMPLE_CONFIG).is_file()


def test_readme_states_the_real_default_of_health_and_metrics():
    """The README does not promise 127.0.0.1:9464 while metrics_port defaults to 0 (off)."""
    from bridge.config import ServiceSettings

    default = ServiceSettings.__dataclass_fields__["metrics_port"].default

    assert 0 == default
    assert "metrics_port` is 0" in README or "off unless `metrics_port`" in README


def test_every_metrics_series_is_documented(tmp_path):
    """Each series /metrics writes is named in docs/service.md."""
    from bridge.service.ledger import Ledger
    from bridge.service.metrics import Metrics

    metrics = Metrics(lambda: 0.0)
    with Ledger.open(tmp_path / "l.sqlite3") as ledger:
        text = metrics.render(ledger.summary())
    series = {line.split()[2] for line in text.splitlines() if line.startswith("# TYPE")}

    short = {n: "`…" + n.removeprefix("dlco_bridge") for n in series}
    undocumented = sorted(n for n in series if f"`{n}" not in SERVICE_DOC and short[n] not in SERVICE_DOC)

    assert [] == undocumented


def test_to_is_spelt_the_same_in_help_and_readme():
    """--to is written fhir,hl7 in convert --help and the README."""
    convert = next(a for p, a in _options(build_parser()) if p.endswith("convert") and a.dest == "to")

    assert "fhir,hl7" in convert.help
    assert "[--to fhir,hl7]" in README


def test_convert_out_default_is_the_same_in_help_and_readme():
    """--out: the default ./out is stated in --help and in the README."""
    out = next(a for p, a in _options(build_parser()) if p.endswith("convert") and a.dest == "out")

    assert (Path("out"), True) == (out.default, "default ./out" in out.help)
    assert "`DIR` is `./out` unless `--out` says otherwise" in README


def test_people_see_mmhg_and_machines_get_ucum(capsys):
    """check text says mL/min/mmHg throughout; check --json keeps the UCUM code mL/min/mm[Hg]."""
    # source: UCUM mm[Hg] is the machine code; mmHg is the trade's spelling (common practice)
    sample = str(SAMPLES / "03-high-altitude.json")
    main(["check", sample])
    text = capsys.readouterr().out
    main(["check", "--json", sample])
    document = json.loads(capsys.readouterr().out)

    assert ("mm[Hg]" in text, "mL/min/mmHg" in text) == (False, True)
    assert "mL/min/mm[Hg]" == document["files"][0]["session"]["results"]["dlco"]["unit"]


def test_finding_counts_are_plural_only_when_more_than_one(tmp_path, capsys):
    """convert prints [1 finding: ...] for one finding and [N findings] otherwise."""
    main(["convert", str(SAMPLES / "04-raised-cohb.json"), "--out", str(tmp_path)])
    out = capsys.readouterr().out

    # 04-raised-cohb carries one finding (COHB_RAISED)
    assert ("[1 findings" in out, "[1 finding: " in out or "[1 finding]" in out) == (False, True)


# ---------- issue 19.8: messages in the user's terms ----------


def test_a_refusal_line_spells_units_as_people_do(tmp_path, capsys):
    """A record refused for a blocking finding says 19.5 mL/min/mmHg, not UCUM's mm[Hg]."""
    code = main(["convert", str(SAMPLES / "04-raised-cohb.json"), "--blocking", "COHB_RAISED", "--out", str(tmp_path)])
    err = capsys.readouterr().err

    assert 2 == code
    assert ("mm[Hg]" in err, "mL/min/mmHg" in err) == (False, True)


def test_map_check_text_says_mmhg_and_its_json_keeps_ucum(capsys):
    """map check prints 754.6 mmHg for people; map check --json keeps the UCUM code mm[Hg]."""
    args = ["map", "check", str(ROOT / "mappings/maps/lowmarsh-csv.toml"), str(SAMPLES / "legacy/lowmarsh-results.csv")]
    main(args)
    text = capsys.readouterr().out
    main([*args, "--json"])
    document = json.loads(capsys.readouterr().out)
    values = [f["value"] for r in document["records"] if "fields" in r for f in r["fields"]]

    assert ("mm[Hg]" in text, "754.6 mmHg" in text) == (False, True)
    assert "754.6 mm[Hg]" in values


def test_the_audit_report_spells_units_as_people_do(tmp_path, capsys):
    """findings.csv and report.html say mmHg and °C where a finding names a value (UCUM mm[Hg], Cel before)."""
    archive = tmp_path / "archive"
    archive.mkdir()
    for name in ("03-high-altitude.json", "04-raised-cohb.json", "06-three-manoeuvres.json"):
        (archive / name).write_bytes((SAMPLES / name).read_bytes())

    main(["audit", str(archive), "--report", str(tmp_path / "r"), "--workers", "1"])
    capsys.readouterr()
    written = {name: (tmp_path / "r" / name).read_text(encoding="utf-8") for name in ("findings.csv", "report.html")}

    assert {name: False for name in written} == {name: "mm[Hg]" in text for name, text in written.items()}
    assert "mmHg" in written["findings.csv"]


# ---------- issue 19.11: the README's set-up works on a locked system Python ----------


def test_readme_set_up_makes_a_virtual_environment_before_installing():
    """The venv step comes before the two install commands (a PEP 668 system Python refuses pip outside one)."""
    # source: PEP 668, "Marking Python base environments as externally managed"
    venv = README.index("python3 -m venv .venv && . .venv/bin/activate")

    assert venv < README.index("python3 -m pip install -e . && dlco-bridge demo")
    assert venv < README.index("python3 -m pip install -e '.[test]' && python3 -m pytest")


def test_readme_says_the_browser_tests_need_chromium_as_ci_gets_it():
    """The README names Chromium for the browser tests and how .ci/run gets it, which .ci/run does."""
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")

    assert "apt-get install -y chromium" in ci
    assert "**Chromium**" in README and "`.ci/run`" in README and "apt-get install -y chromium" in README


def _help(command: str, dest: str) -> str:
    return next(a for p, a in _options(build_parser()) if p.endswith(command) and a.dest == dest).help


def test_new_rules_are_stated_alike_in_help_and_readme():
    """Issue 19: what --help says of list flags, output names, --overwrite and the input limit, the README says."""
    from bridge.pipeline import DEFAULT_MAX_INPUT_BYTES

    assert all("repeat or separate with commas" in _help("convert", d) for d in ("allow", "blocking", "to"))
    assert "a repeated flag (`--allow`, `--blocking`, `--to`) adds to the list" in README
    assert "X%%2F1" in _help("convert", "out") and "`X/1` → `X%2F1`" in README  # argparse doubles % in help
    assert "--overwrite" in README and "[--out DIR] [--overwrite]" in README
    assert "--report DIR [--overwrite]" in README and "earlier" in _help("audit", "overwrite")
    assert "1073741824" in _help("check", "max_input_bytes") and "up to 1073741824" in README
    assert f"default {DEFAULT_MAX_INPUT_BYTES}" in _help("check", "max_input_bytes")
    assert f"{DEFAULT_MAX_INPUT_BYTES} by default" in README
