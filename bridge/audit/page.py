"""The audit's page (shell: reads ``docs/findings.md``, draws with matplotlib): ``report.html``.

Owns the page's order and words: the answer first (how many records can migrate as they are,
need a decision, cannot be read; the run's settings, paths, version and date), then the
findings grouped by check, each with what it means and what to do (the code tables of
``docs/findings.md``, read here: the one place that text is written), its count and a few
examples naming their files, then counts by source and four plots. One self-contained page: no
script, no network, every text HTML-escaped, the plots drawn by matplotlib (Agg) as inline SVG
with the points of the scatter plots as one embedded image each.
"""

from __future__ import annotations

import html
import io
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates
import matplotlib.pyplot as plt
import numpy as np

from bridge.audit import stats
from bridge.audit.reduce import ArchiveReduce
from bridge.audit.rows import SEVERITY_RANK
from bridge.display.check_report import CAUTION

_METADATA = re.compile(r"<metadata>.*?</metadata>", re.DOTALL)  # RDF names of the SVG writer: not needed
_PACKAGE_DIR = Path(__file__).resolve().parent.parent  # bridge/
# The meaning of each severity, in the page's words and colours (colour-blind-safe, with the word beside it).
SEVERITY_COLOURS = {"error": "#b2182b", "warning": "#e08214", "info": "#4575b4"}
SEVERITY_WORDS = {
    "error": "error: kept out of the hand-over unless the site allows the code",
    "warning": "warning: migrates, with the finding in its notes",
    "info": "info: for the record",
}
CLIP_PERCENTILES = (1.0, 99.0)  # the plots show the bulk of the data; values beyond are counted, not drawn
_RASTER_DPI = 150  # the scatter plots' points (rasterised): sharp enough on a screen, small in the page


@dataclass(frozen=True, slots=True)
class Meaning:
    """One code's row of ``docs/findings.md``: its severity, when it is raised, what to do."""

    severity: str
    when: str
    action: str


def findings_doc() -> Path:
    """``docs/findings.md`` (wheel: bridge/docs; source tree: docs/)."""
    for candidate in (_PACKAGE_DIR / "docs", _PACKAGE_DIR.parent / "docs"):
        if (candidate / "findings.md").is_file():
            return candidate / "findings.md"
    return _PACKAGE_DIR.parent / "docs" / "findings.md"


def meanings(text: str) -> dict[str, Meaning]:
    """Every code of the code tables of ``docs/findings.md`` (``| code | severity | when | what to do |``)."""
    found: dict[str, Meaning] = {}
    for line in text.splitlines():
        cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
        if len(cells) != 4 or not cells[0].startswith("`"):
            continue
        when, action = (_plain(cell) for cell in cells[2:])
        for code in re.findall(r"`([A-Z0-9_]+)`", cells[0]):
            found[code] = Meaning(cells[1], when, "" if action in ("—", "-") else action)
    return found


def _plain(cell: str) -> str:
    """A table cell as plain text: no back-ticks, escaped pipes restored."""
    return cell.replace("`", "").replace("\\|", "|")


def read_meanings() -> dict[str, Meaning]:
    """The meanings of ``docs/findings.md``; none when it cannot be read (the page then says where to look)."""
    try:
        return meanings(findings_doc().read_text(encoding="utf-8"))
    except OSError:
        return {}


# ---------- text ----------


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _table(headers: Sequence[str], rows: Sequence[Sequence[object]], numeric: frozenset[int] = frozenset()) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    cells = ("".join(f'<td class="n">{_e(c)}</td>' if i in numeric else f"<td>{_e(c)}</td>" for i, c in enumerate(r))
             for r in rows)  # fmt: skip
    body = "".join(f"<tr>{row}</tr>" for row in cells)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body or '<tr><td>none</td></tr>'}</tbody></table>"


def _severity(severity: str) -> str:
    return f'<span class="sev {_e(severity)}">{_e(severity)}</span>'


