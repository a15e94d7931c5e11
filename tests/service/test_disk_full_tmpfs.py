"""Disk full on a real file system: ``dlco-bridge watch`` with its state, archive and quarantine on a 2 MB tmpfs.

The tmpfs is filled to the last byte while the service runs: it must not exit, must leave new
files in the inbox, say so on ``/healthz`` and in one log line, and take every file and deliver
every message once the filler is removed, with no restart. Mounting needs root (or the right
capability); elsewhere the test is skipped with a message. ``test_disk_full.py`` covers each
write site one by one through the service's seams. All data is invented.
"""

from __future__ import annotations

import contextlib
import errno
import subprocess
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

from tests.service.conftest import drop, file_destination, make_input, wait_until
from tests.shell.conftest import LOOPBACK

if TYPE_CHECKING:
    from tests.service.conftest import Site

TMPFS_SIZE = "2m"


@pytest.fixture
def small_disk(tmp_path: Path) -> Iterator[Path]:
    """A 2 MB tmpfs mounted in ``tmp_path`` (skipped where mounting is not permitted); unmounted after."""
    mount_point = tmp_path / "small-disk"
    mount_point.mkdir()
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={TMPFS_SIZE}", "tmpfs", str(mount_point)],
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here (needs root): {done.stderr.strip() or done.returncode}")
    try:
        yield mount_point
    finally:
        subprocess.run(["umount", "--lazy", str(mount_point)], capture_output=True, check=False)


def fill(folder: Path) -> Path:
    """Write a filler file into ``folder`` until its file system has no byte left."""
    filler = folder / "filler.bin"
    with filler.open("wb", buffering=0) as stream:
        chunk = b"\0" * 65536
        while True:
            try:
                stream.write(chunk)
            except OSError as exc:
                if exc.errno != errno.ENOSPC:
                    raise
                if len(chunk) == 1:
                    return filler
                chunk = chunk[: len(chunk) // 2]


def healthz(site: Site) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(f"http://{LOOPBACK}:{site.metrics_port}/healthz", timeout=2) as answer:
            return int(answer.status), answer.read().decode()
    except urllib.error.HTTPError as error:
        return int(error.code), error.read().decode()
    except OSError:
        return 0, ""


def test_the_service_waits_out_a_full_disk_and_goes_on_when_space_returns(
    make_site: Callable[..., Site], small_disk: Path
) -> None:
    """Tmpfs filled mid-run: no exit, files left in the inbox, /healthz 503 with the reason; freed: all delivered."""
    site = make_site(file_destination())
    for name in ("state", "archive", "quarantine"):  # the service's own folders on the small disk
        (small_disk / name).mkdir()
        (site.root / name).symlink_to(small_disk / name)
    site.start()
    first = {f"before-{n}.json": make_input(f"TMPFS-{n:04d}", f"FICT-72{n:02d}") for n in range(3)}
    later = {f"during-{n}.json": make_input(f"TMPFS-{n + 10:04d}", f"FICT-73{n:02d}") for n in range(3)}
    for name, data in first.items():
        drop(site.inbox, name, data)
    wait_until(lambda: site.summary().delivered == 3, "the first three delivered")

    filler = fill(small_disk)
    for name, data in later.items():
        drop(site.inbox, name, data)
    status, body = wait_until(lambda: (h := healthz(site))[0] == 503 and h, "/healthz to report the full disk")
    with contextlib.suppress(subprocess.TimeoutExpired):
        assert site.process is not None
        site.process.wait(timeout=1.5)  # a crash would show here
    alive = site.process.poll() is None
    waiting = {p.name: p.read_bytes() for p in site.inbox.iterdir()}

    filler.unlink()
    wait_until(lambda: healthz(site)[0] == 200, "/healthz ok once space returns")
    wait_until(lambda: not site.inbox_names() and site.summary().delivered == 6, "every file taken and delivered")
    assert 0 == site.stop()
    log = site.stderr()

    assert (True, 503, True) == (alive, status, body.startswith("disk full: "))
    assert later == waiting
    assert sorted([*first, *later]) == sorted(p.name for p in site.archived())
    assert 6 == len(list((site.root / "outbox").iterdir()))
    assert (1, 1) == (log.count("no space left:"), log.count("space again:"))
