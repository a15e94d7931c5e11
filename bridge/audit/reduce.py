"""The keyed streaming reduce over an archive's rows, and the checks across records (pure).

Owns :class:`ArchiveReduce`: rows go in one at a time (in the walk's order: the first findings
of each check, kept as the page's examples, are the first met); it counts findings by check,
source and severity, keeps the unit conventions and reference sets per source (with the first
file of each) and the sessions with a post-bronchodilator value but no pre value, and the numbers
the plots draw. Which quantities these checks watch is data (``bridge.audit.rows``: ``SERIES``,
``LAB_SETS``, ``PRE_POST``). What the checks across records need
of every session (its content hash per test id, its :class:`Visit` per patient) is kept by the
shell outside memory (``bridge.audit.index``) and handed back, sorted, to
:meth:`ArchiveReduce.finish`, which returns the archive's own findings, sorted, so that the
result does not depend on the order the rows arrived in. Then :func:`held_by_archive` says which
sessions those findings keep out of the hand-over (the gate's rule), and :class:`Answer` counts
what can migrate as it is, what needs a decision, what cannot be read.
"""

from __future__ import annotations

import itertools
from array import array
from collections import Counter, defaultdict
from collections.abc import Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from bridge.audit.rows import LAB_SETS, SERIES, AuditFinding, Row
from bridge.emit.outputs import blocked_because
from bridge.model import Severity
from bridge.science.units import TRADITIONAL_PER_SI

DUPLICATE_TEST_ID = "DUPLICATE_TEST_ID_CONFLICT"
SEX_CHANGED = "PATIENT_SEX_CHANGED"
BIRTH_DATE_CHANGED = "PATIENT_BIRTH_DATE_CHANGED"
SERIES_JUMP = "SERIES_UNIT_JUMP"
UNIT_CONVENTIONS_MIXED = "UNIT_CONVENTIONS_MIXED"
REFERENCE_SETS_MIXED = "REFERENCE_SETS_MIXED"
POST_WITHOUT_PRE_IN_SOURCE = "POST_WITHOUT_PRE_IN_SOURCE"
# The codes of the checks across records: findings like the record checks' (docs/findings.md), so
# the settings that name finding codes (allow, blocking) must know these too.
ARCHIVE_CHECKS = (DUPLICATE_TEST_ID, SEX_CHANGED, BIRTH_DATE_CHANGED, SERIES_JUMP, UNIT_CONVENTIONS_MIXED,
                  REFERENCE_SETS_MIXED, POST_WITHOUT_PRE_IN_SOURCE)  # fmt: skip

# A series (bridge.audit.rows.SERIES: DLCO, FEV1 and FVC before and after the bronchodilator, the
# static lung volumes TLC, FRC, RV and VC) that moves by its unit factor between consecutive
# sessions was almost certainly labelled in the wrong unit at one of them: DLCO by the site's
# SI <-> traditional factor (traditional_per_si: 2.987, or 2.986, bridge.science.units), a volume
# by 1000 (millilitres as litres, or the reverse).
# relative, so that honest change between visits (tens of per cent) on top of a mislabel still shows,
# while a true tripling or fall to a third between two sessions does not happen (common practice)
SERIES_JUMP_TOLERANCE = 0.15
CONVENTIONS = "DLCO unit systems"  # what UNIT_CONVENTIONS_MIXED counts
EXAMPLES_KEPT = 3  # findings shown per check on the page (the first met; every one is in findings.csv)


@dataclass(frozen=True, slots=True, order=True)
class Visit:
    """One session of one patient, as the patient checks see it (ordered by time, then file)."""

    performed_at: str
    file: str
    record: str
    source: str
    test_id: str
    sex: str
    birth_date: str
    series: tuple[float | None, ...]  # the values of bridge.audit.rows.SERIES, in its order


