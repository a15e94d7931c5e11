"""Nothing is overwritten in silence (issue 19.5): convert's names never collide, a second content is an error."""

from __future__ import annotations

import json
import os
from pathlib import Path
from urllib.parse import unquote

import pytest

from bridge.cli import main
from bridge.cli.outputs import OutputFolder, output_stem
from bridge.errors import InvalidField
from bridge.pipeline import Route, process
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = json.loads((ROOT / "samples" / "01-healthy-adult.json").read_text())
NOW_ROUTES = (Route("fhir", "traditional"), Route("hl7", "traditional"))


def _export(folder: Path, name: str, test_id: str, given: str | None = None) -> Path:
    doc = json.loads(json.dumps(SAMPLE))
    doc["test_id"] = test_id
    if given is not None:  # another content: the patient's given name (HL7 PID-5 carries it)
        doc["patient"]["given"] = given
    folder.mkdir(parents=True, exist_ok=True)
    (folder / name).write_text(json.dumps(doc))
    return folder / name


@pytest.mark.parametrize(
    ("test_id", "stem"),
    [
        # source: RFC 3986 section 2.1 (percent-encoding) and 2.3 (unreserved: ALPHA DIGIT - . _ ~)
        ("X/1", "X%2F1"),
        ("X_1", "X_1"),
        ("X 1", "X%201"),
        ("X%1", "X%251"),
        ("..\\x", "%2E.%5Cx"),
        ("LOW-2026-0001", "LOW-2026-0001"),
        ("Réf:7", "R%C3%A9f%3A7"),
    ],
)
def test_a_test_id_becomes_a_file_name_that_gives_it_back(test_id, stem):
    """Percent-encoded outside the unreserved characters (and a leading dot): reversible with unquote."""
    # source: Python urllib.parse.unquote, the inverse of RFC 3986 percent-encoding
    assert (stem, test_id) == (output_stem(test_id), unquote(output_stem(test_id)))


def test_test_ids_that_used_to_share_a_name_get_three_files(tmp_path, capsys):
    """X/1, X_1 and X 1 all became X_1.*: now three Bundles and three ORUs, exit 0."""
    inputs = [_export(tmp_path / "in", f"{n}.json", tid, f"Given{n}") for n, tid in enumerate(("X/1", "X_1", "X 1"))]

    code = main(["convert", *map(str, inputs), "--out", str(tmp_path / "out")])
    capsys.readouterr()
    names = sorted(p.name for p in (tmp_path / "out").iterdir())

    assert 0 == code
    assert ["X%201.bundle.json", "X%201.oru.hl7", "X%2F1.bundle.json", "X%2F1.oru.hl7", "X_1.bundle.json",
            "X_1.oru.hl7"] == names  # fmt: skip


