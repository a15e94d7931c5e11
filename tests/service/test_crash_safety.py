"""Crash safety: ``kill -9`` at random moments loses nothing and duplicates nothing beyond at-least-once.

What "exactly once" means here. Every input ends in exactly one place (archived, or quarantined
with ``<name>.error.json``) and every archived input's message is acknowledged by the receiver.
The link itself is at-least-once: a kill after the receiver's ACK but before the ledger marks the
row delivered sends that row again on restart. The re-send carries the *same* MSH-10 (it is derived
from the input's content), so a receiver that de-duplicates by control id sees each result once.
So the test asserts: distinct MSH-10s acknowledged == archived inputs, one MSH-10 per test id, and
re-sends (if any) are repeats of an MSH-10 already seen, at most one per kill (one message is in
flight at a time).
"""

from __future__ import annotations

import random
import time
from collections import Counter
from collections.abc import Callable
from typing import TYPE_CHECKING

from bridge.service.files import STRAY_TEMPORARY
from tests.service.conftest import (
    BLOCKED,
    GOOD,
    MALFORMED,
    RecordingReceiver,
    drop,
    make_input,
    mllp_destination,
    wait_until,
)

if TYPE_CHECKING:
    from tests.service.conftest import Site

FILES = 200
KILLS = 6
SEED = 1


def test_kill_9_at_random_moments_loses_and_duplicates_nothing(
    make_site: Callable[..., Site], receiver: RecordingReceiver
) -> None:
    """Inputs dropped across 6 SIGKILLs end archived and acknowledged once per MSH-10, or quarantined."""
    rng = random.Random(SEED)
    site = make_site(mllp_destination(receiver.port))
    inputs: dict[str, bytes] = {}
    for n in range(FILES):
        if n % 25 == 7:
            data = make_input(f"CRASH-{n:04d}", f"FICT-9{n % 17:03d}", template=MALFORMED)
        elif n % 50 == 11:
            data = make_input(f"CRASH-{n:04d}", f"FICT-9{n % 17:03d}", template=BLOCKED)
        else:
            data = make_input(f"CRASH-{n:04d}", f"FICT-9{n % 17:03d}", template=GOOD[n % len(GOOD)])
        inputs[f"crash-{n:04d}.json"] = data
    names = list(inputs)
    batches = [names[i :: KILLS + 1] for i in range(KILLS + 1)]

    for batch in batches[:KILLS]:
        for name in batch:
            drop(site.inbox, name, inputs[name])
        site.start(wait=False)
        # A random moment: before start-up finished, mid-intake, mid-delivery.
        time.sleep(rng.uniform(0.3, 2.5))
        site.kill()
    for name in batches[KILLS]:
        drop(site.inbox, name, inputs[name])
    site.start()
    wait_for_quiet(site)
    assert 0 == site.stop()

    archived = {p.name for p in site.archived()}
    quarantined = {p.name for p in site.quarantined()}
    expected_bad = {n for n in names if _is_bad(n)}
    assert set() == site.inbox_names()
    assert set(names) == archived | quarantined
    assert set() == archived & quarantined
    assert expected_bad == quarantined
    assert all((site.quarantine / f"{n}.error.json").is_file() for n in quarantined)

    accepted = receiver.accepted()
    ids_by_test: dict[str, set[str]] = {}
    for a in accepted:
        ids_by_test.setdefault(a.test_id, set()).add(a.control_id)
    archived_tests = {f"CRASH-{n[6:10]}" for n in archived}
    assert archived_tests == set(ids_by_test)
    assert {t: 1 for t in archived_tests} == {t: len(ids) for t, ids in ids_by_test.items()}
    distinct = {a.control_id for a in accepted}
    assert len(archived) == len(distinct)
    resends = sum(count - 1 for count in Counter(a.control_id for a in accepted).values())
    assert resends <= KILLS, f"{resends} re-sends for {KILLS} kills"
    assert [] == _strays(site)
    summary = site.summary()
    # Nothing was dropped twice: a file a kill kept from its archive folder is not a duplicate.
    assert [] == sorted(site.archive.rglob("duplicates/*"))
    assert (len(archived), len(quarantined), 0, 0, len(archived)) == (
        summary.processed,
        summary.quarantined,
        summary.duplicates,
        summary.pending,
        summary.delivered,
    )


QUARANTINE_FILES = 60
QUARANTINE_KILLS = 7


def test_kill_9_during_quarantine_writes_leaves_no_temporary_file_after_a_restart(
    make_site: Callable[..., Site], receiver: RecordingReceiver
) -> None:
    """Malformed files quarantined across 7 SIGKILLs: each ends quarantined with its report, no .tmp file stays."""
    rng = random.Random(SEED + 1)
    site = make_site(mllp_destination(receiver.port))
    names = [f"bad-{n:04d}.json" for n in range(QUARANTINE_FILES)]
    for n, name in enumerate(names):
        drop(site.inbox, name, make_input(f"BAD-{n:04d}", "FICT-8000", template=MALFORMED))
    for _ in range(QUARANTINE_KILLS):
        site.start(wait=False)
        time.sleep(rng.uniform(0.2, 1.2))  # start-up takes about 0.3 s: most kills land mid-quarantine
        site.kill()
    # What a kill in the middle of an atomic write leaves (the naming of files.write_atomically),
    # planted so that the clean-up is tested even if no kill hit a write; and files that are not ours.
    site.quarantine.mkdir(parents=True, exist_ok=True)
    site.archive.mkdir(parents=True, exist_ok=True)
    planted = site.quarantine / ".bad-0000.json.error.json.k3x9_q2z.tmp"
    planted.write_bytes(b'{"file": "bad-00')
    # A move across file systems into the archive cut short (files.move_durably's naming).
    (site.archive / "2031-01-01" / "duplicates").mkdir(parents=True)
    moved = site.archive / "2031-01-01" / "duplicates" / ".bad-0001.json.tmp"
    moved.write_bytes(b"{")
    not_ours = [site.quarantine / ".keep", site.archive / "notes.tmp", site.inbox / ".lab-export.json.part"]
    for path in not_ours:
        path.write_bytes(b"left alone")
    site.start()
    wait_until(lambda: len(site.quarantined()) == QUARANTINE_FILES, "every file quarantined", timeout=60)
    assert 0 == site.stop()

    assert set(names) == {p.name for p in site.quarantined()}
    assert all((site.quarantine / f"{n}.error.json").is_file() for n in names)
    assert [] == _strays(site)
    assert all(path.is_file() for path in not_ours)
    assert f"stray temporary file removed  event=stray_removed file={planted}" in site.stderr()
    assert f"event=stray_removed file={moved}" in site.stderr()


def _strays(site: Site) -> list[str]:
    """Temporary files of the service's own atomic writes left anywhere under the site."""
    return sorted(str(p) for p in site.root.rglob(".*") if p.is_file() and STRAY_TEMPORARY.fullmatch(p.name))


def _is_bad(name: str) -> bool:
    n = int(name[6:10])
    return n % 25 == 7 or n % 50 == 11


def wait_for_quiet(site: Site) -> None:
    wait_until(lambda: not site.inbox_names(), "an empty inbox", timeout=60)
    wait_until(lambda: site.summary().pending == 0, "an empty outbox", timeout=60)
