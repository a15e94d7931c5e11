"""The report page in a real headless browser (Debian's chromium): it loads cleanly, opens with the answer, groups
findings by check with their meaning, draws plots a person can read, and patient data is text, never markup.

The checks read the page's own structure (the DOM Chromium builds, and the size of a screenshot at a desktop
width), never pixels.

``.ci/run`` installs chromium when it is missing; only where it cannot be installed are these tests skipped,
with a message saying so.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from collections.abc import Iterator
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import pytest

from bridge import __version__
from bridge.audit.page import SEVERITY_COLOURS, SEVERITY_WORDS, read_meanings
from bridge.audit.run import AuditSettings, run_audit
from tests.audit import planted
from tests.audit.conftest import JOB, NOW

CHROMIUM_FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--no-first-run", "--enable-logging=stderr", "--v=0",
)  # fmt: skip
DESKTOP_WIDTH = 1366  # a common laptop screen width, in CSS pixels (common practice)
# Chromium logs every console message of the page as INFO:CONSOLE (with --enable-logging=stderr).
CONSOLE = re.compile(r":CONSOLE[:(]")


def _chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        pytest.skip("chromium is not installed and could not be: the report page was not tested in a browser "
                    "(apt-get install -y chromium; .ci/run installs it)")  # fmt: skip
    return found


def load(page: Path, profile: Path) -> tuple[str, list[str]]:
    """The DOM after loading ``page`` in headless Chromium, and the page's console messages."""
    done = subprocess.run(
        [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--dump-dom", page.as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
        check=True,
    )
    return done.stdout, [line for line in done.stderr.splitlines() if CONSOLE.search(line)]


@dataclass
class Node:
    """One element of the DOM Chromium dumped: its tag, attributes, children and text."""

    tag: str
    attrs: dict[str, str]
    children: list[Node] = field(default_factory=list)
    texts: list[str] = field(default_factory=list)

    def text(self) -> str:
        return "".join(self.texts) + "".join(child.text() for child in self.children)

    def walk(self) -> Iterator[Node]:
        yield self
        for child in self.children:
            yield from child.walk()

    def find(self, tag: str | None = None, **attrs: str) -> list[Node]:
        """Every element below (and including) this one with the tag and the attribute values given (class: one of)."""
        found = []
        for node in self.walk():
            if tag is not None and node.tag != tag:
                continue
            if all((v in node.attrs.get("class", "").split()) if k == "cls" else node.attrs.get(k) == v
                   for k, v in attrs.items()):  # fmt: skip
                found.append(node)
        return found

    def by_id(self, id_: str) -> Node:
        (found,) = self.find(id=id_)
        return found

    def rows(self) -> list[list[str]]:
        """The text of each table row below, cell by cell."""
        return [[cell.text() for cell in row.children if cell.tag in ("td", "th")] for row in self.find("tr")]


VOID = {"meta", "br", "img", "hr", "input", "link", "image", "use", "path", "rect", "line", "stop", "circle"}


class Tree(HTMLParser):
    """The DOM as :class:`Node` s (void and self-closed elements have no children)."""

    def __init__(self) -> None:
        super().__init__()
        self.root = Node("#document", {})
        self._stack = [self.root]

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        node = Node(tag, {k: v or "" for k, v in attrs})
        self._stack[-1].children.append(node)
        if tag not in VOID:
            self._stack.append(node)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self._stack[-1].children.append(Node(tag, {k: v or "" for k, v in attrs}))

    def handle_endtag(self, tag: str) -> None:
        for depth in range(len(self._stack) - 1, 0, -1):
            if self._stack[depth].tag == tag:
                del self._stack[depth:]
                return

    def handle_data(self, data: str) -> None:
        self._stack[-1].texts.append(data)


def parse(dom: str) -> Node:
    tree = Tree()
    tree.feed(dom)
    return tree.root


def screenshot(page: Path, profile: Path, out: Path, width: int = DESKTOP_WIDTH) -> tuple[int, int]:
    """A screenshot of ``page`` at a desktop width; the PNG's width and height (from its IHDR header)."""
    subprocess.run(
        [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--hide-scrollbars",
         f"--window-size={width},2400", f"--screenshot={out}", page.as_uri()],
        capture_output=True, text=True, timeout=120, check=True,
    )  # fmt: skip
    header = out.read_bytes()[:24]
    # source: PNG specification (ISO/IEC 15948), 5.2 and 11.2.2: signature, then IHDR with width and height
    assert header[:8] == b"\x89PNG\r\n\x1a\n" and header[12:16] == b"IHDR"
    return int.from_bytes(header[16:20], "big"), int.from_bytes(header[20:24], "big")


@pytest.fixture(scope="module")
def loaded(report: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Node, list[str], str]:
    dom, console = load(report / "report.html", tmp_path_factory.mktemp("profile"))
    return parse(dom), console, dom


def test_the_console_check_sees_a_console_error(tmp_path: Path):
    """A page that writes to the console is caught by the scan (the check below can fail)."""
    page = tmp_path / "noisy.html"
    page.write_text("<!DOCTYPE html><html><body><script>console.error('planted-error')</script></body></html>")

    _, console = load(page, tmp_path / "profile")

    assert 1 == sum("planted-error" in line for line in console)


def test_the_page_loads_without_console_messages(loaded: tuple[Node, list[str], str]):
    """No console message at all: no error, no blocked resource, no refused style."""
    assert [] == loaded[1]


def test_the_page_opens_with_the_answer(loaded: tuple[Node, list[str], str]):
    """Right after the caution: how many records can migrate as they are, need a decision, cannot be read."""
    root = loaded[0]
    sections = root.find("section")
    tiles = {
        kind: root.by_id(f"answer-{kind}").find(cls="big")[0].text() for kind in ("ready", "decision", "unreadable")
    }

    assert "answer" == sections[0].attrs["id"]
    assert "not a medical device" in root.find("p", cls="caution")[0].text()
    assert {
        "ready": f"{planted.READY:,}",
        "decision": f"{planted.DECISION:,}",
        "unreadable": f"{planted.UNREADABLE:,}",
    } == tiles
    # the planted archive's scan.pdf is not an export: skipped by the folder rule, and said so
    assert "1 other file was skipped as not exports" in root.by_id("answer").text()


def test_the_page_says_how_the_run_was_made(loaded: tuple[Node, list[str], str], archive: Path):
    """The run's tool version, date, archive path and settings are on the page, in the second section."""
    root = loaded[0]
    rows = dict(tuple(row) for row in root.by_id("run").rows()[1:])

    assert "run" == root.find("section")[1].attrs["id"]
    assert (f"dlco-bridge {__version__}", NOW.isoformat(timespec="seconds"), str(archive)) == (
        rows["tool"],
        rows["date of the run"],
        rows["archive paths"],
    )
    assert ("traditional", "2.987", "none", "ndjson") == (
        rows["units of the hand-over"],
        rows["SI/traditional factor"],
        rows["blocking codes"],
        rows["hand-over"],
    )


def test_findings_are_grouped_by_check_with_meaning_count_and_examples(loaded: tuple[Node, list[str], str]):
    """One group per planted check: its count, the meaning and action from docs/findings.md, examples naming files."""
    root = loaded[0]
    meanings = read_meanings()
    problems = []
    for check, n in planted.PLANTED.items():
        group = root.by_id(f"check-{check}")
        said = group.find("p", cls="meaning")[0].text()
        examples = group.find("tbody")[0].rows()
        if group.find(cls="count")[0].text() != f"{n:,}":
            problems.append(f"{check}: count {group.find(cls='count')[0].text()}")
        if meanings[check].when not in said or meanings[check].action not in said:
            problems.append(f"{check}: meaning {said[:60]}")
        if not 1 <= len(examples) <= min(n, 3) or not all(row[0] for row in examples):
            problems.append(f"{check}: examples {examples}")

    assert [] == problems
    assert {f"check-{c}" for c in planted.PLANTED} == {s.attrs["id"] for s in root.find("section", cls="check")}


def test_every_severity_is_shown_in_words_and_its_colour(loaded: tuple[Node, list[str], str], report: Path):
    """Each group names its severity in words; the page's style gives each severity its colour."""
    badges = {node.text() for node in loaded[0].find("span", cls="sev")}
    text = (report / "report.html").read_text()

    assert {"error", "warning", "info"} == badges
    assert all(f".sev.{severity}{{background:{colour}" in text for severity, colour in SEVERITY_COLOURS.items())


def test_the_plots_have_axes_legends_and_readable_month_labels(loaded: tuple[Node, list[str], str]):
    """Four figures, each an SVG with both axis labels; legends name every line; at most 10 month labels."""
    root = loaded[0]
    texts = {f.attrs["id"]: " ".join(t.text() for t in f.find("text")) for f in root.find("figure")}
    month_ticks = [g for g in root.by_id("plot-by-month").find("g") if g.attrs.get("id", "").startswith("xtick_")]

    assert 4 == len(root.find("svg"))
    assert all(w in texts["plot-agreement"] for w in ("mean of reported", "reported − recomputed", "bias", "limits"))
    assert all(w in texts["plot-kco"] for w in ("DLCO / VA", "reported KCO", "KCO = DLCO / VA"))
    assert "% of the predicted value" in texts["plot-percent-predicted"]
    assert all(SEVERITY_WORDS[s] in texts["plot-by-month"] for s in ("error", "warning", "info"))
    assert 1 <= len(month_ticks) <= 10


def test_a_patient_name_with_a_script_tag_is_text(loaded: tuple[Node, list[str], str]):
    """The planted name <script>… is shown as text in an example; the page has no script element."""
    root = loaded[0]

    assert [] == root.find("script")
    assert any(planted.SCRIPT_NAME in cell for row in root.rows() for cell in row)


def test_the_page_at_a_desktop_width_is_that_wide(report: Path, tmp_path: Path):
    """A screenshot at 1366 px is 1366 px wide: nothing on the page forces a horizontal scroll."""
    assert DESKTOP_WIDTH == screenshot(report / "report.html", tmp_path / "profile", tmp_path / "page.png")[0]


def test_an_empty_plot_says_why(tmp_path: Path):
    """An archive of unreadable files: every plot is a note saying why it is empty, and the answer is all unreadable."""
    archive = tmp_path / "archive"
    archive.mkdir()
    (archive / "half.json").write_text('{"format": "dlco-result/1", "test_id"')
    run_audit([archive], tmp_path / "r", JOB, AuditSettings(workers=1))

    root = parse(load(tmp_path / "r" / "report.html", tmp_path / "profile")[0])
    notes = {f.attrs["id"]: [p.text() for p in f.find("p", cls="empty")] for f in root.find("figure")}

    assert (0, "1") == (len(root.find("svg")), root.by_id("answer-unreadable").find(cls="big")[0].text())
    assert {"plot-agreement", "plot-kco", "plot-percent-predicted", "plot-by-month"} == set(notes)
    assert all(len(n) == 1 and n[0].startswith("No ") for n in notes.values())


def test_the_page_needs_no_network(report: Path):
    """Nothing is fetched: no src attribute, no link element, no http(s) URL outside the SVG namespaces."""
    text = (report / "report.html").read_text()
    urls = set(re.findall(r"https?://[^\"' )]+", text)) - {"http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"}

    assert (0, 0, set()) == (text.count(" src="), text.count("<link"), urls)
