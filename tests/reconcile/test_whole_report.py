"""``reconcile`` expects the whole report of samples/11: spirometry, static lung volumes and DLCO (issue 25).

The session goes through the service's intake and delivery to the stand-in (FHIR and MLLP,
tests/reconcile/conftest.py); reconcile then finds every resource held, all three groups' panels and
their members included, and a lung-volume member the stand-in lost is reported missing.
"""

from __future__ import annotations

from typing import Any

from bridge import cli
from tests.conftest import SAMPLES
from tests.reconcile.conftest import Feed, session

SAMPLE = SAMPLES / "11-whole-report.json"
PANELS = {"Spirometry before bronchodilator", "Spirometry after bronchodilator", "Static lung volumes"}


def _panels(feed: Feed) -> dict[str, list[dict[str, Any]]]:
    """The stand-in's panels by their text, each with the members it names as the stand-in holds them."""
    held = {r.reference: r.body for r in feed.store.all() if r.type == "Observation"}
    return {
        body["code"]["text"]: [held[m["reference"]] for m in body["hasMember"]]
        for body in held.values()
        if "hasMember" in body
    }


def _fhir(summary: dict[str, Any]) -> dict[str, int]:
    return next(d["counts"] for d in summary["destinations"] if d["name"] == "fhir-store")


def test_the_whole_report_is_held_whole(make_feed: Any):
    """Every resource the stand-in holds for sample 11, the three panels and all their members among them, is
    present; the DLCO Observation is held beside them."""
    feed = make_feed(0)
    feed.send(session(SAMPLE, 11), "rc-0011.json")
    panels = _panels(feed)
    held = [r.body for r in feed.store.all() if r.type == "Observation"]

    code, rows, summary = feed.reconcile()

    # source: FHIR R4 Observation.hasMember: each panel names its members, all of them held
    assert PANELS == set(panels)
    # TLC, FRC, RV, VC, RV/TLC, IC and ERV in the sample, each with at least its predicted value beside it
    assert len(panels["Static lung volumes"]) >= 2 * 7
    # source: LOINC 19911-7 Diffusion capacity.carbon monoxide
    assert any(c["code"] == "19911-7" for body in held for c in body["code"]["coding"])
    assert (0, [], {"present": len(feed.store.all())}) == (code, rows, _fhir(summary))


def test_a_lost_lung_volume_member_is_missing(make_feed: Any):
    """The stand-in loses the TLC (its documented --lose): reconcile reports it missing, exit 1."""
    feed = make_feed(0)
    feed.send(session(SAMPLE, 11), "rc-0011.json")
    # source: LOINC 19862-2 Total lung capacity
    tlc = next(
        body["identifier"][0]["value"]
        for body in _panels(feed)["Static lung volumes"]
        if any(c["code"] == "19862-2" for c in body["code"]["coding"])
    )

    assert 0 == cli.main(["stand-in", "--folder", str(feed.root / "stand-in"), "--lose", tlc])
    code, rows, _ = feed.reconcile()

    assert (1, [("missing", tlc)]) == (code, [(r["class"], r["identifier_value"]) for r in rows])