def test_a_second_content_for_one_test_id_is_refused_naming_both_files(tmp_path, capsys):
    """Two files, one test id, other DLCO: the second is one error line naming the first, exit 2; the first stays."""
    first = _export(tmp_path / "in", "a.json", "T-1", "Alder")
    second = _export(tmp_path / "in", "b.json", "T-1", "Birch")

    code = main(["convert", str(tmp_path / "in"), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    oru = (tmp_path / "out" / "T-1.oru.hl7").read_text()

    assert 2 == code
    assert err.startswith(f"{second}: test_id: one content per test id in a run, got 'T-1' also in {first}")
    assert ("^Alder" in oru, "^Birch" in oru) == (True, False)


def test_overwrite_lets_the_later_content_replace_and_says_so(tmp_path, capsys):
    """--overwrite: the later file's outputs replace the earlier ones, and the line says whose they replaced."""
    first = _export(tmp_path / "in", "a.json", "T-1", "Alder")
    _export(tmp_path / "in", "b.json", "T-1", "Birch")

    code = main(["convert", str(tmp_path / "in"), "--out", str(tmp_path / "out"), "--overwrite"])
    out = capsys.readouterr().out

    assert 0 == code
    assert f"(replaced the files of {first} (--overwrite))" in out
    assert "^Birch" in (tmp_path / "out" / "T-1.oru.hl7").read_text()


def test_the_same_content_twice_is_written_once(tmp_path, capsys):
    """A copy of an export under another name: not a conflict; written once, and said."""
    first = _export(tmp_path / "in", "a.json", "T-1")
    _export(tmp_path / "in", "copy.json", "T-1")

    code = main(["convert", str(tmp_path / "in"), "--out", str(tmp_path / "out")])

    assert 0 == code
    assert f"(same test id and content as {first}: written once)" in capsys.readouterr().out


def test_a_file_of_an_earlier_run_is_replaced_with_a_word(tmp_path, capsys):
    """Running convert again into the same folder replaces its files and says so."""
    source = _export(tmp_path / "in", "a.json", "T-1")
    main(["convert", str(source), "--out", str(tmp_path / "out")])
    capsys.readouterr()

    main(["convert", str(source), "--out", str(tmp_path / "out")])

    assert "(replaced a file of an earlier run)" in capsys.readouterr().out


def test_a_name_another_test_id_of_the_run_holds_is_refused(tmp_path):
    """On a case-insensitive file system "ab" and "AB" are one file; the second is refused, not written over.

    Simulated with a hard link: the second test id's name already is the first test id's file.
    """
    tables = load_tables()
    from datetime import UTC, datetime

    now = datetime(2026, 3, 10, tzinfo=UTC)
    folder = OutputFolder(tmp_path)
    lower = process(_export(tmp_path / "in", "a.json", "ab").read_bytes(), "a.json", tables, now=now, routes=NOW_ROUTES)
    upper = process(_export(tmp_path / "in", "b.json", "AB").read_bytes(), "b.json", tables, now=now, routes=NOW_ROUTES)
    folder.write(Path("a.json"), lower)
    for suffix in (".bundle.json", ".oru.hl7"):
        os.link(tmp_path / f"ab{suffix}", tmp_path / f"AB{suffix}")

    with pytest.raises(InvalidField) as caught:
        folder.write(Path("b.json"), upper)

    assert "AB.bundle.json is the file of test id 'ab' on this file system" in caught.value.expected


def test_audit_refuses_a_folder_holding_an_earlier_report_unless_told(tmp_path, capsys):
    """audit --report into an earlier report: exit 1; with --overwrite the earlier NDJSON does not survive."""
    archive = tmp_path / "archive"
    _export(archive, "a.json", "T-1")
    report = tmp_path / "r"
    main(["audit", str(archive), "--report", str(report), "--workers", "1", "--emit", "ndjson"])
    capsys.readouterr()

    refused = main(["audit", str(archive), "--report", str(report), "--workers", "1"])
    err = capsys.readouterr().err
    replaced = main(["audit", str(archive), "--report", str(report), "--workers", "1", "--overwrite"])

    assert (1, 0) == (refused, replaced)
    assert f"dlco-bridge: --report: a folder without an earlier report, got {report} holding manifest.json" in err
    assert not (report / "ndjson").exists()


# ---------- issue 19.10: patient data is protected alike ----------


def _modes(folder: Path) -> dict[str, str]:
    """Each file's and folder's permission bits below ``folder``, as octal text."""
    return {str(p.relative_to(folder)): oct(p.stat().st_mode & 0o777) for p in sorted(folder.rglob("*"))}


@pytest.fixture
def permissive_umask():
    """The user's umask lets everyone read (022, a common default): the policy must not depend on it."""
    before = os.umask(0o022)
    yield
    os.umask(before)


def test_every_file_with_patient_data_is_the_owners_alone(tmp_path, capsys, permissive_umask):
    """convert's outputs, the audit's report (patient names) and NDJSON: files 0600, folders made 0700."""
    archive = tmp_path / "archive"
    _export(archive, "a.json", "T-1")

    main(["convert", str(archive), "--out", str(tmp_path / "out")])
    main(["audit", str(archive), "--report", str(tmp_path / "report"), "--workers", "1", "--emit", "ndjson"])
    capsys.readouterr()
    modes = {**_modes(tmp_path / "out"), **_modes(tmp_path / "report")}
    folders = {name: oct(p.stat().st_mode & 0o777) for name, p in (("out", tmp_path / "out"),
                                                                   ("report", tmp_path / "report"))}  # fmt: skip

    # common practice (POSIX permission bits): 0600 read and write for the owner only, 0700 for a folder
    assert {name: "0o700" if (tmp_path / "report" / name).is_dir() else "0o600" for name in modes if name} == modes
    assert {"out": "0o700", "report": "0o700"} == folders


def test_the_service_folders_and_ledger_are_the_owners_alone(tmp_path):
    """watch, started under umask 022, makes its state, archive and quarantine 0700 and the ledger 0600."""
    import signal
    import subprocess
    import sys
    import time

    config = tmp_path / "bridge.toml"
    config.write_text(
        'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n'
        '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nhost = "127.0.0.1"\nport = 1\n'
    )
    (tmp_path / "in").mkdir()
    environment = {**os.environ, "PYTHONPATH": str(ROOT)}
    environment.pop("DLCO_BRIDGE_CONFIG", None)
    process = subprocess.Popen(
        [sys.executable, "-m", "bridge", "watch", "--config", str(config)],
        stderr=subprocess.PIPE, env=environment, preexec_fn=lambda: os.umask(0o022),
    )  # fmt: skip
    deadline = time.monotonic() + 60
    while not (tmp_path / "q").exists() and time.monotonic() < deadline:  # made after the ledger opened
        time.sleep(0.05)
    process.send_signal(signal.SIGTERM)
    process.communicate(timeout=30)
    made = {name: oct((tmp_path / name).stat().st_mode & 0o777) for name in ("st", "ar", "q", "st/ledger.sqlite3")}

    # common practice (POSIX permission bits): 0600 read and write for the owner only, 0700 for a folder
    assert {"st": "0o700", "ar": "0o700", "q": "0o700", "st/ledger.sqlite3": "0o600"} == made


def test_the_demo_says_where_its_files_stay(capsys):
    """demo leaves its outputs for `show` and says where, and how to remove them."""
    main(["demo"])
    out = capsys.readouterr().out

    assert "the demo's files (invented data) stay in " in out and "; remove them with: rm -r " in out
