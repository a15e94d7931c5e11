"""What is emitted, independent of the standard: one :class:`ResultItem` per quantity.

Owns: choosing which quantities of an outcome become observations, their code, their value
in the destination's units (the lab's own digits when it reported in those units), the
reference range (GLI-2017 LLN-ULN, else the lab's lower limit of normal), the abnormal flag,
the GLI-2017 predicted value, per cent predicted and z-score beside the lab's own predicted
values (each labelled with its reference set), what a derived value was derived
from, and the notes (findings, adjustments). Both the FHIR and the HL7 v2 emitters render this
list, so the two outputs always carry the same content. Pure.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Literal

from bridge.model import ComparedBasis, Derived, Finding, Outcome, Quantity, ReferenceValue, Severity
from bridge.science.compared import BASIS_WORDS
from bridge.science.normalise import express
from bridge.science.quality import DEFAULT_REPEATABILITY, GradeTable
from bridge.science.units import UnitSystem
from bridge.tables import Code, Tables

BRIDGE_NAME = "dlco-bridge"
COMPUTED_NOTE = "Computed by dlco-bridge from the reported values."
# The one place that says the emitted bytes changed: bump it with every change of what the
# same input produces (codes, values, identifiers, layout). It is part of the HL7 control id
# (MSH-10), so a receiver that drops repeated MSH-10s still takes the newer output.
OUTPUT_REVISION = 4


Flag = Literal["L", "H", "N"]
# UCUM annotation for a z-score: a dimensionless number.  # source: UCUM, curly-brace annotations
Z_SCORE_UNIT = "{Zscore}"
GLI_SOURCE = "GLI-2017 (Stanojevic et al., Eur Respir J 2017;50:1700010, corrected 2020)"
GLI_RANGE_TEXT = "GLI-2017 LLN-ULN (5th-95th percentile)"
LAB_RANGE_TEXT = "LLN (5th percentile)"


@dataclass(frozen=True, slots=True)
class Supporting:
    """A blood value the export carried with the test (Hb, COHb): context for a result, never a result itself.

    The PFT lab did not measure it at the time of the test, so it is not emitted as an
    observation of its own: FHIR carries it as a ``component`` of the result it qualifies,
    HL7 v2 as an NTE after that result's OBX (see :func:`supporting_text`).
    """

    key: str  # "hemoglobin" or "carboxyhemoglobin"
    code: Code
    quantity: Quantity


# Which result each blood value qualifies: Hb and COHb both bear on the measured DLCO (ERS/ATS
# 2017 DLCO standard: report them with it); Hb is the input of the Hb-adjusted DLCO.
_SUPPORTED_BY = MappingProxyType({"dlco": ("hemoglobin", "carboxyhemoglobin"), "dlco_hb_adjusted": ("hemoglobin",)})


@dataclass(frozen=True, slots=True)
class ResultItem:
    """One quantity to emit, in the destination's units."""

    key: str  # stable key, e.g. "dlco"; also part of the observation identifier
    code: Code
    quantity: Quantity
    low: Quantity | None = None  # lower limit of normal, same unit
    flag: Flag | None = None
    high: Quantity | None = None  # upper limit of normal (GLI-2017 only), same unit
    range_text: str | None = None  # what the range is and which reference set it comes from
    # The lab's own lower limit from another reference set, kept beside the GLI-2017 range: (LLN, text).
    other_ranges: tuple[tuple[Quantity, str], ...] = ()
    derived_from: tuple[str, ...] = ()
    computed_here: bool = False  # True: recomputed by the bridge, not reported by the lab
    notes: tuple[str, ...] = ()
    supporting: tuple[Supporting, ...] = ()  # blood values that qualify this result (not results)
    # True: an ERROR finding the site allowed through (``allow``) concerns this value or one it
    # was derived from; the emitters then send it as preliminary, never as final.
    questionable: bool = False


