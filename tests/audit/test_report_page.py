"""The report page in a real headless browser (Debian's chromium): it loads cleanly, shows the counts and plots,
and patient data is text, never markup.

``.ci/run`` installs chromium when it is missing; only where it cannot be installed are these tests skipped,
with a message saying so.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest

from tests.audit import planted

CHROMIUM_FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--no-first-run", "--enable-logging=stderr", "--v=0",
)  # fmt: skip
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


class Cells(HTMLParser):
    """The text of every table row of a DOM, row by row, and the names of every element."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self.elements: list[str] = []
        self._cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.elements.append(tag)
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append("".join(self._cell))
            self._cell = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)


@pytest.fixture(scope="module")
def loaded(report: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Cells, list[str], str]:
    dom, console = load(report / "report.html", tmp_path_factory.mktemp("profile"))
    cells = Cells()
    cells.feed(dom)
    return cells, console, dom


def test_the_console_check_sees_a_console_error(tmp_path: Path):
    """A page that writes to the console is caught by the scan (the check below can fail)."""
    page = tmp_path / "noisy.html"
    page.write_text("<!DOCTYPE html><html><body><script>console.error('planted-error')</script></body></html>")

    _, console = load(page, tmp_path / "profile")

    assert 1 == sum("planted-error" in line for line in console)


def test_the_page_loads_without_console_messages(loaded: tuple[Cells, list[str], str]):
    """No console message at all: no error, no blocked resource, no refused style."""
    assert [] == loaded[1]


def test_the_page_shows_the_counts_by_check(loaded: tuple[Cells, list[str], str]):
    """The table of counts by check holds every planted check with its planted count."""
    rows = {tuple(row) for row in loaded[0].rows}

    assert {(check, str(n)) for check, n in planted.PLANTED.items()} <= rows


def test_the_page_renders_four_plots(loaded: tuple[Cells, list[str], str]):
    """Bland–Altman, KCO vs DLCO/VA, % predicted per source and findings per month are inline SVGs."""
    assert 4 == loaded[0].elements.count("svg")


def test_a_patient_name_with_a_script_tag_is_text(loaded: tuple[Cells, list[str], str]):
    """The planted name <script>… is shown as text in the worst-findings table; the page has no script element."""
    cells, _, _ = loaded

    assert [] == [tag for tag in cells.elements if tag == "script"]
    assert any(planted.SCRIPT_NAME in cell for row in cells.rows for cell in row)


def test_the_page_needs_no_network(report: Path):
    """Nothing is fetched: no src attribute, no link element, no http(s) URL outside the SVG namespaces."""
    text = (report / "report.html").read_text()
    urls = set(re.findall(r"https?://[^\"' )]+", text)) - {"http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"}

    assert (0, 0, set()) == (text.count(" src="), text.count("<link"), urls)
