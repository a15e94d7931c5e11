"""The audit's report folder (shell): ``findings.csv``, ``summary.json``, ``report.html``, NDJSON.

Owns the files and their shapes. ``findings.csv`` is written as rows arrive (in the walk's
order), then the findings across the archive (sorted); ``ndjson/<ResourceType>.ndjson`` holds
the clean sessions' resources for a bulk load (a Patient once), ``ndjson/quarantined.csv`` the
inputs left out and why. ``report.html`` is one self-contained page: no script, no network,
every text HTML-escaped, the plots drawn by matplotlib (Agg) as inline SVG.
"""

from __future__ import annotations

import csv
import html
import io
import json
import re
from collections.abc import Sequence
from pathlib import Path
from typing import IO, Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import orjson

from bridge.audit import stats
from bridge.audit.reduce import ArchiveReduce
from bridge.audit.rows import AuditFinding, Row
from bridge.display.check_report import CAUTION

_METADATA = re.compile(r"<metadata>.*?</metadata>", re.DOTALL)  # RDF names of the SVG writer: not needed
FINDINGS_HEADER = ("source", "test_id", "check", "severity", "message")
QUARANTINE_HEADER = ("file", "source", "test_id", "checks")


class ReportWriter:
    """Streams findings and NDJSON into the report folder, then writes the summary and the page."""

    def __init__(self, folder: Path, *, ndjson: bool) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        self.folder = folder
        self._findings_file = open(folder / "findings.csv", "w", newline="", encoding="utf-8")  # noqa: SIM115
        self._findings = csv.writer(self._findings_file, lineterminator="\n")
        self._findings.writerow(FINDINGS_HEADER)
        self._ndjson_folder = folder / "ndjson" if ndjson else None
        self._streams: dict[str, IO[bytes]] = {}
        self._patients: set[bytes] = set()
        self._quarantine: Any = None
        self._quarantine_file: IO[str] | None = None
        if self._ndjson_folder is not None:
            self._ndjson_folder.mkdir(exist_ok=True)
            self._quarantine_file = open(self._ndjson_folder / "quarantined.csv", "w", newline="", encoding="utf-8")  # noqa: SIM115
            self._quarantine = csv.writer(self._quarantine_file, lineterminator="\n")
            self._quarantine.writerow(QUARANTINE_HEADER)

    def add(self, rows: Sequence[Row], ndjson: Sequence[tuple[str, bytes]]) -> None:
        """Write one chunk's findings, its NDJSON lines and its quarantined inputs."""
        for row in rows:
            self._findings.writerows(_fields(f) for f in row.findings)
            if self._quarantine is not None and not row.clean:
                checks = " ".join(sorted({f.check for f in row.findings if f.severity == "error"}))
                self._quarantine.writerow((row.file, row.source, row.test_id, checks))
        for kind, lines in ndjson:
            self._write_ndjson(kind, lines)

    def _write_ndjson(self, kind: str, lines: bytes) -> None:
        assert self._ndjson_folder is not None
        if kind == "Patient":  # one patient may have sessions in many chunks: written once
            kept = []
            for line in lines.splitlines():
                key = orjson.loads(line)["id"].encode()
                if key not in self._patients:
                    self._patients.add(key)
                    kept.append(line + b"\n")
            lines = b"".join(kept)
        if not lines:
            return
        stream = self._streams.get(kind)
        if stream is None:
            stream = self._streams[kind] = open(self._ndjson_folder / f"{kind}.ndjson", "wb")  # noqa: SIM115
        stream.write(lines)

    def close_streams(self) -> None:
        """Close what is open (the findings across the archive are appended by :meth:`finish`)."""
        for stream in self._streams.values():
            stream.close()
        if self._quarantine_file is not None:
            self._quarantine_file.close()

    def finish(self, reduce: ArchiveReduce, archive: Sequence[AuditFinding]) -> dict[str, object]:
        """Append the archive's findings, write ``summary.json`` and ``report.html``; the summary."""
        self._findings.writerows(_fields(f) for f in archive)
        self._findings_file.close()
        summary = summarise(reduce)
        (self.folder / "summary.json").write_bytes(orjson.dumps(summary, option=orjson.OPT_INDENT_2) + b"\n")
        (self.folder / "report.html").write_text(page(summary, reduce), encoding="utf-8")
        return summary


