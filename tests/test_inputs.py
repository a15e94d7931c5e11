"""Folders mean the same everywhere (issue 19.4), and a missing place is an error (issue 19.6).

One rule (bridge/inputs.py) for check, convert, audit and the service's inbox: a folder is read
to any depth; in it, a file is read when its name fits what would read it; everything else is
skipped and counted, never an error. A file named on the command line is always read.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
from collections.abc import Iterator
from pathlib import Path

import pytest

from bridge.cli import build_parser, main
from bridge.config import load_settings
from bridge.inputs import FOLDER_RULE, HIDDEN, NOT_A_FILE, NOT_AN_EXPORT, TEMPORARY, find_inputs
from bridge.service.ledger import Ledger
from bridge.service.runner import Service
from bridge.service.transports.memory import InMemoryTransport
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_map_choice, load_tables

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"
README = (ROOT / "README.md").read_text(encoding="utf-8")
CSV_MAP = ROOT / "mappings" / "maps" / "lowmarsh-csv.toml"
NOT_EXPORTS = ("README.txt", "Thumbs.db", "bridge.toml")


def _export(folder: Path, name: str, sample: str = "01-healthy-adult.json", test_id: str | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    doc = json.loads((SAMPLES / sample).read_text())
    doc["test_id"] = test_id or name.removesuffix(".json")
    (folder / name).write_text(json.dumps(doc))
    return folder / name


def _archive(root: Path) -> Path:
    """Exports at the top and in year/month sub-folders, beside files that are not exports."""
    _export(root, "top.json")
    _export(root / "2025" / "11", "nov.json")
    _export(root / "2026" / "01", "jan.json")
    for name in NOT_EXPORTS:
        (root / "2026" / name).write_text("not an export\n")
    (root / ".hidden").mkdir()
    _export(root / ".hidden", "in-hidden-folder.json")
    (root / "2026" / "01" / "jan2.json.part").write_text("{")
    return root


def test_the_rule_finds_exports_at_any_depth_in_name_order_and_says_why_it_skips_the_rest(tmp_path):
    """top.json, then the sub-folders in name order; README.txt & co. not exports, .hidden and .part not read."""
    root = _archive(tmp_path / "archive")

    found = [(f.path.relative_to(root).as_posix(), f.skipped) for f in find_inputs([root], MapChoice())]

    assert [
        (".hidden", HIDDEN),
        ("top.json", None),
        ("2025/11/nov.json", None),
        ("2026/README.txt", NOT_AN_EXPORT),
        ("2026/Thumbs.db", NOT_AN_EXPORT),
        ("2026/bridge.toml", NOT_AN_EXPORT),
        ("2026/01/jan.json", None),
        ("2026/01/jan2.json.part", TEMPORARY),
    ] == found


@pytest.mark.parametrize("command", ["check", "convert"])
def test_check_and_convert_read_sub_folders_and_count_what_they_skip(tmp_path, capsys, command):
    """Files at the top and in sub-folders are all read (the sub-folders were skipped without a word); exit 0."""
    root = _archive(tmp_path / "archive")
    extra = ["--out", str(tmp_path / "out")] if command == "convert" else []

    code = main([command, str(root), *extra])
    out, err = capsys.readouterr()

    assert (0, "") == (code, err)
    assert "Not read: 5 skipped, hidden: .hidden; not an export: README.txt, Thumbs.db, bridge.toml;" in out
    for name in ("top", "nov", "jan"):
        assert (f"{name}.json" in out) if command == "convert" else (f"Test {name}" in out or name in out)
    if command == "convert":
        assert {"top", "nov", "jan"} == {p.name.split(".")[0] for p in (tmp_path / "out").iterdir()}


def test_only_year_and_month_sub_folders_are_not_found_none(tmp_path, capsys):
    """A folder holding only YYYY/MM sub-folders: every export in them is checked (it said "found none")."""
    root = tmp_path / "archive"
    for year, month in (("2024", "03"), ("2025", "07")):
        _export(root / year / month, f"{year}-{month}.json")

    code = main(["check", "--json", str(root)])
    document = json.loads(capsys.readouterr().out)

    assert 0 == code
    assert ["2024-03.json", "2025-07.json"] == [Path(f["source"]).name for f in document["files"]]


def test_check_json_lists_the_skipped_files_with_their_reason(tmp_path, capsys):
    """check --json carries the skipped files, so a script sees them too."""
    root = tmp_path / "in"
    _export(root, "a.json")
    (root / "README.txt").write_text("x")

    main(["check", "--json", str(root)])

    assert [{"path": str(root / "README.txt"), "reason": NOT_AN_EXPORT}] == json.loads(capsys.readouterr().out)[
        "skipped"
    ]


def test_a_folder_of_non_exports_only_says_found_none_and_what_it_skipped(tmp_path, capsys):
    """No export at all: one line, exit 2, naming what was skipped."""
    root = tmp_path / "in"
    root.mkdir()
    (root / "README.txt").write_text("x")

    code = main(["check", str(root)])

    assert 2 == code
    assert f"{root}: (inputs): at least one export file, found none (1 skipped, not an export: README.txt)\n" == (
        capsys.readouterr().err
    )


def test_a_file_named_on_the_command_line_is_always_read(tmp_path, capsys):
    """README.txt named explicitly is read, and refused as no export (exit 2): the rule is for folders only."""
    named = tmp_path / "README.txt"
    named.write_text("hello\n")

    code = main(["check", str(named)])

    assert 2 == code
    assert capsys.readouterr().err.startswith(f"{named}: (file): dlco-result/1 JSON")


def test_with_a_default_map_its_format_decides_and_a_pattern_names_any_extension(tmp_path):
    """--map (CSV): .csv and .tsv are read, .json skipped; a [maps] pattern "*.txt" makes .txt files inputs."""
    tables = load_tables()
    root = tmp_path / "in"
    root.mkdir()
    for name in ("a.csv", "b.TSV", "c.json", "d.txt", "notes.md"):
        (root / name).write_text("x")

    by_default = load_map_choice(CSV_MAP, (), tables)
    by_pattern = load_map_choice(None, (("*.txt", CSV_MAP),), tables)

    assert ["a.csv", "b.TSV"] == [f.path.name for f in find_inputs([root], by_default) if f.skipped is None]
    assert ["c.json", "d.txt"] == [f.path.name for f in find_inputs([root], by_pattern) if f.skipped is None]


def test_a_fifo_and_a_link_to_a_folder_are_skipped_not_read(tmp_path):
    """A named pipe would block a reader forever; a link to a folder could loop: both skipped, counted."""
    root = tmp_path / "in"
    root.mkdir()
    os.mkfifo(root / "pipe.json")
    (tmp_path / "elsewhere").mkdir()
    _export(tmp_path / "elsewhere", "x.json")
    (root / "link").symlink_to(tmp_path / "elsewhere")

    found = {f.path.name: f.skipped for f in find_inputs([root], MapChoice())}

    assert {"pipe.json": NOT_A_FILE, "link": "a link to a folder (not followed)"} == found


def test_audit_reads_the_same_files_as_check(tmp_path, capsys):
    """The audit of the archive reads exactly the files check reads and skips the same ones (one rule)."""
    root = _archive(tmp_path / "archive")
    main(["check", "--json", str(root)])
    checked = json.loads(capsys.readouterr().out)

    main(["audit", str(root), "--report", str(tmp_path / "r"), "--workers", "1"])
    capsys.readouterr()
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())

    assert (len(checked["files"]), len(checked["skipped"])) == (summary["files"], summary["skipped"])


def test_help_and_readme_state_the_one_folder_rule():
    """check, convert, audit and watch --help state the rule, in the words the README uses."""
    parser = build_parser()
    helps = {
        name: parser._subparsers._group_actions[0].choices[name].format_help()  # argparse keeps no public accessor
        for name in ("check", "convert", "audit", "watch")
    }

    stated = {name: " ".join(FOLDER_RULE.split()) in " ".join(text.split()) for name, text in helps.items()}

    assert {"check": True, "convert": True, "audit": True, "watch": True} == stated
    assert FOLDER_RULE in " ".join(README.split())


# ---------- the service's inbox: the same rule ----------


@contextlib.contextmanager
def _captured(caplog: pytest.LogCaptureFixture) -> Iterator[None]:
    """The service's records in caplog, also after a `watch` run set its logger not to propagate."""
    logger = logging.getLogger("dlco_bridge")
    propagate, logger.propagate = logger.propagate, True
    try:
        with caplog.at_level(logging.INFO, logger="dlco_bridge"):
            yield
    finally:
        logger.propagate = propagate