@dataclass(slots=True)
class Plots:
    """The numbers the report draws, as compact arrays (8 bytes a value)."""

    dlco_reported: array[float] = field(default_factory=lambda: array("d"))
    dlco_recomputed: array[float] = field(default_factory=lambda: array("d"))
    kco_reported: array[float] = field(default_factory=lambda: array("d"))
    dlco_over_va: array[float] = field(default_factory=lambda: array("d"))
    percent_predicted: dict[str, array[float]] = field(default_factory=dict)
    findings_by_month: Counter[tuple[str, str]] = field(default_factory=Counter)  # (YYYY-MM, severity)


@dataclass(slots=True)
class ArchiveReduce:
    """Accumulates rows; :meth:`finish` gives the findings across the archive."""

    files: int = 0  # files (and folders that could not be listed): a file of many sessions counts once
    records: int = 0  # rows: one per session read, per bad record, per file that did not become a record
    skipped: int = 0  # files under the archive that are not exports (bridge.inputs, the skip rule): counted, not read
    readable: int = 0
    clean: int = 0
    by_check: Counter[str] = field(default_factory=Counter)
    by_source: Counter[tuple[str, str]] = field(default_factory=Counter)
    by_severity: Counter[str] = field(default_factory=Counter)
    plots: Plots = field(default_factory=Plots)
    _conventions: defaultdict[str, Counter[str]] = field(default_factory=lambda: defaultdict(Counter))
    # per LAB_SETS entry, per source, the names met
    _reference_sets: defaultdict[tuple[str, str], Counter[str]] = field(default_factory=lambda: defaultdict(Counter))
    _first_file: dict[tuple[str, str, str], str] = field(default_factory=dict)  # (what, source, kind): first file
    # per source: sessions with a post-bronchodilator value, those of them without a pre value (per
    # quantity), and the first such session (file, record)
    _with_post: Counter[str] = field(default_factory=Counter)
    _post_only: defaultdict[str, Counter[str]] = field(default_factory=lambda: defaultdict(Counter))
    _post_only_sessions: Counter[str] = field(default_factory=Counter)
    _first_post_only: dict[str, tuple[str, str]] = field(default_factory=dict)
    # per check, the first findings met, with the patient's name (for the page)
    examples: dict[str, list[tuple[AuditFinding, str]]] = field(default_factory=dict)
    traditional_per_si: float = TRADITIONAL_PER_SI  # the site's factor: what a unit jump in a series is

    def add(self, row: Row) -> None:
        """Take one row into the counts, the keyed state and the plot arrays (:meth:`add_files` counts files)."""
        self.records += 1
        self.count(row.findings, row.patient_name, row.performed_at[:7])
        if not row.readable:
            return
        self.readable += 1
        self.clean += row.clean
        if row.dlco_convention:
            self._conventions[row.source][row.dlco_convention] += 1
            self._first_file.setdefault((CONVENTIONS, row.source, row.dlco_convention), row.file)
        for watched, name in zip(LAB_SETS, row.lab_sets, strict=False):
            if name:
                self._reference_sets[(watched.what, row.source)][name] += 1
                self._first_file.setdefault((watched.what, row.source, name), row.file)
        if row.with_post:
            self._with_post[row.source] += 1
        if row.post_without_pre:
            self._post_only[row.source].update(row.post_without_pre)
            self._post_only_sessions[row.source] += 1
            self._first_post_only.setdefault(row.source, (row.file, row.record))
        self._add_plots(row)

    def add_files(self, files: int) -> None:
        """Count files read (one each, however many sessions a file holds)."""
        self.files += files

    def count(self, findings: tuple[AuditFinding, ...], patient_name: str = "", month: str = "") -> None:
        """Count findings and keep the first few of each check (with the patient's name, for the page)."""
        for finding in findings:
            self.by_check[finding.check] += 1
            self.by_source[(finding.source, finding.check)] += 1
            self.by_severity[finding.severity] += 1
            if month:
                self.plots.findings_by_month[(month, finding.severity)] += 1
            kept = self.examples.setdefault(finding.check, [])
            if len(kept) < EXAMPLES_KEPT:
                kept.append((finding, patient_name))

    def _add_plots(self, row: Row) -> None:
        plots = self.plots
        if row.dlco is not None and row.dlco_recomputed is not None:
            plots.dlco_reported.append(row.dlco)
            plots.dlco_recomputed.append(row.dlco_recomputed)
        if row.kco is not None and row.dlco is not None and row.va:
            plots.kco_reported.append(row.kco)
            plots.dlco_over_va.append(row.dlco / row.va)
        if row.dlco_percent_predicted is not None:
            plots.percent_predicted.setdefault(row.source, array("d")).append(row.dlco_percent_predicted)

    def finish(
        self,
        contents: Iterable[tuple[str, str, Mapping[str, str]]],
        patients: Iterable[tuple[str, Sequence[Visit]]],
    ) -> list[AuditFinding]:
        """The findings across the archive, sorted; they are counted as well.

        ``contents``: per (source, test id), each content hash with the first file (by name)
        that carried it; ``patients``: per patient, every visit in order. Both come from the
        shell's index of the rows that were added.
        """
        found = sorted(
            [*_duplicates(contents), *_patients(patients, self.traditional_per_si), *self._sources()],
            key=lambda f: (f.source, f.test_id, f.check, f.file, f.message),
        )
        for finding in found:
            self.count((finding,))
        return found

    def _sources(self) -> list[AuditFinding]:
        found = self._post_without_pre()
        kinds_met = [(UNIT_CONVENTIONS_MIXED, CONVENTIONS, source, c) for source, c in self._conventions.items()]
        kinds_met += [(REFERENCE_SETS_MIXED, what, source, c) for (what, source), c in self._reference_sets.items()]
        for check, what, source, counts in kinds_met:
            if len(counts) > 1:
                first = {k: self._first_file[(what, source, k)] for k in counts}
                listed = ", ".join(f"{k} ({n}, first in {first[k]})" for k, n in sorted(counts.items()))
                rarest = min(counts.items(), key=lambda item: (item[1], item[0]))[0]
                message = f"{len(counts)} {what} within one source: {listed}; check each against the lab's own."
                # the file to start with: the rarer kind's first
                found.append(AuditFinding(first[rarest], "", source, "", check, Severity.WARNING.value, message))
        return found

    def _post_without_pre(self) -> list[AuditFinding]:
        """Per source, the sessions whose post-bronchodilator value came without its pre value."""
        found = []
        for source, by_label in sorted(self._post_only.items()):
            file, record = self._first_post_only[source]
            counted = ", ".join(f"{label} in {n}" for label, n in sorted(by_label.items()))
            message = (
                f"{self._post_only_sessions[source]} of the {self._with_post[source]} sessions of this source with "
                f"post-bronchodilator values came without a pre-bronchodilator value ({counted}), the first here; "
                "ask the lab whether its export leaves pre-bronchodilator values out."
            )
            found.append(
                AuditFinding(file, record, source, "", POST_WITHOUT_PRE_IN_SOURCE, Severity.WARNING.value, message)
            )
        return found


