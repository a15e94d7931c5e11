"""``reconcile --config``, the feed form, against the stand-in: it reports exactly the damage planted."""

from __future__ import annotations

import json
import sqlite3
from decimal import Decimal
from typing import Any

from bridge import cli
from tests.reconcile.conftest import SENT, Feed, session


def _gaps(rows: list[dict[str, str]]) -> set[tuple[str, str]]:
    return {(row["class"], row["identifier_value"]) for row in rows}


def _fhir_counts(summary: dict[str, Any]) -> dict[str, int]:
    return next(d["counts"] for d in summary["destinations"] if d["name"] == "fhir-store")


def _plant(feed: Feed, *flags: str) -> int:
    """Damage the stand-in's store with its documented options (``stand-in --folder DIR --lose VALUE`` ...)."""
    return cli.main(["stand-in", "--folder", str(feed.root / "stand-in"), *flags])


def test_a_complete_feed_is_complete(make_feed: Any):
    """Every resource the stand-in holds is present and equal; each HL7 message was answered AA: exit 0."""
    feed = make_feed(3)
    held = len(feed.store.all())  # Observations, reports and Provenances the stand-in created

    code, rows, summary = feed.reconcile()

    assert (0, [], True) == (code, rows, summary["complete"])
    assert {"present": held} == _fhir_counts(summary)
    assert {"hl7-aa": 3} == next(d["counts"] for d in summary["destinations"] if d["name"] == "records")


def test_lost_altered_duplicated_withdrawn_and_extra_are_reported_exactly(make_feed: Any):
    """Two lost, two altered, one duplicated, one withdrawn, one extra: exactly those seven rows, exit 1."""
    feed = make_feed(6)
    obs = feed.observations()
    lost, altered, duplicated, withdrawn, extra = (obs[0], obs[31]), (obs[3], obs[70]), obs[50], obs[90], obs[95]
    before = {v: r.body["valueQuantity"]["value"] for r in feed.store.all() if (v := _value(r.body)) in altered}

    assert 0 == _plant(
        feed,
        "--lose",
        lost[0],
        "--lose",
        lost[1],
        "--alter",
        altered[0],
        "--alter",
        altered[1],
        "--duplicate",
        duplicated,
        "--withdraw",
        withdrawn,
        "--extra",
        extra,
    )
    code, rows, summary = feed.reconcile()

    assert 1 == code
    assert {
        ("missing", lost[0]),
        ("missing", lost[1]),
        ("different", altered[0]),
        ("different", altered[1]),
        ("duplicated", duplicated),
        ("withdrawn", withdrawn),
        ("unexpected", f"{extra}-extra"),
    } == _gaps(rows)
    # "alter" adds one in the last digit of the held value: 10.14 is held as 10.15, 97 as 98 (worked by hand:
    # the step is 10 ** exponent of the value's shortest decimal form).
    for value in altered:
        sent = Decimal(repr(before[value]))
        held = sent + Decimal(1).scaleb(sent.as_tuple().exponent)  # type: ignore[arg-type]
        detail = next(r["detail"] for r in rows if r["identifier_value"] == value)
        assert f"value: sent {sent}, held {held}" == detail
    assert 7 == summary["gaps"]


def test_a_patient_the_bundles_create_is_expected_once_and_found_by_identifier(make_feed: Any):
    """patient_reference = conditional-create: two sessions of one patient expect the Patient once; lost, missing."""
    feed = make_feed(2, emit='patient_reference = "conditional-create"\n')
    feed.send(session(SENT[2], 2).replace(b"FICT-RC0002", b"FICT-RC0000"), "rc-0002.json")  # RC-0000's patient
    patients = [r for r in feed.store.all() if r.type == "Patient"]

    complete = feed.reconcile("--destination", "fhir-store")
    _plant(feed, "--lose", "FICT-RC0000")
    code, rows, _ = feed.reconcile("--destination", "fhir-store")

    # source: FHIR R4 http.html#ccreate: a second conditional create of the same identifier creates nothing
    assert (2, 0) == (len(patients), complete[0])
    assert (1, {("missing", "FICT-RC0000")}) == (code, _gaps(rows))


def test_a_correction_whose_old_content_came_back_is_superseded(make_feed: Any):
    """The server holds the pre-correction body again (an older interface overwrote it): superseded, not different."""
    feed = make_feed(1)
    va = next(r for r in feed.store.all() if _value(r.body).endswith(".va"))
    original = dict(va.body)
    document = json.loads(SENT[0].read_bytes())
    document.update(test_id="RC-0000", patient={**document["patient"], "id": "FICT-RC0000"})
    document["results"]["va"]["value"] = round(document["results"]["va"]["value"] + 0.4, 2)  # the lab's correction
    feed.send(json.dumps(document).encode(), "rc-0000-corrected.json")
    corrected = next(r for r in feed.store.all() if r.id == va.id)
    feed.store.change(corrected, {k: v for k, v in original.items() if k not in ("id", "meta")})

    code, rows, _ = feed.reconcile()

    # source: FHIR R4 ValueSet observation-status: "corrected" follows "final" when a result is amended
    assert ("final", "corrected") == (original["status"], corrected.body["status"])
    assert {("superseded", _value(va.body))} == _gaps(rows)
    assert 1 == code