def _answer(summary: Mapping[str, Any]) -> str:
    records, files = summary["records"], summary["files"]
    tiles = (
        ("ready", summary["ready"], "can migrate as they are"),
        ("decision", summary["need_decision"], "need a decision"),
        ("unreadable", summary["unreadable"], "cannot be read"),
    )
    boxes = "".join(
        f'<div class="tile {kind}" id="answer-{kind}"><span class="big">{n:,}</span> {_e(what)}</div>'
        for kind, n, what in tiles
    )
    copies = summary["copies"]
    sentence = (
        f"{files:,} files gave {records:,} records: {summary['ready']:,} can migrate as they are, "
        f"{summary['need_decision']:,} need a decision before they migrate, {summary['unreadable']:,} cannot be read"
        + (f", and {copies:,} are byte-identical copies of a test handed over once." if copies else ".")
    )
    skipped = summary.get("skipped", 0)
    if skipped:  # the folder rule's count: files under the archive that are not exports, not read
        were = "other file was" if skipped == 1 else "other files were"
        sentence += f" {skipped:,} {were} skipped as not exports (README.txt, Thumbs.db, ...)."
    held = summary["held_by_check"]
    why = ""
    if held:
        rows = [(code, n) for code, n in sorted(held.items(), key=lambda item: (-item[1], item[0]))]
        why = "<h3>What holds records back</h3>" + _table(("check", "records"), rows, frozenset({1}))
    return (
        f'<section id="answer"><h2>The answer</h2><div class="tiles">{boxes}</div><p>{_e(sentence)}</p>{why}</section>'
    )


def _run(run: Mapping[str, Any]) -> str:
    labels = (
        ("tool", "tool"), ("date", "date of the run"), ("paths", "archive paths"), ("field_maps", "field maps"),
        ("units", "units of the hand-over"), ("traditional_per_si", "SI/traditional factor"),
        ("allow", "allowed codes"), ("blocking", "blocking codes"), ("reference_basis", "reference basis"),
        ("repeatability", "repeatability"), ("hand_over", "hand-over"),
    )  # fmt: skip
    rows = []
    for key, label in labels:
        value = run.get(key, "")
        rows.append((label, (", ".join(map(str, value)) or "none") if isinstance(value, list) else value))
    return f'<section id="run"><h2>This run</h2>{_table(("setting", "value"), rows)}</section>'


def _checks(reduce: ArchiveReduce, known: Mapping[str, Meaning]) -> str:
    """One section per check: severity, count, what it means and what to do, the first few examples."""
    parts = []
    severity_of = {e[0][0].check: e[0][0].severity for e in reduce.examples.values() if e}
    order = sorted(
        reduce.by_check, key=lambda c: (-SEVERITY_RANK.get(severity_of.get(c, ""), 0), -reduce.by_check[c], c)
    )
    for check in order:
        meaning = known.get(check)
        severity = severity_of.get(check, meaning.severity if meaning else "")
        said = (
            f'<p class="meaning"><b>What it means:</b> {_e(meaning.when)}.'
            + (f" <b>What to do:</b> {_e(meaning.action)}." if meaning.action else "")
            + "</p>"
            if meaning
            else '<p class="meaning">Not described in docs/findings.md.</p>'
        )
        examples = [
            (f.file or "(whole source)", f.record, f.source, f.test_id, name, f.message)
            for f, name in reduce.examples.get(check, [])
        ]
        table = _table(("file", "record", "source", "test id", "patient", "message"), examples)
        parts.append(
            f'<section class="check" id="check-{_e(check)}"><h3>{_e(check)} {_severity(severity)} '
            f'<span class="count">{reduce.by_check[check]:,}</span></h3>{said}'
            f"<p>First {len(examples)} of {reduce.by_check[check]:,} (all in findings.csv):</p>{table}</section>"
        )
    return '<section id="checks"><h2>Findings by check</h2>' + ("".join(parts) or "<p>No findings.</p>") + "</section>"


# ---------- plots ----------


def _label(text: str) -> str:
    """Text for a plot: matplotlib reads ``$...$`` as mathematics, so dollars are escaped."""
    return text.replace("$", r"\$")


def _svg(figure: Any) -> str:
    buffer = io.StringIO()
    no_metadata = {"Date": None, "Creator": None, "Format": None, "Type": None}  # the same bytes every run
    figure.savefig(buffer, format="svg", bbox_inches="tight", metadata=no_metadata, dpi=_RASTER_DPI)
    plt.close(figure)
    text = buffer.getvalue()
    return _METADATA.sub("", text[text.index("<svg") :])


def shown_range(*arrays: Any, floor: float = 0.5) -> tuple[float, float, int]:
    """The range that shows the bulk of the values (1st to 99th percentile, with a margin) and how many lie outside.

    With no value beyond the margin the whole range is shown and none is counted outside; the
    margin is at least ``floor`` (in the values' unit), so that values that all agree still
    show on a readable scale.
    """
    values = np.concatenate([np.asarray(a, dtype=np.float64) for a in arrays])
    low, high = (float(v) for v in np.percentile(values, CLIP_PERCENTILES))
    margin = max((high - low) * 0.15, floor)
    low, high = low - margin, high + margin
    outside = int(np.count_nonzero((values < low) | (values > high)))
    if outside == 0:
        low, high = float(values.min()) - margin, float(values.max()) + margin
    return low, high, outside