@dataclass(frozen=True, slots=True)
class ReportContent:
    """Everything an emitter renders for one outcome."""

    items: tuple[ResultItem, ...]
    notes: tuple[str, ...] = field(default=())

    @property
    def questionable(self) -> bool:
        """Whether any item carries an allowed ERROR finding (the report is then not final)."""
        return any(item.questionable for item in self.items)


def _finding_note(finding: Finding, say: Callable[[Quantity], str]) -> str:
    """A finding as a note, its quantities in the destination's units."""
    return f"{finding.severity.value.upper()} {finding.code} ({finding.path}): {finding.text(say)}"


def build_content(
    outcome: Outcome, tables: Tables, units: UnitSystem, hemoglobin_unit: str | None = None
) -> ReportContent:
    """The items and notes to emit for one outcome, in ``units`` (haemoglobin in ``hemoglobin_unit`` if set)."""
    s, d = outcome.session, outcome.derived
    r, c = s.results, s.conditions
    pred = r.predicted
    lln = pred.lower_limits if pred is not None else None
    cat = tables.units
    targets: dict[str, str] = {}  # unit -> the unit it is shown in, looked up once per call
    if hemoglobin_unit is not None:
        for code, unit in cat.units.items():
            if unit.dimension == "mass_concentration":
                targets[code] = hemoglobin_unit

    def show(q: Quantity) -> Quantity:
        if q.unit == Z_SCORE_UNIT:
            return q  # a plain number in every unit system
        target = targets.get(q.unit)
        if target is None:
            target = targets[q.unit] = cat.display_unit(cat.units[q.unit].dimension, units)
        if q.unit == target:
            return q  # what express() returns for the same unit
        return express(q, target, cat)

    def say(q: Quantity) -> str:
        return _text(show(q))

    by_path: dict[str, list[str]] = {}
    for finding in outcome.findings:
        if finding.severity is not Severity.INFO:
            by_path.setdefault(finding.path, []).append(_finding_note(finding, say))

    items: list[ResultItem] = []
    paths: dict[str, str] = {}  # item key -> the record path whose ERROR findings question it
    replaced: set[str] = set()  # paths of lab values not forwarded: their errors question nothing
    codes = tables.codes.codes

    def add(
        key: str,
        q: Quantity | None,
        *,
        low: Quantity | None = None,
        derived_from: tuple[str, ...] = (),
        computed: bool = False,
        path: str = "",
        notes: tuple[str, ...] = (),
        replaces_lab_value: bool = False,
        reference: ReferenceValue | None = None,
        reference_set: str | None = None,
    ) -> None:
        """One item; ``replaces_lab_value``: the findings at ``path`` are about the lab's value,
        which this recomputed value replaces, so they are carried as notes but do not question it."""
        if q is None:
            return
        if replaces_lab_value:
            replaced.add(path)
        elif path:
            paths[key] = path
        shown = show(q)
        flag: Flag | None = None
        low_shown = high_shown = None
        range_text = None
        others: tuple[tuple[Quantity, str], ...] = ()
        range_notes: tuple[str, ...] = ()
        lab_range = f"{LAB_RANGE_TEXT}, {reference_set or 'reference set not named by the lab'}"
        if reference is not None:  # GLI-2017: the range and the flag from the z-score; the lab's LLN beside it
            low_shown, high_shown, flag = show(reference.lln), show(reference.uln), reference.flag
            range_text = GLI_RANGE_TEXT
            range_notes = (_reference_note(reference, show),)
            if low is not None:
                others = ((show(low), lab_range),)
                range_notes += (f"{lab_range}: {_text(show(low))}, as reported by the lab.",)
        elif low is not None:
            low_shown = show(low)
            flag = "L" if shown.value < low_shown.value else "N"
            range_text = lab_range if reference_set else LAB_RANGE_TEXT
        found = by_path.get(path) if path and by_path else None
        extra = tuple(found) if found else ()
        if computed and not any(BRIDGE_NAME in note for note in notes + extra):
            extra += (COMPUTED_NOTE,)  # both outputs say which values the lab did not report
        items.append(
            ResultItem(
                key,
                codes[key],
                shown,
                low_shown,
                flag,
                derived_from=derived_from,
                computed_here=computed,
                notes=notes + extra + range_notes,
                high=high_shown,
                range_text=range_text,
                other_ranges=others,
            )
        )

    lab_set = pred.reference_set if pred is not None else None
    ref = {"dlco": d.reference_dlco, "kco": d.reference_kco, "va": d.reference_va}
    add(
        "dlco", r.dlco, low=lln.dlco if lln else None, path="results.dlco", reference=ref["dlco"], reference_set=lab_set
    )
    add("va", r.va, low=lln.va if lln else None, path="results.va", reference=ref["va"], reference_set=lab_set)
    if r.kco is not None:
        add("kco", r.kco, low=lln.kco if lln else None, path="results.kco", reference=ref["kco"], reference_set=lab_set)
    else:
        add(
            "kco",
            d.kco,
            low=lln.kco if lln else None,
            derived_from=("dlco", "va"),
            computed=True,
            reference=ref["kco"],
            reference_set=lab_set,
        )
    if d.dlco_hb_adjusted is not None:
        # The bridge's own Cotes adjustment whenever Hb is known: a lab's value (possibly the
        # wrong way round) is never forwarded as the Hb-adjusted result; it is named in a note.
        lab_value = r.dlco_hb_adjusted
        said = f"; the lab reported {_text(show(lab_value))}" if lab_value is not None else ""
        add(
            "dlco_hb_adjusted",
            d.dlco_hb_adjusted,
            derived_from=("dlco", "hemoglobin"),
            computed=True,
            path="results.dlco_hb_adjusted",
            notes=(f"Adjusted to standard haemoglobin (Cotes) by {BRIDGE_NAME}{said}.",),
            replaces_lab_value=True,
        )
    else:  # the bridge cannot recompute it (no usable sex): the lab's value, with its findings
        add(
            "dlco_hb_adjusted",
            r.dlco_hb_adjusted,
            derived_from=("dlco", "hemoglobin"),
            path="results.dlco_hb_adjusted",
        )
    add(
        "dlco_pressure_adjusted",
        d.dlco_pressure_adjusted,
        derived_from=("dlco", "barometric_pressure"),
        computed=True,
        notes=("DLCO x (1 + 0.0031 (PIO2 - 150)), PIO2 = FIO2 x (PB - 47), computed by dlco-bridge",),
    )
    # GLI-2017, computed here: predicted, per cent predicted and z-score of each result.
    for name in ("dlco", "kco", "va"):
        reference = ref[name]
        if reference is None:
            continue
        compared = _compared_from(name, reference.basis, d)
        note = (f"Reference set {GLI_SOURCE}.",)
        add(f"{name}_predicted", reference.predicted, computed=True, notes=note)
        add(
            f"{name}_percent_predicted",
            reference.percent_predicted,
            derived_from=(*compared, f"{name}_predicted"),
            computed=True,
            notes=note,
        )
        add(
            f"{name}_z_score",
            Quantity(value=round(reference.z_score, 2), unit=Z_SCORE_UNIT, decimals=2),
            derived_from=(*compared, f"{name}_predicted"),
            computed=True,
            notes=(f"{reference.reference_set} z-score: {reference.band}, from the {_basis(reference)}.",),
        )
    # The lab's own predicted values (another reference set): kept under keys of their own.
    if pred is not None:
        lab_note = (f"Reference set {lab_set or 'not named by the lab'}: the lab's predicted value, as reported.",)
        add("lab_dlco_predicted", pred.dlco, notes=lab_note)
        add("lab_kco_predicted", pred.kco, notes=lab_note)
        add("lab_va_predicted", pred.va, notes=lab_note)
    lab_pct_note = (
        f"Per cent of the lab's predicted value (reference set {lab_set or 'not named'}), computed by {BRIDGE_NAME}.",
    )
    # Per cent predicted compares the value the site's reference_basis names (S17: adjusted to sea level).
    add(
        "lab_dlco_percent_predicted",
        d.dlco_percent_predicted,
        derived_from=(*_compared_from("dlco", d.dlco_basis, d), "lab_dlco_predicted"),
        computed=True,
        notes=lab_pct_note,
    )
    add(
        "lab_kco_percent_predicted",
        d.kco_percent_predicted,
        derived_from=(*_compared_from("kco", d.kco_basis, d), "lab_kco_predicted"),
        computed=True,
        notes=lab_pct_note,
    )
    add(
        "lab_va_percent_predicted",
        d.va_percent_predicted,
        derived_from=("va", "lab_va_predicted"),
        computed=True,
        notes=lab_pct_note,
    )
    add("tlc", r.tlc)
    add("barometric_pressure", c.barometric_pressure)
    blood = {
        key: Supporting(key, codes[key], show(q))
        for key, q in (("hemoglobin", c.hemoglobin), ("carboxyhemoglobin", c.carboxyhemoglobin))
        if q is not None
    }
    present = {item.key for item in items}  # blood values are not items: derivedFrom drops them
    items = [_keep_present_sources(item, present) if item.derived_from else item for item in items]
    if blood:
        items = [_with_supporting(item, blood) for item in items]
    errors = [f for f in outcome.findings if f.severity is Severity.ERROR and f.path not in replaced]
    items = _questioned(items, paths, errors)
    if by_path:
        carried = {note for item in items for note in item.notes}
        attached = {path for path, notes in by_path.items() if carried.intersection(notes)}
    else:
        attached = set()  # no finding to attach: nothing to collect
    return ReportContent(tuple(items), _report_notes(outcome, attached, say, tables.grades))


