"""Chaos: SIGKILLs at random moments while files, corrections, duplicates and poison arrive and the receiver goes down.

One harness, two sizes. The small one runs with every ``pytest`` (a few kills, tens of files, a
short outage); the long one (``-m slow``: 100 kills, 1,000 files, a 10 s outage) is not run by
default, and its last figures are in ``docs/service.md``. What must hold whatever the kills:

* every input ends in exactly one place: archived (a duplicate in ``duplicates/``) or, for the
  poison, quarantined with its report; the inbox is empty, no temporary file is left;
* every test id accepted by the receiver has one MSH-10 per content (original, correction), and a
  corrected one's last accepted message is the correction (OBX-11 ``C``): one patient's messages
  leave in order, through the outage too;
* re-sends are repeats of an MSH-10 already acknowledged (a kill between the ACK and the ledger's
  record), at most one per kill; a duplicate sends nothing; the ledger ends with nothing pending.

All data is invented.
"""

from __future__ import annotations

import json
import random
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

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


@dataclass
class Plan:
    """What is dropped before each run: file name -> bytes, and what each file is."""

    batches: list[dict[str, bytes]] = field(default_factory=list)
    kind: dict[str, str] = field(default_factory=dict)  # good | correction | duplicate | poison
    test_of: dict[str, str] = field(default_factory=dict)