def _service(tmp_path: Path, stable: float = 0.0) -> tuple[Service, Ledger]:
    config = tmp_path / "bridge.toml"
    config.write_text(
        f'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\nstable_seconds = {stable}\n'
        '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nhost = "127.0.0.1"\nport = 1\n'
    )
    settings = load_settings(config, {})
    (tmp_path / "in").mkdir()
    ledger = Ledger.open(tmp_path / "st" / "ledger.sqlite3")
    tables = load_tables()
    maps = load_map_choice(settings.field_map, settings.maps, tables)
    service = Service(
        settings.require_service(), settings.pipeline, maps, tables, ledger, {"records": InMemoryTransport()}
    )
    return service, ledger


def test_the_service_takes_exports_from_inbox_sub_folders_and_leaves_the_rest_counted(tmp_path, caplog):
    """An export two levels down is taken (it was ignored); README.txt stays, logged once, counted once."""
    service, ledger = _service(tmp_path)
    inbox = tmp_path / "in"
    _export(inbox / "2026" / "03", "deep.json")
    (inbox / "README.txt").write_text("not an export\n")
    try:
        with _captured(caplog):
            for _ in range(3):  # seen, then stable, then nothing left to take
                service.scan_once()
        skipped = [r for r in caplog.records if getattr(r, "event", "") == "skipped"]
        summary = ledger.summary()
    finally:
        ledger.close()

    assert (1, False, True) == (summary.processed, (inbox / "2026" / "03" / "deep.json").exists(),
                                (inbox / "README.txt").exists())  # fmt: skip
    counted = service.metrics.registry.get_sample_value("dlco_bridge_files_skipped_total")
    assert (["README.txt"], 1) == ([r.file for r in skipped], counted)


