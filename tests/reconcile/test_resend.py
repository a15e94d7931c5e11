"""``reconcile --resend``: the lost and altered results healed through the outbox, duplicates left alone, once."""

from __future__ import annotations

import json
from typing import Any

from bridge import cli
from bridge.reconcile.bundles import parse_bundle, resend_bundle
from tests.fhir_schema import bundle_errors, shared_validators
from tests.reconcile.conftest import SENT, Feed


def _plant(feed: Feed, *flags: str) -> None:
    assert 0 == cli.main(["stand-in", "--folder", str(feed.root / "stand-in"), *flags])


def _gaps(rows: list[dict[str, str]]) -> set[tuple[str, str]]:
    return {(row["class"], row["identifier_value"]) for row in rows}


def _find(feed: Feed, ending: str) -> str:
    """The identifier value of the Observation whose value ends with ``ending`` (test id and quantity)."""
    return next(value for value in feed.observations() if value.endswith("." + ending))


def _pending(feed: Feed) -> int:
    return feed.ledger.summary().destinations["fhir-store"].pending


def test_resend_heals_the_lost_and_altered_and_leaves_the_duplicate_and_the_extra(make_feed: Any):
    """Five results, two lost, two altered, one duplicated, one extra: after --resend and delivery only the
    duplicate and the extra are left, and the duplicated session was not resent."""
    feed = make_feed(5)
    lost = (_find(feed, "RC-0000.dlco"), _find(feed, "RC-0001.va"))
    altered = (_find(feed, "RC-0002.kco"), _find(feed, "RC-0003.va"))
    duplicated, extra = _find(feed, "RC-0004.dlco"), _find(feed, "RC-0000.kco")
    _plant(feed, "--lose", lost[0], "--lose", lost[1], "--alter", altered[0], "--alter", altered[1],
           "--duplicate", duplicated, "--extra", extra)  # fmt: skip

    code, rows, summary = feed.reconcile("--destination", "fhir-store", "--resend")
    queued = _pending(feed)
    feed.deliver()
    healed_code, healed_rows, _ = feed.reconcile("--destination", "fhir-store")

    assert 1 == code
    assert {("missing", lost[0]), ("missing", lost[1]), ("different", altered[0]), ("different", altered[1]),
            ("duplicated", duplicated), ("unexpected", f"{extra}-extra")} == _gaps(rows)  # fmt: skip
    sessions = {v.split(".")[1] for v in (*lost, *altered)}  # the test ids resent (one message each)
    assert (len(sessions), 0) == (queued, _pending(feed))
    resent = summary["resend"]["fhir-store"]
    assert (len(sessions), [duplicated.split(".")[1]]) == (
        resent["queued"],
        [m.split(".")[0] for m in resent["duplicated"]],
    )
    assert (1, {("duplicated", duplicated), ("unexpected", f"{extra}-extra")}) == (healed_code, _gaps(healed_rows))


def test_resend_twice_queues_once_and_a_healed_feed_queues_nothing(make_feed: Any):
    """--resend twice before the service delivers: one message; once healed, --resend finds nothing to queue."""
    feed = make_feed(2)
    _plant(feed, "--lose", feed.observations()[2])

    feed.reconcile("--resend")
    feed.reconcile("--resend")
    twice = _pending(feed)
    feed.deliver()
    code, rows, summary = feed.reconcile("--resend")

    assert 1 == twice
    assert (0, [], 0) == (code, rows, _pending(feed))
    assert {"queued": 0, "requeued": 0, "pending": 0, "duplicated": [], "pruned": []} == summary["resend"]["fhir-store"]


def test_a_gap_that_comes_back_after_healing_makes_the_same_message_pending_again(make_feed: Any):
    """Healed, then lost again the same way: the same healing message is made pending again, not a new one."""
    feed = make_feed(1)
    lost = feed.observations()[0]
    _plant(feed, "--lose", lost)
    feed.reconcile("--resend")
    feed.deliver()
    _plant(feed, "--lose", lost)

    _, _, summary = feed.reconcile("--resend")

    assert (0, 1, 1) == (summary["resend"]["fhir-store"]["queued"], summary["resend"]["fhir-store"]["requeued"],
                         _pending(feed))  # fmt: skip


def test_a_superseded_correction_is_sent_again_as_a_conditional_update(make_feed: Any):
    """The server fell back to the pre-correction content: --resend puts the correction back."""
    feed = make_feed(1)
    va = next(
        r for r in feed.store.all() if r.type == "Observation" and r.body["identifier"][0]["value"].endswith(".va")
    )
    original = {k: v for k, v in va.body.items() if k not in ("id", "meta")}
    document = json.loads(SENT[0].read_bytes())
    document.update(test_id="RC-0000", patient={**document["patient"], "id": "FICT-RC0000"})
    document["results"]["va"]["value"] = round(document["results"]["va"]["value"] + 0.4, 2)
    feed.send(json.dumps(document).encode(), "rc-0000-corrected.json")
    feed.store.change(next(r for r in feed.store.all() if r.id == va.id), original)

    first, _, _ = feed.reconcile("--destination", "fhir-store", "--resend")
    feed.deliver()
    code, rows, _ = feed.reconcile("--destination", "fhir-store")

    held = next(r for r in feed.store.all() if r.id == va.id).body
    assert (1, 0, [], "corrected") == (first, code, rows, held["status"])


def test_the_healing_bundle_is_a_valid_transaction_with_the_right_requests(make_feed: Any):
    """Missing: conditional create as sent; different: conditional update on the same search; the report too."""
    feed = make_feed(1)
    row = feed.ledger.latest_per_test("fhir-store", delivered_only=True)[0]
    bundle = parse_bundle(row.payload)
    keys = [(e["resource"]["resourceType"], e["resource"]["identifier"][0]["system"],
             e["resource"]["identifier"][0]["value"]) for e in bundle["entry"][:3]]  # fmt: skip

    healed = json.loads(resend_bundle(bundle, create=[keys[0]], update=[keys[1]]))

    # source: FHIR R4 http.html#transaction (conditional create: POST with ifNoneExist; conditional
    # update: PUT [type]?[search]); the official R4 JSON schema
    requests = {e["resource"]["resourceType"] + ":" + e["resource"].get("identifier", [{}])[0].get("value", "-"):
                e["request"] for e in healed["entry"]}  # fmt: skip
    sent = {e["resource"]["resourceType"] + ":" + e["resource"].get("identifier", [{}])[0].get("value", "-"):
            e["request"] for e in bundle["entry"]}  # fmt: skip
    obs_create, obs_update, untouched = (f"Observation:{k[2]}" for k in keys)
    report = next(k for k in requests if k.startswith("DiagnosticReport:"))
    assert [] == bundle_errors(healed, shared_validators())
    assert sent[obs_create] == requests[obs_create]
    assert {"method": "PUT", "url": "Observation?" + sent[obs_update]["ifNoneExist"]} == requests[obs_update]
    assert {"method": "PUT", "url": "DiagnosticReport?" + sent[report]["ifNoneExist"]} == requests[report]
    assert sent[untouched] == requests[untouched]