def _text(q: Quantity) -> str:
    return f"{q.text()} {q.unit}"


def _reference_note(reference: ReferenceValue, show: Callable[[Quantity], Quantity]) -> str:
    """The GLI-2017 values of a result in one sentence, in the destination's units."""
    return (
        f"{reference.reference_set}: predicted {_text(show(reference.predicted))}, "
        f"LLN {_text(show(reference.lln))}, ULN {_text(show(reference.uln))}, z-score {reference.z_score:.2f} "
        f"({reference.band}), {reference.percent_predicted.text()} % predicted, "
        f"from the {_basis(reference)}; computed by {BRIDGE_NAME}."
    )


def _compared_from(name: str, basis: ComparedBasis | None, d: Derived) -> tuple[str, ...]:
    """The items a per cent predicted or z-score rests on: the result, or its adjusted value and what adjusted it."""
    if basis is None or basis == "measured":
        return (name,)
    if basis == "pressure_adjusted":
        if name == "dlco" and d.dlco_pressure_adjusted is not None:
            return ("dlco_pressure_adjusted",)
        return (name, "barometric_pressure")
    hb = ("dlco_hb_adjusted",) if name == "dlco" and d.dlco_hb_adjusted is not None else (name, "hemoglobin")
    return (*hb, "barometric_pressure") if basis == "hb_and_pressure_adjusted" else hb


