"""No tracebacks for ordinary situations (issue 19.7): one line and the right exit code."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from bridge.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}
# common practice: a shell reports a program stopped by signal N as 128 + N
EXIT_SIGPIPE, EXIT_SIGINT = 128 + signal.SIGPIPE, 128 + signal.SIGINT


def _to_a_closed_pipe(*args: str) -> subprocess.CompletedProcess[bytes]:
    """Run ``dlco-bridge args`` with its output going to a pipe whose reader has already gone (``| head``)."""
    read, write = os.pipe()
    os.close(read)
    try:
        return subprocess.run(
            [sys.executable, "-m", "bridge", *args], stdout=write, stderr=subprocess.PIPE, env=ENV, timeout=120
        )
    finally:
        os.close(write)


@pytest.mark.parametrize(
    "args",
    [
        ["check", str(SAMPLES / "01-healthy-adult.json")],
        ["check", "--json", str(SAMPLES / "01-healthy-adult.json")],
        ["map", "check", str(ROOT / "mappings/maps/lowmarsh-csv.toml"), str(SAMPLES / "legacy/lowmarsh-results.csv")],
        ["schema"],
        ["show", str(ROOT / "tests/golden/hl7/01-healthy-adult.oru.hl7")],
    ],
    ids=["check", "check --json", "map check", "schema", "show"],
)
def test_output_into_a_closed_pipe_stops_quietly(args):
    """`... | head`: no BrokenPipeError traceback, nothing on stderr, exit 141 as for a program stopped by SIGPIPE."""
    done = _to_a_closed_pipe(*args)

    assert (EXIT_SIGPIPE, b"") == (done.returncode, done.stderr)


def test_stand_in_list_into_a_closed_pipe_stops_quietly(tmp_path):
    """stand-in --list on a folder with resources, piped into a reader that went away: quiet, exit 141."""
    from bridge.service.receiver import ResourceStore, StandInSettings

    where = StandInSettings(tmp_path)
    ResourceStore(where.resources).close()  # the store exists: --list prints its summary line

    done = _to_a_closed_pipe("stand-in", "--folder", str(tmp_path), "--list")

    assert (EXIT_SIGPIPE, b"") == (done.returncode, done.stderr)


def test_validate_without_the_optional_extra_is_one_line():
    """--validate where fhir.resources (its parent package fhir) is not installed: one line, exit 1, no traceback."""
    # The interpreter is told the package "fhir" cannot be imported, as on a machine without the extra.
    code = (
        "import sys; sys.modules['fhir'] = None\n"
        "from bridge.cli import main\n"
        f"sys.exit(main(['convert', '--validate', {str(SAMPLES / '01-healthy-adult.json')!r}, '--out', 'unused']))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, env=ENV, timeout=120)

    assert 1 == done.returncode
    assert b"dlco-bridge: --validate: the optional extra installed first: pip install 'dlco-bridge[validate]'\n" == (
        done.stderr
    )


def test_validate_from_the_environment_without_the_extra_names_the_variable():
    """DLCO_BRIDGE_VALIDATE=true without the extra: the line names the variable."""
    code = (
        "import sys; sys.modules['fhir'] = None\n"
        "from bridge.cli import main\n"
        f"sys.exit(main(['check', {str(SAMPLES / '01-healthy-adult.json')!r}]))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, env={**ENV, "DLCO_BRIDGE_VALIDATE": "true"}, timeout=120
    )

    assert (1, True) == (done.returncode, done.stderr.startswith(b"dlco-bridge: DLCO_BRIDGE_VALIDATE: "))
    assert b"Traceback" not in done.stderr


def test_a_full_disk_behind_the_output_is_one_line():
    """`schema > /dev/full`: one line saying the device is full, exit 1."""
    if not Path("/dev/full").exists():
        pytest.skip("no /dev/full on this system")
    with open("/dev/full", "wb") as full:
        done = subprocess.run(
            [sys.executable, "-m", "bridge", "schema"], stdout=full, stderr=subprocess.PIPE, env=ENV, timeout=120
        )

    assert (1, b"dlco-bridge: No space left on device\n") == (done.returncode, done.stderr)


def test_an_output_folder_that_cannot_be_made_is_one_line(tmp_path, capsys):
    """convert --out under a file: one line naming the folder, exit 1."""
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")

    code = main(["convert", str(SAMPLES / "01-healthy-adult.json"), "--out", str(blocker / "out")])
    err = capsys.readouterr().err

    assert 1 == code
    assert f"dlco-bridge: --out: a folder that can be written, got {blocker / 'out'} (Not a directory)\n" == err


def _children(pid: int) -> list[int]:
    found = []
    for task in Path(f"/proc/{pid}/task").glob("*/children"):
        found += [int(p) for p in task.read_text().split()]
    return found


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="reads worker processes from /proc (Linux)")
def test_ctrl_c_during_an_audit_is_one_line_from_the_command_and_none_from_its_workers(tmp_path):
    """Ctrl-C (SIGINT to the whole process group) while workers run: "interrupted", exit 130, no traceback anywhere."""
    archive = tmp_path / "archive"
    archive.mkdir()
    data = (SAMPLES / "06-three-manoeuvres.json").read_bytes()
    for i in range(15_000):  # far more than the audit reads in the second it is given
        (archive / f"s{i:05d}.json").write_bytes(data)
    process = subprocess.Popen(
        [sys.executable, "-m", "bridge", "audit", str(archive), "--report", str(tmp_path / "report"), "--workers", "2"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env=ENV,
        start_new_session=True,  # its own process group, as a terminal's foreground job
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )
    deadline = time.monotonic() + 60
    while len(_children(process.pid)) < 2 and time.monotonic() < deadline:  # the workers are running
        time.sleep(0.05)
    time.sleep(0.5)
    os.killpg(process.pid, signal.SIGINT)
    _, err = process.communicate(timeout=120)

    assert (EXIT_SIGINT, b"dlco-bridge: interrupted\n") == (process.returncode, err)


def _service_config(tmp_path: Path) -> Path:
    config = tmp_path / "bridge.toml"
    config.write_text(
        'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n'
        '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nhost = "127.0.0.1"\nport = 1\n'
    )
    from bridge.service.ledger import Ledger

    Ledger.open(tmp_path / "st" / "ledger.sqlite3").close()
    return config


@pytest.mark.parametrize(
    ("args", "line"),
    [
        # source: SQLite datatypes, an INTEGER is a signed 8-byte value (an id beyond it was an OverflowError)
        (["resend", "99999999999999999999999"], "dlco-bridge: ID: an outbox id (dlco-bridge status --json), got "),
        (["prune", "--older-than", "inf"], "dlco-bridge: --older-than: a number of days >= 0, got inf"),
    ],
    ids=["resend id beyond SQLite", "prune inf days"],
)
def test_impossible_numbers_on_service_commands_are_one_line(tmp_path, capsys, args, line):
    """An id no ledger can hold, an infinite number of days: one line, exit 1."""
    config = _service_config(tmp_path)

    code = main([args[0], "--config", str(config), *args[1:]])
    err = capsys.readouterr().err

    assert (1, True, 1) == (code, err.startswith(line), err.count("\n"))


def test_a_huge_input_limit_is_refused_at_start_not_per_file(capsys):
    """--max-input-bytes 1e26 was accepted, then every file failed as an internal error; now one line at start."""
    code = main(["check", "--max-input-bytes", "99999999999999999999999999", str(SAMPLES / "01-healthy-adult.json")])

    assert 1 == code
    assert capsys.readouterr().err.startswith("dlco-bridge: --max-input-bytes: a whole number from 1 to 1073741824")