def test_hl7_answers_are_listed_from_the_ledger(make_feed: Any):
    """An HL7 v2 destination is not asked: its messages are listed as AA, AE or never acknowledged."""
    feed = make_feed(2)
    feed.mllp.answer = "AE"
    feed.send(session(SENT[2], 2), "rc-0002.json")  # answered AE: dead-lettered
    feed.mllp.stop()
    feed.transports["records"].close()  # its open connection goes too: the next message finds nobody
    feed.send(session(SENT[3], 3), "rc-0003.json")  # nobody listening: still pending

    code, rows, summary = feed.reconcile("--destination", "records")

    assert 1 == code
    assert {("hl7-ae", "RC-0002"), ("hl7-never", "RC-0003")} == {(r["class"], r["test_id"]) for r in rows}
    assert {"hl7-aa": 2, "hl7-ae": 1, "hl7-never": 1} == summary["counts"]


def test_since_checks_only_what_was_sent_since_and_finds_nothing_unexpected(make_feed: Any):
    """--since tomorrow expects nothing and looks for nothing unexpected; --since yesterday expects everything."""
    feed = make_feed(1)
    _plant(feed, "--extra", feed.observations()[0])

    later = feed.reconcile("--since", "2999-01-01", "--destination", "fhir-store")
    earlier = feed.reconcile("--since", "2000-01-01T00:00:00+01:00", "--destination", "fhir-store")

    assert (0, [], {}) == (later[0], later[1], later[2]["counts"])
    assert "--since" in later[2]["destinations"][0]["unexpected"]
    assert (0, len(feed.store.all()) - 1) == (earlier[0], earlier[2]["counts"]["present"])


def test_pruned_payloads_are_still_reconciled_from_the_ledgers_record_of_what_was_sent(make_feed: Any):
    """prune removes every delivered payload: what was sent is still known resource by resource, all found: exit 0."""
    feed = make_feed(2)
    held = len(feed.store.all())
    feed.ledger.prune(0.0, 3650.0)  # every delivered payload goes; the record of what was sent stays

    code, rows, summary = feed.reconcile("--destination", "fhir-store")

    assert (0, [], {"present": held}) == (code, rows, summary["counts"])


def test_an_older_ledgers_pruned_message_is_unchecked_and_nothing_is_called_unexpected(make_feed: Any):
    """A message delivered before the ledger kept its record of what was sent, its payload pruned: one unchecked
    row per test id, and no scan for unexpected resources (what was sent is not fully known)."""
    feed = make_feed(2)
    with sqlite3.connect(feed.root / "state" / "ledger.sqlite3") as older:
        older.execute("DELETE FROM sent_resources")  # as a ledger from before the record existed
    feed.ledger.prune(0.0, 3650.0)

    code, rows, summary = feed.reconcile("--destination", "fhir-store")

    assert 1 == code
    assert {("unchecked", "RC-0000"), ("unchecked", "RC-0001")} == {(r["class"], r["test_id"]) for r in rows}
    assert "pruned" in summary["destinations"][0]["unexpected"]


def test_a_search_the_server_refuses_stops_the_check_with_exit_2(make_feed: Any, capsys: Any):
    """A base URL under which the server searches nothing (404): the check could not run, exit 2, no report."""
    feed = make_feed(1)
    wrong = feed.config.read_text().replace(feed.fhir.url, feed.fhir.url.removesuffix("/fhir") + "/elsewhere")
    feed.config.write_text(wrong)

    code = cli.main(["reconcile", "--config", str(feed.config), "--destination", "fhir-store"])

    assert 2 == code
    assert "could not run" in capsys.readouterr().err


def test_an_unknown_destination_is_a_setup_failure(make_feed: Any, capsys: Any):
    """--destination naming none of the configuration's: exit 2, the key and the known names said."""
    feed = make_feed(1)

    code = cli.main(["reconcile", "--config", str(feed.config), "--destination", "nowhere"])

    assert 2 == code
    assert "--destination" in capsys.readouterr().err


def _value(body: dict[str, Any]) -> str:
    identifiers = body.get("identifier") or []
    return str(identifiers[0]["value"]) if identifiers else ""