def _outside_note(axes: Any, outside: int, what: str) -> None:
    if outside:
        axes.text(
            0.99, 0.02, f"{outside:,} {what} outside the range shown", transform=axes.transAxes,
            ha="right", va="bottom", fontsize=8, color="#333",
        )  # fmt: skip


def _agreement(reduce: ArchiveReduce) -> tuple[str, str]:
    agreement = stats.dlco_agreement(reduce.plots)
    if agreement is None:
        return "", "No pairs: fewer than two sessions had a reported DLCO and manoeuvres with gas data to recompute it."
    figure, axes = plt.subplots(figsize=(7, 3.8))
    axes.scatter(agreement.mean, agreement.difference, s=6, alpha=0.5, rasterized=True, label="session")
    axes.axhline(agreement.bias, color="black", linewidth=1, label=f"bias {agreement.bias:.2f}")
    for y in (agreement.lower, agreement.upper):
        axes.axhline(y, linestyle="--", color="black", linewidth=0.8)
    axes.plot([], [], linestyle="--", color="black", linewidth=0.8,
              label=f"limits of agreement {agreement.lower:.2f} to {agreement.upper:.2f}")  # fmt: skip
    x_low, x_high, _ = shown_range(agreement.mean)
    y_low, y_high, _ = shown_range(agreement.difference, [agreement.lower, agreement.upper])
    axes.set_xlim(x_low, x_high)
    axes.set_ylim(y_low, y_high)
    inside = (agreement.mean >= x_low) & (agreement.mean <= x_high)
    inside &= (agreement.difference >= y_low) & (agreement.difference <= y_high)
    _outside_note(axes, int(agreement.n - np.count_nonzero(inside)), "sessions")
    axes.set_xlabel("mean of reported and recomputed DLCO (mL/min/mmHg)")
    axes.set_ylabel("reported − recomputed DLCO (mL/min/mmHg)")
    axes.legend(loc="upper right", fontsize=8)
    return _svg(figure), ""


def _kco(reduce: ArchiveReduce) -> tuple[str, str]:
    kco, ratio = stats.kco_pairs(reduce.plots)
    if not kco.size:
        return "", "No pairs: no session reported KCO together with DLCO and VA."
    figure, axes = plt.subplots(figsize=(7, 3.8))
    axes.scatter(ratio, kco, s=6, alpha=0.5, rasterized=True, label="session")
    low, high, _ = shown_range(ratio, kco, floor=0.1)
    axes.plot([low, high], [low, high], color="black", linewidth=0.8, label="KCO = DLCO / VA")
    axes.set_xlim(low, high)
    axes.set_ylim(low, high)
    inside = (ratio >= low) & (ratio <= high) & (kco >= low) & (kco <= high)
    _outside_note(axes, int(kco.size - np.count_nonzero(inside)), "sessions")
    axes.set_xlabel("DLCO / VA (mL/min/mmHg/L)")
    axes.set_ylabel("reported KCO (mL/min/mmHg/L)")
    axes.legend(loc="upper left", fontsize=8)
    return _svg(figure), ""


def _percent_predicted(reduce: ArchiveReduce) -> tuple[str, str]:
    per_source = stats.percent_predicted(reduce.plots)
    if not per_source:
        return "", "No values: no session carried a predicted DLCO from its lab."
    figure, axes = plt.subplots(figsize=(7, 1.2 + 0.5 * len(per_source)))
    labels = [_label(f"{source} (n = {values.size:,})") for source, values in per_source.items()]
    axes.boxplot(
        list(per_source.values()), orientation="horizontal", tick_labels=labels, flierprops={"rasterized": True}
    )
    low, high, outside = shown_range(*per_source.values())
    axes.set_xlim(max(low, 0.0), high)
    _outside_note(axes, outside, "values")
    axes.set_xlabel("DLCO, % of the predicted value the lab reported")
    return _svg(figure), ""