def held_by_archive(
    archive: Iterable[AuditFinding], blocking: Collection[str] = (), allow: Collection[str] = ()
) -> dict[tuple[str, str], tuple[str, ...]]:
    """Per (source, test id), the codes of the findings across records that keep the session out of the hand-over.

    The gate's one rule (``bridge.emit.outputs.blocked_because``): an error not allowed, or a
    code marked blocking; a conflicting test id is kept out whatever is allowed, every version
    of it, until someone decides which one is the result. Findings about a whole source hold nothing.
    """
    held: dict[tuple[str, str], tuple[str, ...]] = {}
    for finding in archive:
        if not finding.test_id:
            continue
        if finding.check == DUPLICATE_TEST_ID or blocked_because(
            finding.check, Severity(finding.severity), blocking, allow
        ):
            key = (finding.source, finding.test_id)
            held[key] = tuple(sorted({*held.get(key, ()), finding.check}))
    return held


@dataclass(slots=True)
class Answer:
    """What the audit's page opens with: how many records can migrate as they are, need a decision, cannot be read."""

    ready: int = 0  # handed over: the gate and the checks across records let it through, first of its test id
    decision: int = 0  # read, but kept out: the gate refused it or a check across records holds it
    copies: int = 0  # another file of a test id already handed over, byte for byte the same content
    unreadable: int = 0  # no record: the file (or the record in it) could not be read
    why: Counter[str] = field(default_factory=Counter)  # the records needing a decision, by the code that holds them

    def settle(self, readable: bool, held: Sequence[str], first: bool) -> str:
        """Count one record: "unreadable", "decision", "copy" or "ready" (the hand-over takes the last)."""
        if not readable:
            self.unreadable += 1
            return "unreadable"
        if held:
            self.decision += 1
            self.why.update(held)
            return "decision"
        if not first:
            self.copies += 1
            return "copy"
        self.ready += 1
        return "ready"