# ---------- a missing place is an error, not a fresh folder (issue 19.6) ----------


@pytest.fixture(autouse=True)
def _logging_as_found() -> Iterator[None]:
    """`watch` configures the service's logger for the process; put it back for the tests that follow."""
    logger = logging.getLogger("dlco_bridge")
    saved = (logger.handlers[:], logger.level, logger.propagate)
    yield
    logger.handlers[:], logger.propagate = saved[0], saved[2]
    logger.setLevel(saved[1])


def _site(tmp_path: Path, extra: str = "", inbox: str = "in") -> Path:
    config = tmp_path / "bridge.toml"
    config.write_text(
        f'inbox = "{inbox}"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n{extra}'
        '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nhost = "127.0.0.1"\nport = 1\n'
    )
    return config


def test_watch_with_a_missing_inbox_stops_at_start_creating_nothing(tmp_path, capsys):
    """inbox = "/nonexistent/inbox": exit 1, one line naming the key; no inbox, no state folder made."""
    config = _site(tmp_path, inbox="/nonexistent/inbox")

    code = main(["watch", "--config", str(config)])
    err = capsys.readouterr().err

    assert (1, 1) == (code, err.count("\n"))
    assert err.startswith(f"dlco-bridge: {config}: inbox: an existing folder (the lab's export folder), got ")
    assert ([], False) == (sorted(p.name for p in tmp_path.iterdir() if p.name != "bridge.toml"),
                           Path("/nonexistent/inbox").exists())  # fmt: skip


@pytest.mark.parametrize("key", ["archive", "quarantine", "state"])
def test_a_service_folder_inside_the_inbox_is_refused(tmp_path, capsys, key):
    """The inbox is read to any depth: an archive inside it would be taken again; refused at start."""
    (tmp_path / "in").mkdir()
    config = tmp_path / "bridge.toml"
    folders = {"inbox": "in", "archive": "ar", "quarantine": "q", "state": "st"} | {key: f"in/{key}"}
    config.write_text(
        "".join(f'{k} = "{v}"\n' for k, v in folders.items())
        + '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nhost = "127.0.0.1"\nport = 1\n'
    )

    code = main(["watch", "--config", str(config)])

    assert 1 == code
    assert f"{config}: {key}: a folder outside the inbox" in capsys.readouterr().err


def test_a_missing_drop_folder_or_tls_file_stops_watch_at_start(tmp_path, capsys):
    """A file destination's folder (another system collects there) and a TLS file must exist."""
    (tmp_path / "in").mkdir()
    drop = _site(tmp_path, '[destination.drop]\npayload = "fhir"\ntransport = "file"\nfolder = "drop"\n')
    assert 1 == main(["watch", "--config", str(drop)])
    assert "destination.drop.folder: an existing folder (the folder another system collects from)" in (
        capsys.readouterr().err
    )
    tls = tmp_path / "tls.toml"
    tls.write_text(_site(tmp_path).read_text() + 'ca_file = "ca.pem"\n')

    assert 1 == main(["watch", "--config", str(tls)])
    assert f"destination.records.ca_file: an existing file, got {tmp_path / 'ca.pem'}" in capsys.readouterr().err


@pytest.mark.parametrize("command", [["resend", "--rejected"], ["prune", "--older-than", "1"]])
def test_resend_and_prune_on_a_missing_ledger_refuse_instead_of_making_one(tmp_path, capsys, command):
    """A mistyped state folder: one line naming state, exit 1, no fresh empty ledger (it said "0 queued again")."""
    config = _site(tmp_path)

    code = main([command[0], "--config", str(config), *command[1:]])

    assert 1 == code
    assert f"{config}: state: the service's state folder, holding ledger.sqlite3" in capsys.readouterr().err
    assert not (tmp_path / "st" / "ledger.sqlite3").exists()


def test_audit_of_a_missing_path_is_an_error_not_an_empty_report(tmp_path, capsys):
    """audit /nonexistent: one line, exit 2, no report written (it exited 0 with an empty report)."""
    code = main(["audit", str(tmp_path / "nonexistent"), "--report", str(tmp_path / "r")])

    assert 2 == code
    assert f"{tmp_path / 'nonexistent'}: (path): an existing file or folder to audit, found none\n" == (
        capsys.readouterr().err
    )
    assert not (tmp_path / "r").exists()


def test_the_service_says_which_of_its_own_folders_it_created(tmp_path, caplog):
    """archive and quarantine may be made by the service; each is logged."""
    service, ledger = _service(tmp_path)
    service.stop.set()
    try:
        with _captured(caplog):
            service.run()
    finally:
        ledger.close()

    created = sorted(Path(r.folder).name for r in caplog.records if getattr(r, "event", "") == "folder_created")
    assert ["ar", "q"] == created