def plan(files: int, runs: int, rng: random.Random) -> Plan:
    """``files`` inputs spread over ``runs`` batches: about 80 % new results, and corrections, duplicates, poison."""
    result = Plan(batches=[{} for _ in range(runs)])
    # (batch, test id, patient, content, sample) of good inputs: a correction keeps its result's sample
    sent: list[tuple[int, str, str, bytes, Path]] = []
    for n in range(files):
        batch = min(runs - 1, n * runs // files)
        name = f"b{batch:03d}-{n:05d}.json"
        roll = rng.random()
        earlier = [s for s in sent if s[0] < batch]
        if roll < 0.08 and earlier:
            _, test_id, patient, data, _ = rng.choice(earlier)
            result.kind[name], result.test_of[name] = "duplicate", test_id
        elif roll < 0.16 and earlier:
            _, test_id, patient, _, sample = rng.choice(earlier)
            data = make_input(test_id, patient, template=sample, change=round(rng.uniform(0.01, 0.5), 2) + 0.01 * n)
            result.kind[name], result.test_of[name] = "correction", test_id
            sent.append((batch, test_id, patient, data, sample))
        elif roll < 0.22:
            data = poison(n, rng)
            result.kind[name] = "poison"
        else:
            test_id, patient = f"CHAOS-{n:05d}", f"FICT-6{n % 23:03d}"
            sample = GOOD[n % len(GOOD)]
            data = make_input(test_id, patient, template=sample)
            result.kind[name], result.test_of[name] = "good", test_id
            sent.append((batch, test_id, patient, data, sample))
        result.batches[batch][name] = data
    return result


def poison(n: int, rng: random.Random) -> bytes:
    """A file that must be quarantined: malformed, blocked by an error finding, or a value that overflows."""
    choice = rng.randrange(3)
    if choice == 0:
        return make_input(f"POISON-{n:05d}", "FICT-6999", template=MALFORMED)
    if choice == 1:
        return make_input(f"POISON-{n:05d}", "FICT-6999", template=BLOCKED)
    document = json.loads(make_input(f"POISON-{n:05d}", "FICT-6999"))
    document["results"]["dlco"]["value"] = 1e308
    return json.dumps(document).encode()


@dataclass(frozen=True)
class Figures:
    """What one chaos run did, for the assertions and for ``docs/service.md``."""

    files: int
    kills: int
    seconds: float
    archived: int
    quarantined: int
    duplicates: int
    corrections: int
    accepted: int
    resends: int
    outage_seconds: float


def run_chaos(
    site: Site, receiver: RecordingReceiver, *, files: int, kills: int, outage: tuple[int, int], seed: int
) -> Figures:
    """Drop ``files`` inputs over ``kills`` + 1 runs, SIGKILL each run but the last at a random moment.

    The receiver is down from run ``outage[0]`` to run ``outage[1]`` (exclusive).
    """
    rng = random.Random(seed)
    the_plan = plan(files, kills + 1, rng)
    started = time.monotonic()
    down_at = down_for = 0.0
    for run, batch in enumerate(the_plan.batches):
        if run == outage[0]:
            receiver.stop()
            down_at = time.monotonic()
        if run == outage[1]:
            receiver.start()
            down_for = time.monotonic() - down_at
        for name, data in batch.items():
            drop(site.inbox, name, data)
        if run == kills:
            break
        site.start(wait=False)
        time.sleep(rng.uniform(0.3, 2.5))  # before start-up finished, mid-intake, mid-delivery
        site.kill()
    site.start()
    wait_until(lambda: not site.inbox_names(), "an empty inbox", timeout=120)
    wait_until(lambda: site.summary().pending == 0, "an empty outbox", timeout=120)
    assert 0 == site.stop()
    seconds = time.monotonic() - started
    check(site, receiver, the_plan, kills)
    accepted = receiver.accepted()
    counts = Counter(a.control_id for a in accepted)
    summary = site.summary()
    return Figures(
        files=files,
        kills=kills,
        seconds=seconds,
        archived=len(site.archived()),
        quarantined=len(site.quarantined()),
        duplicates=sum(1 for k in the_plan.kind.values() if k == "duplicate"),
        corrections=summary.corrections,
        accepted=len(counts),
        resends=sum(c - 1 for c in counts.values()),
        outage_seconds=down_for,
    )


def check(site: Site, receiver: RecordingReceiver, the_plan: Plan, kills: int) -> None:
    """The invariants of the module docstring."""
    names = set(the_plan.kind)
    by_kind = {
        k: {n for n, kind in the_plan.kind.items() if kind == k} for k in ("good", "correction", "duplicate", "poison")
    }
    archived = {p.name for p in site.archived()}
    duplicates = {p.name for p in site.archive.rglob("duplicates/*") if not p.name.startswith(".")}
    quarantined = {p.name for p in site.quarantined()}
    assert set() == site.inbox_names()
    assert (names, set()) == (archived | quarantined, archived & quarantined)
    assert (by_kind["poison"], by_kind["duplicate"]) == (quarantined, duplicates)
    assert all((site.quarantine / f"{n}.error.json").is_file() for n in quarantined)

    accepted = receiver.accepted()
    ids_by_test: dict[str, set[str]] = {}
    for a in accepted:
        ids_by_test.setdefault(a.test_id, set()).add(a.control_id)
    contents = Counter(the_plan.test_of[n] for n in by_kind["good"] | by_kind["correction"])
    assert dict(contents) == {test: len(ids) for test, ids in ids_by_test.items()}
    last = {a.test_id: a for a in accepted}
    corrected = {the_plan.test_of[n] for n in by_kind["correction"]}
    assert {"C"} == {s for test in corrected for s in last[test].statuses}
    resends = sum(c - 1 for c in Counter(a.control_id for a in accepted).values())
    assert resends <= kills, f"{resends} re-sends for {kills} kills"

    summary = site.summary()
    assert (len(by_kind["good"]), len(by_kind["correction"]), len(quarantined), 0) == (
        summary.processed,
        summary.corrections,
        summary.quarantined,
        summary.pending,
    )
    assert len(by_kind["good"]) + len(by_kind["correction"]) == summary.delivered
    assert [] == sorted(str(p) for p in site.root.rglob(".*") if p.is_file() and STRAY_TEMPORARY.fullmatch(p.name))


def test_small_chaos_kills_outage_corrections_duplicates_and_poison_lose_and_double_nothing(
    make_site: Callable[..., Site], receiver: RecordingReceiver
) -> None:
    """4 SIGKILLs, 48 files (corrections, duplicates, poison among them), the receiver down for two runs."""
    site = make_site(mllp_destination(receiver.port, read_timeout=2.0))
    figures = run_chaos(site, receiver, files=48, kills=4, outage=(1, 3), seed=21)

    assert (48, 4) == (figures.files, figures.kills)


@pytest.mark.slow
def test_long_chaos(make_site: Callable[..., Site], receiver: RecordingReceiver) -> None:
    """100 SIGKILLs, 1,000 files, the receiver down for about 10 s: the same invariants (figures printed)."""
    site = make_site(mllp_destination(receiver.port, read_timeout=2.0))
    figures = run_chaos(site, receiver, files=1000, kills=100, outage=(40, 47), seed=2021)
    print(f"\nchaos figures: {figures}")

    assert (1000, 100) == (figures.files, figures.kills)