def visit_of(row: Row) -> Visit:
    """What the patient checks need of one readable row."""
    series = row.series or (None,) * len(SERIES)
    return Visit(row.performed_at, row.file, row.record, row.source, row.test_id, row.sex, row.birth_date, series)


def _duplicates(contents: Iterable[tuple[str, str, Mapping[str, str]]]) -> list[AuditFinding]:
    """The same test id with different contents (each content named by its first file)."""
    found = []
    for source, test_id, files_by_content in contents:
        if len(files_by_content) > 1:
            files = sorted(files_by_content.values())
            found.append(
                AuditFinding(
                    files[0], "", source, test_id, DUPLICATE_TEST_ID, Severity.ERROR.value,
                    f"test id {test_id} has {len(files)} different contents: {', '.join(files)}; "
                    "decide which one is the result before migrating it.",
                )
            )  # fmt: skip
    return found


def _patients(patients: Iterable[tuple[str, Sequence[Visit]]], traditional_per_si: float) -> list[AuditFinding]:
    """A patient whose sex or birth date changes between sessions, or whose DLCO series jumps."""
    found: list[AuditFinding] = []
    for patient, visits in patients:
        first = visits[0]
        for attribute, check in (("sex", SEX_CHANGED), ("birth_date", BIRTH_DATE_CHANGED)):
            changed = next((v for v in visits if getattr(v, attribute) != getattr(first, attribute)), None)
            if changed is not None:
                found.append(
                    AuditFinding(
                        changed.file, changed.record, changed.source, changed.test_id, check, Severity.ERROR.value,
                        f"patient {patient.split('|')[-1]}: {attribute.replace('_', ' ')} is "
                        f"{getattr(changed, attribute)} here but {getattr(first, attribute)} in test "
                        f"{first.test_id} ({first.performed_at[:10]}, {first.file}); "
                        "one of them is another person or a typo.",
                    )
                )  # fmt: skip
        found.extend(_jumps(patient, visits, traditional_per_si))
    return found


def _jumps(patient: str, visits: Sequence[Visit], traditional_per_si: float) -> list[AuditFinding]:
    """A series of SERIES that moves by about its unit factor between consecutive sessions."""
    found = []
    for i, watched in enumerate(SERIES):
        factor = traditional_per_si if watched.factor is None else watched.factor
        why = (
            "the mL/min/mmHg per mmol/min/kPa factor"
            if watched.factor is None
            else f"a factor of {factor:g} (the unit's thousandth or thousandfold)"
        )
        series = [(v, value) for v in visits if (value := v.series[i]) is not None and value > 0]
        for (before, was), (after, now) in itertools.pairwise(series):
            ratio = now / was
            if any(abs(ratio / f - 1) <= SERIES_JUMP_TOLERANCE for f in (factor, 1 / factor)):
                found.append(
                    AuditFinding(
                        after.file, after.record, after.source, after.test_id, SERIES_JUMP, Severity.ERROR.value,
                        f"{watched.label} {now:{watched.digits}} {watched.unit} is {ratio:.3f} x the previous "
                        f"session's {was:{watched.digits}} (test {before.test_id}, {before.file}): about {why}, "
                        "so one of the two was probably labelled in the wrong unit.",
                    )
                )  # fmt: skip
    return found