def _fields(finding: AuditFinding) -> tuple[str, str, str, str, str]:
    return finding.source, finding.test_id, finding.check, finding.severity, finding.message


def summarise(reduce: ArchiveReduce) -> dict[str, object]:
    """The machine summary: counts by check, source and severity, and the agreement figures."""
    by_source: dict[str, dict[str, int]] = {}
    for (source, check), n in sorted(reduce.by_source.items()):
        by_source.setdefault(source, {})[check] = n
    agreement = stats.dlco_agreement(reduce.plots)
    return {
        "caution": CAUTION,
        "files": reduce.files,
        "skipped": reduce.skipped,
        "sessions_read": reduce.readable,
        "unreadable": reduce.files - reduce.readable,
        "clean": reduce.clean,
        "quarantined": reduce.files - reduce.clean,
        "findings": sum(reduce.by_check.values()),
        "findings_by_severity": dict(sorted(reduce.by_severity.items())),
        "findings_by_check": dict(sorted(reduce.by_check.items())),
        "findings_by_source": by_source,
        "dlco_reported_vs_recomputed": None
        if agreement is None
        else {
            "pairs": agreement.n,
            "bias": round(agreement.bias, 4),
            "lower_limit": round(agreement.lower, 4),
            "upper_limit": round(agreement.upper, 4),
            "unit": "mL/min/mmHg",
        },
    }


# ---------- the page ----------


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _cell(value: object, numeric: bool) -> str:
    return f'<td class="n">{_e(value)}</td>' if numeric else f"<td>{_e(value)}</td>"


def _table(headers: Sequence[str], rows: Sequence[Sequence[object]], numeric: frozenset[int] = frozenset()) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = "".join("<tr>" + "".join(_cell(c, i in numeric) for i, c in enumerate(r)) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body or '<tr><td>none</td></tr>'}</tbody></table>"


def _label(text: str) -> str:
    """Text for a plot: matplotlib reads ``$...$`` as mathematics, so dollars are escaped."""
    return text.replace("$", r"\$")


_RASTER_DPI = 150  # the scatter plots' points (rasterised): sharp enough on a screen, small in the page


def _svg(figure: Any) -> str:
    buffer = io.StringIO()
    no_metadata = {"Date": None, "Creator": None, "Format": None, "Type": None}  # the same bytes every run
    figure.savefig(buffer, format="svg", bbox_inches="tight", metadata=no_metadata, dpi=_RASTER_DPI)
    plt.close(figure)
    text = buffer.getvalue()
    return _METADATA.sub("", text[text.index("<svg") :])


def _plots(reduce: ArchiveReduce) -> list[tuple[str, str]]:
    """(title, inline SVG) for each plot that has data."""
    drawn: list[tuple[str, str]] = []
    with plt.rc_context({"svg.fonttype": "none", "svg.hashsalt": "dlco-bridge-audit", "font.size": 9}):
        agreement = stats.dlco_agreement(reduce.plots)
        if agreement is not None:
            figure, axes = plt.subplots(figsize=(6, 3.6))
            # The points as one embedded image, not an SVG element each: the page stays small
            # and quick to open however many sessions the archive holds.
            axes.scatter(agreement.mean, agreement.difference, s=6, alpha=0.5, rasterized=True)
            for y, style in ((agreement.bias, "-"), (agreement.lower, "--"), (agreement.upper, "--")):
                axes.axhline(y, linestyle=style, color="black", linewidth=0.8)
            axes.set_xlabel("mean of reported and recomputed DLCO (mL/min/mmHg)")
            axes.set_ylabel("reported − recomputed")
            title = f"Reported vs recomputed DLCO (Bland–Altman, n = {agreement.n})"
            drawn.append((title, _svg(figure)))
        kco, ratio = stats.kco_pairs(reduce.plots)
        if kco.size:
            figure, axes = plt.subplots(figsize=(6, 3.6))
            axes.scatter(ratio, kco, s=6, alpha=0.5, rasterized=True)
            low, high = float(min(ratio.min(), kco.min())), float(max(ratio.max(), kco.max()))
            axes.plot([low, high], [low, high], color="black", linewidth=0.8)
            axes.set_xlabel("DLCO / VA (mL/min/mmHg/L)")
            axes.set_ylabel("reported KCO (mL/min/mmHg/L)")
            drawn.append((f"Reported KCO vs DLCO/VA (n = {kco.size})", _svg(figure)))
        per_source = stats.percent_predicted(reduce.plots)
        if per_source:
            figure, axes = plt.subplots(figsize=(6, 0.9 + 0.45 * len(per_source)))
            labels = [_label(source) for source in per_source]
            axes.boxplot(
                list(per_source.values()), orientation="horizontal", tick_labels=labels, flierprops={"rasterized": True}
            )
            axes.set_xlabel("DLCO, % of the predicted value the lab reported")
            drawn.append(("DLCO % predicted per source", _svg(figure)))
        months, counts = stats.findings_by_month(reduce.plots)
        if months:
            figure, axes = plt.subplots(figsize=(6, 3.2))
            bottom = None
            for severity, values in counts.items():
                axes.bar(months, values, bottom=bottom, label=_label(severity))
                bottom = values if bottom is None else bottom + values
            axes.legend()
            axes.tick_params(axis="x", labelrotation=90)
            axes.set_ylabel("findings")
            drawn.append(("Findings per month of testing", _svg(figure)))
    return drawn