def _basis(reference: ReferenceValue) -> str:
    if reference.basis == "measured":
        return "measured value"
    return f"measured value {BASIS_WORDS[reference.basis]}"


def _questioned(items: list[ResultItem], paths: dict[str, str], errors: list[Finding]) -> list[ResultItem]:
    """Mark the items an ERROR finding concerns (only allowed ones reach the emitters).

    An item is questioned by an error at its path or at a path above it (``results`` covers
    ``results.dlco``), and by a questioned item it was derived from. An error that concerns no
    emitted item (``manoeuvres``, ``patient.sex``) questions the whole report.
    """
    if not errors:
        return items

    def covers(finding: Finding, path: str) -> bool:
        return path == finding.path or path.startswith(finding.path + ".")

    every = any(not any(covers(f, p) for p in paths.values()) for f in errors)
    codes: dict[str, tuple[str, ...]] = {}
    for item in items:
        path = paths.get(item.key)
        direct = tuple(f.code for f in errors if every or (path is not None and covers(f, path)))
        inherited = tuple(code for key in item.derived_from for code in codes.get(key, ()))
        found = tuple(dict.fromkeys(direct + inherited))
        if found:
            codes[item.key] = found
    marked = []
    for item in items:
        found = codes.get(item.key, ())
        if found:
            note = f"Not final: sent although the bridge found an error ({', '.join(found)}), as the site allows."
            item = replace(item, questionable=True, notes=(*item.notes, note))
        marked.append(item)
    return marked


