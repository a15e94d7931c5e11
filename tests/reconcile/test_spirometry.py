"""``reconcile`` expects the whole report: the spirometry panels and their members of samples/10 (issue 25.4).

A session with spirometry goes through the service's intake and delivery to the stand-in (FHIR and
MLLP, tests/reconcile/conftest.py); reconcile then finds every resource held, spirometry included,
and a spirometry member the stand-in lost is reported missing.
"""

from __future__ import annotations

from typing import Any

from bridge import cli
from tests.conftest import SAMPLES
from tests.reconcile.conftest import Feed, session

SAMPLE = SAMPLES / "10-spirometry-and-dlco.json"


def _spirometry(feed: Feed) -> dict[str, dict[str, Any]]:
    """The stand-in's spirometry Observations by identifier value: the two panels and their members."""
    held = {r.reference: r.body for r in feed.store.all() if r.type == "Observation"}
    panels = [body for body in held.values() if "hasMember" in body]
    members = [held[m["reference"]] for panel in panels for m in panel["hasMember"]]
    return {body["identifier"][0]["value"]: body for body in [*panels, *members]}


def _fhir(summary: dict[str, Any]) -> dict[str, int]:
    return next(d["counts"] for d in summary["destinations"] if d["name"] == "fhir-store")


def test_a_session_with_spirometry_is_held_whole(make_feed: Any):
    """Every resource the stand-in holds for sample 10, the two panels and their members among them, is present."""
    feed = make_feed(0)
    feed.send(session(SAMPLE, 10), "rc-0010.json")
    spirometry = _spirometry(feed)

    code, rows, summary = feed.reconcile()

    # source: FHIR R4 Observation.hasMember: the panels name their members; sample 10 has a pre and a post panel
    assert 2 == sum("hasMember" in body for body in spirometry.values())
    assert len(spirometry) > 2 + 10  # at least FEV1, FVC, FEV1/FVC, FEF25-75 and PEF in each phase
    assert (0, [], {"present": len(feed.store.all())}) == (code, rows, _fhir(summary))


def test_a_lost_spirometry_member_is_missing(make_feed: Any):
    """The stand-in loses the pre-bronchodilator FEV1 (its documented --lose): reconcile reports it missing, exit 1."""
    feed = make_feed(0)
    feed.send(session(SAMPLE, 10), "rc-0010.json")
    fev1 = next(v for v, body in _spirometry(feed).items() if body["code"]["text"] == "FEV1 --pre bronchodilation")

    assert 0 == cli.main(["stand-in", "--folder", str(feed.root / "stand-in"), "--lose", fev1])
    code, rows, _ = feed.reconcile()

    assert (1, [("missing", fev1)]) == (code, [(r["class"], r["identifier_value"]) for r in rows])
