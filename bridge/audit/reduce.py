"""The keyed streaming reduce over an archive's rows, and the checks across records (pure).

Owns :class:`ArchiveReduce`: rows go in one at a time, in any order; it counts findings by
check, source and severity, keeps the worst findings for the report, the unit conventions and
reference sets per source, and the numbers the plots draw. What the checks across records need
of every session (its content hash per test id, its :class:`Visit` per patient) is kept by the
shell outside memory (``bridge.audit.index``) and handed back, sorted, to
:meth:`ArchiveReduce.finish`, which returns the archive's own findings, sorted, so that the
result does not depend on the order the rows arrived in.
"""

from __future__ import annotations

import heapq
import itertools
from array import array
from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from bridge.audit.rows import AuditFinding, Row
from bridge.model import Severity

DUPLICATE_TEST_ID = "DUPLICATE_TEST_ID_CONFLICT"
SEX_CHANGED = "PATIENT_SEX_CHANGED"
BIRTH_DATE_CHANGED = "PATIENT_BIRTH_DATE_CHANGED"
SERIES_JUMP = "SERIES_UNIT_JUMP"
UNIT_CONVENTIONS_MIXED = "UNIT_CONVENTIONS_MIXED"
REFERENCE_SETS_MIXED = "REFERENCE_SETS_MIXED"
ARCHIVE_CHECKS = (DUPLICATE_TEST_ID, SEX_CHANGED, BIRTH_DATE_CHANGED, SERIES_JUMP, UNIT_CONVENTIONS_MIXED,
                  REFERENCE_SETS_MIXED)  # fmt: skip

# DLCO in mL/min/mmHg per mmol/min/kPa: a series that moves by this factor between consecutive
# sessions was almost certainly labelled in the wrong unit system at one of them.
# source: ATS/ERS 2017 DLCO standard (Graham et al., Eur Respir J 2017;49:1600016), units section
TRADITIONAL_PER_SI = 2.987
# relative, so that honest change between visits (tens of per cent) on top of a mislabel still shows,
# while a true tripling or fall to a third between two sessions does not happen (common practice)
SERIES_JUMP_TOLERANCE = 0.15
WORST_KEPT = 200  # findings shown in the report's "worst first" table

_Key = tuple[int, tuple[int, ...], tuple[int, ...], tuple[int, ...], tuple[int, ...]]


@dataclass(frozen=True, slots=True, order=True)
class Visit:
    """One session of one patient, as the patient checks see it (ordered by time, then file)."""

    performed_at: str
    file: str
    source: str
    test_id: str
    sex: str
    birth_date: str
    dlco: float | None


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

    files: int = 0
    skipped: int = 0  # files under the archive that are not exports (bridge.inputs, the skip rule): counted, not read
    readable: int = 0
    clean: int = 0
    by_check: Counter[str] = field(default_factory=Counter)
    by_source: Counter[tuple[str, str]] = field(default_factory=Counter)
    by_severity: Counter[str] = field(default_factory=Counter)
    plots: Plots = field(default_factory=Plots)
    _conventions: defaultdict[str, Counter[str]] = field(default_factory=lambda: defaultdict(Counter))
    _reference_sets: defaultdict[str, Counter[str]] = field(default_factory=lambda: defaultdict(Counter))
    _worst: list[tuple[_Key, AuditFinding, str]] = field(default_factory=list)

    def add(self, row: Row) -> None:
        """Take one row into the counts, the keyed state and the plot arrays."""
        self.files += 1
        self.count(row.findings, row.patient_name, row.performed_at[:7])
        if not row.readable:
            return
        self.readable += 1
        self.clean += row.clean
        if row.dlco_convention:
            self._conventions[row.source][row.dlco_convention] += 1
        if row.reference_set:
            self._reference_sets[row.source][row.reference_set] += 1
        self._add_plots(row)

    def count(self, findings: tuple[AuditFinding, ...], patient_name: str = "", month: str = "") -> None:
        """Count findings and keep the worst of them (with the patient's name, for the report)."""
        for finding in findings:
            self.by_check[finding.check] += 1
            self.by_source[(finding.source, finding.check)] += 1
            self.by_severity[finding.severity] += 1
            if month:
                self.plots.findings_by_month[(month, finding.severity)] += 1
            if len(self._worst) >= WORST_KEPT and finding.rank < self._worst[0][0][0]:
                continue  # cheaper than building the key: it cannot be among the worst
            # heapq keeps the smallest first: the least bad finding is the one pushed out
            key: _Key = (finding.rank, _inverse(finding.check), _inverse(finding.source), _inverse(finding.test_id),
                   _inverse(finding.message))  # fmt: skip
            item = (key, finding, patient_name)
            if len(self._worst) < WORST_KEPT:
                heapq.heappush(self._worst, item)
            elif key > self._worst[0][0]:
                heapq.heapreplace(self._worst, item)

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

    def worst(self) -> list[tuple[AuditFinding, str]]:
        """The worst findings kept, worst first: severity, then check, source, test id."""
        return [(finding, name) for _, finding, name in sorted(self._worst, reverse=True)]

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
            [*_duplicates(contents), *_patients(patients), *self._sources()],
            key=lambda f: (f.source, f.test_id, f.check, f.message),
        )
        for finding in found:
            self.count((finding,))
        return found

    def _sources(self) -> list[AuditFinding]:
        found = []
        for kinds, check, what in (
            (self._conventions, UNIT_CONVENTIONS_MIXED, "DLCO unit systems"),
            (self._reference_sets, REFERENCE_SETS_MIXED, "reference sets"),
        ):
            for source, counts in kinds.items():
                if len(counts) > 1:
                    listed = ", ".join(f"{name} ({n})" for name, n in sorted(counts.items()))
                    message = f"{len(counts)} {what} within one source: {listed}; check each against the lab's own."
                    found.append(AuditFinding(source, "", check, Severity.WARNING.value, message))
        return found


