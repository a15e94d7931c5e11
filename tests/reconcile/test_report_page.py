"""reconcile's ``report.html`` in a real headless browser (Debian's chromium), as the audit page is tested.

Its first lines say whether the receiver is complete; then the counts and the rows to act on;
it loads without a console message or a fetch, and what the server holds is text, never markup.
``.ci/run`` installs chromium when it is missing; only where it cannot be are these tests skipped.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from bridge import cli
from tests.audit.test_report_page import Node, load, parse

MARKUP = "<script>document.title='x'</script>"


def _page(report: Path, profile: Path) -> tuple[Node, list[str], str]:
    dom, console = load(report / "report.html", profile)
    return parse(dom), console, dom


def _first_heading(dom: str) -> str:
    found = re.search(r"<h1[^>]*>(.*?)</h1>", dom, re.DOTALL)
    assert found is not None
    return found.group(1)


def _report_of(feed: Any, *flags: str) -> Path:
    report = feed.root / "page-report"
    cli.main(["reconcile", "--config", str(feed.config), "--report", str(report), *flags])
    return report


def test_a_complete_receiver_says_so_first(make_feed: Any, tmp_path: Path):
    """A feed held as sent: the page's first heading says the receiver is complete; no console message."""
    feed = make_feed(1)

    page, console, dom = _page(_report_of(feed), tmp_path / "profile")

    assert _first_heading(dom).startswith("Receiver complete")
    assert [] == console
    assert ["none"] in page.rows()  # no rows to act on


def test_gaps_are_counted_and_listed_and_held_text_stays_text(make_feed: Any, tmp_path: Path):
    """Lost and altered results: the heading counts the gaps, the counts table and the rows say which; a held
    status carrying a script tag is shown as text and the page has no script element and fetches nothing."""
    feed = make_feed(2)
    values = feed.observations()
    lost, odd = values[0], values[30]
    item = next(r for r in feed.store.all() if r.type == "Observation" and r.body["identifier"][0]["value"] == odd)
    feed.store.change(item, {**{k: v for k, v in item.body.items() if k not in ("id", "meta")}, "status": MARKUP})
    assert 0 == cli.main(["stand-in", "--folder", str(feed.root / "stand-in"), "--lose", lost])

    report = _report_of(feed, "--destination", "fhir-store")
    page, console, dom = _page(report, tmp_path / "profile")

    assert "Receiver NOT complete: 2 gaps to act on" == _first_heading(dom)
    rows = {tuple(row) for row in page.rows()}
    assert {("fhir-store", "missing", "1"), ("fhir-store", "different", "1")} <= rows
    listed = {(row[1], row[3]) for row in page.rows() if len(row) == 7}
    assert {("missing", lost), ("different", odd)} <= listed
    assert any(MARKUP in cell for row in page.rows() for cell in row)
    assert ([], []) == (page.find("script"), console)
    assert not re.search(r"(src|href)=", (report / "report.html").read_text())
