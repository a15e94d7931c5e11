"""The report folder of ``reconcile --report DIR``: ``reconcile.csv``, ``summary.json``, ``report.html`` (shell).

Owns the files and their shapes. ``reconcile.csv`` gets one row per verdict that is a gap (every
expected resource that is not present and equal, every unexpected one, every HL7 v2 message not
acknowledged AA), written as the verdicts come; ``summary.json`` the counts per destination and
class; ``report.html`` one self-contained page (no script, nothing fetched, every text
HTML-escaped) whose heading says whether the receiver is complete, then the counts and the rows
to act on (the first ``SHOWN`` of them; all are in the CSV). Without a folder, the verdicts are
only counted.
"""

from __future__ import annotations

import csv
import html
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import IO, Any

import orjson

from bridge.reconcile.engine import CLASSES, LABELS, Verdict

CSV_HEADER = ("destination", "class", "resource_type", "identifier_system", "identifier_value", "test_id", "lab",
              "message_id", "held", "detail")  # fmt: skip
SHOWN = 1000  # rows on the page


class ReportWriter:
    """Streams the gaps into ``reconcile.csv`` (when there is a folder) and keeps the first ones for the page."""

    def __init__(self, folder: Path | None) -> None:
        self.folder = folder
        self.shown: list[Verdict] = []
        self.gaps = 0
        self._file: IO[str] | None = None
        self._csv: Any = None
        if folder is not None:
            folder.mkdir(parents=True, exist_ok=True)
            self._file = open(folder / "reconcile.csv", "w", newline="", encoding="utf-8")  # noqa: SIM115
            self._csv = csv.writer(self._file, lineterminator="\n")
            self._csv.writerow(CSV_HEADER)

    def add(self, verdict: Verdict) -> None:
        if not verdict.gap:
            return
        self.gaps += 1
        if len(self.shown) < SHOWN:
            self.shown.append(verdict)
        if self._csv is not None:
            self._csv.writerow(row(verdict))

    def finish(self, summary: Mapping[str, Any]) -> None:
        """Close the CSV; write ``summary.json`` and ``report.html``."""
        if self._file is not None:
            self._file.close()
        if self.folder is None:
            return
        (self.folder / "summary.json").write_bytes(orjson.dumps(summary, option=orjson.OPT_INDENT_2) + b"\n")
        (self.folder / "report.html").write_text(page(summary, self.shown), encoding="utf-8")

    def close(self) -> None:
        if self._file is not None and not self._file.closed:
            self._file.close()


def row(verdict: Verdict) -> tuple[str, ...]:
    """One line of ``reconcile.csv``."""
    return (verdict.destination, verdict.verdict, verdict.resource_type, verdict.identifier_system,
            verdict.identifier_value, verdict.test_id, verdict.lab, verdict.message_id, " ".join(verdict.held_ids),
            verdict.detail)  # fmt: skip


def headline(summary: Mapping[str, Any]) -> str:
    """The first words of the page (and of the terminal's last line): complete or not, and how many gaps."""
    if summary["complete"]:
        return "Receiver complete: every result sent is held once, with the values sent"
    gaps = summary["gaps"]
    return f"Receiver NOT complete: {gaps} gap{'' if gaps == 1 else 's'} to act on"


# ---------- the page ----------

STYLE = """
body{font-family:system-ui,sans-serif;margin:2rem auto;padding:0 1rem;max-width:76rem;color:#222}
table{border-collapse:collapse;margin:.5rem 0 1.5rem;max-width:100%}
td,th{border:1px solid #ccc;padding:.2rem .5rem;text-align:left;vertical-align:top;overflow-wrap:anywhere}
td.n{text-align:right}.complete{color:#064}.gaps{color:#a00}
"""


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _cell(value: object, numeric: bool) -> str:
    return f'<td class="n">{_e(value)}</td>' if numeric else f"<td>{_e(value)}</td>"


def _table(headers: Sequence[str], rows: Sequence[Sequence[object]], numeric: frozenset[int] = frozenset()) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = "".join("<tr>" + "".join(_cell(c, i in numeric) for i, c in enumerate(r)) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body or '<tr><td>none</td></tr>'}</tbody></table>"


def page(summary: Mapping[str, Any], shown: Sequence[Verdict]) -> str:
    """The page: complete or not, the counts per destination and class, the rows to act on, how it was checked."""
    destinations = summary["destinations"]
    counts = [(d["name"], LABELS[name], n) for d in destinations for name in CLASSES if (n := d["counts"].get(name))]
    how = [
        (d["name"], d["kind"], d["address"], d["unexpected"], d["searches"], d["waits"]) for d in destinations
    ]  # fmt: skip
    rows = [(v.destination, LABELS[v.verdict], v.resource_type, v.identifier_value, v.test_id, " ".join(v.held_ids),
             v.detail) for v in shown]  # fmt: skip
    cls = "complete" if summary["complete"] else "gaps"
    more = f" (the first {len(shown)}; all {summary['gaps']} in reconcile.csv)" if summary["gaps"] > len(shown) else ""
    notes = "".join(f"<li>{_e(note)}</li>" for note in summary.get("notes", []))
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'\">"
        f"<title>{_e(headline(summary))}</title><style>{STYLE}</style></head><body>"
        f'<h1 class="{cls}">{_e(headline(summary))}</h1>'
        f"<p>{_e(summary['form'])} form, checked {_e(summary['checked_at'])}: {summary['expected']} resources and "
        f"messages expected on {len(destinations)} destination(s); {summary['gaps']} gap(s).</p>"
        f"{'<ul>' + notes + '</ul>' if notes else ''}"
        f"<h2>In numbers</h2>{_table(('destination', 'class', 'count'), counts, frozenset({2}))}"
        f"<h2>Rows to act on{_e(more)}</h2>"
        f"{_table(('destination', 'class', 'resource', 'identifier', 'test id', 'held', 'detail'), rows)}"
        "<h2>How it was checked</h2>"
        f"{_table(('destination', 'kind', 'address', 'unexpected resources', 'requests', 'waits'), how)}"
        "</body></html>\n"
    )