def _by_month(reduce: ArchiveReduce) -> tuple[str, str]:
    months, counts = stats.findings_by_month(reduce.plots)
    if not months:
        return "", "No findings on a dated session."
    figure, axes = plt.subplots(figsize=(7, 3.4))
    days = mdates.date2num([date(int(m[:4]), int(m[5:7]), 15) for m in months])  # type: ignore[no-untyped-call]
    bottom = np.zeros(len(months))
    for severity in sorted(counts, key=lambda s: -SEVERITY_RANK.get(s, 0)):
        values = counts[severity]
        axes.bar(days, values, width=25, bottom=bottom, color=SEVERITY_COLOURS.get(severity, "#777"),
                 label=_label(SEVERITY_WORDS.get(severity, severity)))  # fmt: skip
        bottom = bottom + values
    locator = mdates.AutoDateLocator(maxticks=10)  # type: ignore[no-untyped-call]  # untyped upstream
    axes.xaxis.set_major_locator(locator)
    axes.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))  # type: ignore[no-untyped-call]
    axes.set_xlabel("month of testing")
    axes.set_ylabel("findings")
    axes.legend(loc="upper left", fontsize=8)
    return _svg(figure), ""


PLOTS = (
    ("agreement", "Reported vs recomputed DLCO (Bland–Altman)", _agreement),
    ("kco", "Reported KCO vs DLCO/VA", _kco),
    ("percent-predicted", "DLCO % predicted per source (box: quartiles and median; whiskers: 1.5 × IQR)",
     _percent_predicted),
    ("by-month", "Findings per month of testing, by severity", _by_month),
)  # fmt: skip


def _plots(reduce: ArchiveReduce) -> str:
    figures = []
    with plt.rc_context({"svg.fonttype": "none", "svg.hashsalt": "dlco-bridge-audit", "font.size": 9}):
        for name, title, draw in PLOTS:
            svg, empty = draw(reduce)
            body = svg or f'<p class="empty">{_e(empty)}</p>'
            figures.append(f'<figure id="plot-{name}"><figcaption>{_e(title)}</figcaption>{body}</figure>')
    return '<section id="plots"><h2>Plots</h2>' + "".join(figures) + "</section>"


_BASE_STYLE = """
body{font-family:system-ui,sans-serif;margin:2rem auto;padding:0 1rem;max-width:72rem;color:#222}
table{border-collapse:collapse;margin:.5rem 0 1.5rem;max-width:100%}th{white-space:nowrap}
section.check table{width:100%}
td,th{border:1px solid #ccc;padding:.2rem .5rem;text-align:left;vertical-align:top;overflow-wrap:anywhere}
td.n{text-align:right}.caution{border:2px solid #a60;padding:.5rem 1rem;background:#fff6e5}
.tiles{display:flex;gap:1rem;flex-wrap:wrap}
.tile{border:2px solid;border-radius:.4rem;padding:.6rem 1rem;min-width:14rem}
.tile .big{display:block;font-size:2rem;font-weight:700}
.tile.ready{border-color:#1a9850}
.sev{font-size:.8rem;padding:.05rem .4rem;border-radius:.3rem;color:#fff;vertical-align:middle}
.sev.warning{color:#000}
.count{font-weight:400;color:#555}.count::before{content:"× "}
figure{margin:1rem 0}svg{max-width:100%;height:auto}.empty{color:#555;font-style:italic}
"""


# the severity colours, written once (SEVERITY_COLOURS): the badges, and the tiles of what is held or unreadable
STYLE = (
    _BASE_STYLE
    + "".join(f".sev.{severity}{{background:{colour}}}" for severity, colour in SEVERITY_COLOURS.items())
    + f".tile.decision{{border-color:{SEVERITY_COLOURS['warning']}}}"
    + f".tile.unreadable{{border-color:{SEVERITY_COLOURS['error']}}}\n"
)


def page(summary: Mapping[str, Any], reduce: ArchiveReduce, known: Mapping[str, Meaning] | None = None) -> str:
    """The report page: the answer and the run, findings by check, counts by source, plots."""
    known = read_meanings() if known is None else known
    by_source = sorted(((s, c, n) for (s, c), n in reduce.by_source.items()), key=lambda r: (r[0], -r[2], r[1]))
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        # Nothing runs and nothing is fetched; the plots' points are images inside the page (data: URLs).
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; "
        'img-src data:">'
        f"<title>dlco-bridge audit</title><style>{STYLE}</style></head><body>"
        "<h1>Migration audit</h1>"
        f'<p class="caution">{_e(CAUTION)}</p>'
        f"{_answer(summary)}{_run(summary['run'])}{_checks(reduce, known)}"
        '<section id="sources"><h2>Findings by source</h2>'
        "<p>A source is the lab that produced the record; records that could not be read have none.</p>"
        f"{_table(('source', 'check', 'count'), [(s or '(none)', c, n) for s, c, n in by_source], frozenset({2}))}"
        f"</section>{_plots(reduce)}"
        "</body></html>\n"
    )