def visit_of(row: Row) -> Visit:
    """What the patient checks need of one readable row."""
    return Visit(row.performed_at, row.file, row.source, row.test_id, row.sex, row.birth_date, row.dlco)


def _duplicates(contents: Iterable[tuple[str, str, Mapping[str, str]]]) -> list[AuditFinding]:
    """The same test id with different contents (each content named by its first file)."""
    found = []
    for source, test_id, files_by_content in contents:
        if len(files_by_content) > 1:
            files = sorted(files_by_content.values())
            found.append(
                AuditFinding(
                    source, test_id, DUPLICATE_TEST_ID, Severity.ERROR.value,
                    f"test id {test_id} has {len(files)} different contents: {', '.join(files)}; "
                    "decide which one is the result before migrating it.",
                )
            )  # fmt: skip
    return found


def _patients(patients: Iterable[tuple[str, Sequence[Visit]]]) -> list[AuditFinding]:
    """A patient whose sex or birth date changes between sessions, or whose DLCO series jumps."""
    found: list[AuditFinding] = []
    for patient, visits in patients:
        first = visits[0]
        for attribute, check in (("sex", SEX_CHANGED), ("birth_date", BIRTH_DATE_CHANGED)):
            changed = next((v for v in visits if getattr(v, attribute) != getattr(first, attribute)), None)
            if changed is not None:
                found.append(
                    AuditFinding(
                        changed.source, changed.test_id, check, Severity.ERROR.value,
                        f"patient {patient.split('|')[-1]}: {attribute.replace('_', ' ')} is "
                        f"{getattr(changed, attribute)} here but {getattr(first, attribute)} in test "
                        f"{first.test_id} ({first.performed_at[:10]}); one of them is another person or a typo.",
                    )
                )  # fmt: skip
        found.extend(_jumps(patient, visits))
    return found


def _jumps(patient: str, visits: Sequence[Visit]) -> list[AuditFinding]:
    """A DLCO series that moves by about the SI/traditional factor between consecutive sessions."""
    found = []
    series = [v for v in visits if v.dlco is not None and v.dlco > 0]
    for before, after in itertools.pairwise(series):
        assert before.dlco is not None and after.dlco is not None
        ratio = after.dlco / before.dlco
        for factor in (TRADITIONAL_PER_SI, 1 / TRADITIONAL_PER_SI):
            if abs(ratio / factor - 1) <= SERIES_JUMP_TOLERANCE:
                found.append(
                    AuditFinding(
                        after.source, after.test_id, SERIES_JUMP, Severity.ERROR.value,
                        f"DLCO {after.dlco:.1f} mL/min/mmHg is {ratio:.3f} x the previous session's "
                        f"{before.dlco:.1f} (test {before.test_id}): about the mL/min/mmHg per mmol/min/kPa "
                        "factor, so one of the two was probably labelled in the wrong unit.",
                    )
                )  # fmt: skip
    return found


def _inverse(text: str) -> tuple[int, ...]:
    """A key that sorts text backwards, so that among equally bad findings A comes before B."""
    return (*(-ord(c) for c in text), 1)