STYLE = """
body{font-family:system-ui,sans-serif;margin:2rem auto;padding:0 1rem;max-width:70rem;color:#222}
table{border-collapse:collapse;margin:.5rem 0 1.5rem;max-width:100%}
td,th{border:1px solid #ccc;padding:.2rem .5rem;text-align:left;vertical-align:top;overflow-wrap:break-word}
td.n{text-align:right}.caution{border:2px solid #a60;padding:.5rem 1rem;background:#fff6e5}
figure{margin:1rem 0}svg{max-width:100%;height:auto}
"""


def page(summary: dict[str, Any], reduce: ArchiveReduce) -> str:
    """The report page: headline counts, counts by check and by source, worst findings, plots."""
    headline = [
        ("files", summary["files"]),
        ("sessions read", summary["sessions_read"]),
        ("unreadable", summary["unreadable"]),
        ("clean (no error finding)", summary["clean"]),
        ("quarantined", summary["quarantined"]),
        ("findings", summary["findings"]),
    ]
    headline += [(f"findings: {severity}", n) for severity, n in summary["findings_by_severity"].items()]
    by_check = sorted(reduce.by_check.items(), key=lambda item: (-item[1], item[0]))
    by_source = sorted(((s, c, n) for (s, c), n in reduce.by_source.items()), key=lambda r: (r[0], -r[2], r[1]))
    worst = [(f.severity, f.check, f.source, f.test_id, name, f.message) for f, name in reduce.worst()]
    plots = "".join(f"<figure><figcaption>{_e(title)}</figcaption>{svg}</figure>" for title, svg in _plots(reduce))
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        # Nothing runs and nothing is fetched; the plots' points are images inside the page (data: URLs).
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; "
        'img-src data:">'
        f"<title>dlco-bridge audit</title><style>{STYLE}</style></head><body>"
        "<h1>Migration audit</h1>"
        f'<p class="caution">{_e(CAUTION)}</p>'
        f"<h2>In numbers</h2>{_table(('', 'count'), headline, frozenset({1}))}"
        f"<h2>Findings by check</h2>{_table(('check', 'count'), by_check, frozenset({1}))}"
        f"<h2>Findings by source</h2>{_table(('source', 'check', 'count'), by_source, frozenset({2}))}"
        f"<h2>Worst findings first (at most {len(worst)} shown; all in findings.csv)</h2>"
        f"{_table(('severity', 'check', 'source', 'test id', 'patient', 'message'), worst)}"
        f"<h2>Plots</h2>{plots or '<p>No data to plot.</p>'}"
        "</body></html>\n"
    )


def read_summary(folder: Path) -> dict[str, Any]:
    """The summary a run wrote (for tests and tools)."""
    loaded: dict[str, Any] = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
    return loaded