def _keep_present_sources(item: ResultItem, present: set[str]) -> ResultItem:
    if not item.derived_from:
        return item
    kept = tuple(key for key in item.derived_from if key in present)
    if kept == item.derived_from:
        return item
    return replace(item, derived_from=kept)


def _with_supporting(item: ResultItem, blood: dict[str, Supporting]) -> ResultItem:
    supporting = tuple(blood[key] for key in _SUPPORTED_BY.get(item.key, ()) if key in blood)
    return replace(item, supporting=supporting) if supporting else item


def supporting_text(value: Supporting) -> str:
    """The note that carries a blood value in HL7 v2 (after the OBX of the result it qualifies)."""
    return (
        f"{value.code.display} {value.quantity.text()} {value.quantity.unit} ({value.code.code}), "
        "reported with the test: supporting data, not a result of this test."
    )


def _report_notes(
    outcome: Outcome, attached: set[str], say: Callable[[Quantity], str], grades: GradeTable
) -> tuple[str, ...]:
    """Report-level notes: quality grade, reference set, and the findings no item carries."""
    notes: list[str] = []
    d, s = outcome.derived, outcome.session
    if d.session_grade is not None:
        basis = "".join(f"; {caveat}" for caveat in d.grade_not_evaluated) + _repeatability_note(d, grades)
        notes.append(f"Test quality grade {d.session_grade} ({len(s.manoeuvres)} manoeuvres{basis}).")
    if d.quality_caution is not None:
        notes.append(f"Interpret with caution: {d.quality_caution}.")
    pred = s.results.predicted
    if pred is not None and pred.reference_set:
        notes.append(f"Reference values: {pred.reference_set}.")
    graded = [
        f"{label} z {r.z_score:.2f} ({r.band})"
        for label, r in (("DLCO", d.reference_dlco), ("KCO", d.reference_kco), ("VA", d.reference_va))
        if r is not None
    ]
    if graded:
        notes.append(f"Reference values computed by {BRIDGE_NAME}: {GLI_SOURCE}; " + ", ".join(graded) + ".")
    notes.extend(_finding_note(f, say) for f in outcome.findings if f.path not in attached)
    return tuple(notes)


def _repeatability_note(d: Derived, grades: GradeTable) -> str:
    """``; repeatable by the ATS/ERS 2005 criterion, ...`` when a criterion other than the default decided it.

    Under the default criterion a repeatable session says nothing more (the caution and the
    NOT_REPEATABLE finding name the criterion when it is not repeatable); under another one the
    reported mean rests on a limit a reader would not assume, so the grade note names it either way.
    """
    name = d.repeatability_criterion
    if d.repeatable is None or name is None or name == DEFAULT_REPEATABILITY:
        return ""
    rule = grades.criterion(name)
    return f"; {'repeatable' if d.repeatable else 'not repeatable'} by the {rule.standard} criterion, {rule.limits}"
