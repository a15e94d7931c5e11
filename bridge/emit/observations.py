"""What is emitted, independent of the standard: one :class:`ResultItem` per quantity.

Owns: choosing which quantities of an outcome become observations, their code, their value
in the destination's units (the lab's own digits when it reported in those units), the
reference range (GLI-2017 LLN-ULN, else the lab's lower limit of normal), the abnormal flag,
the GLI-2017 predicted value, per cent predicted and z-score beside the lab's own predicted
values (each labelled with its reference set), what a derived value was derived
from, and which notes go with each (findings, adjustments; their wording is ``notes``, the
shapes ``content``). Both the FHIR and the HL7 v2 emitters render this list, so the two
outputs always carry the same content. Pure.
"""

from __future__ import annotations

from dataclasses import replace
from types import MappingProxyType

from bridge.emit.content import Flag, ReportContent, ResultItem, Supporting
from bridge.emit.notes import (
    BRIDGE_NAME,
    COMPUTED_NOTE,
    GLI_RANGE_TEXT,
    GLI_SOURCE,
    LAB_RANGE_TEXT,
    basis_text,
    finding_note,
    quantity_text,
    reference_note,
    report_notes,
)
from bridge.model import ComparedBasis, Derived, Finding, Outcome, Quantity, ReferenceValue, Severity
from bridge.science.normalise import express
from bridge.science.units import UnitSystem
from bridge.tables import Tables

# The one place that says the emitted bytes changed: bump it with every change of what the
# same input produces (codes, values, identifiers, layout). It is part of the HL7 control id
# (MSH-10), so a receiver that drops repeated MSH-10s still takes the newer output.
OUTPUT_REVISION = 5
# UCUM annotation for a z-score: a dimensionless number.  # source: UCUM, curly-brace annotations
Z_SCORE_UNIT = "{Zscore}"


# Which result each blood value qualifies: Hb and COHb both bear on the measured DLCO (ERS/ATS
# 2017 DLCO standard: report them with it); Hb is the input of the Hb-adjusted DLCO.
_SUPPORTED_BY = MappingProxyType({"dlco": ("hemoglobin", "carboxyhemoglobin"), "dlco_hb_adjusted": ("hemoglobin",)})


def build_content(
    outcome: Outcome, tables: Tables, units: UnitSystem, hemoglobin_unit: str | None = None
) -> ReportContent:
    """The items and notes to emit for one outcome, in ``units`` (haemoglobin in ``hemoglobin_unit`` if set)."""
    b = _Builder(outcome, tables, units, hemoglobin_unit)
    _results(b)
    _adjusted_results(b)
    _gli_values(b)
    _lab_predicted_values(b)
    b.add("tlc", outcome.session.results.tlc)
    b.add("barometric_pressure", outcome.session.conditions.barometric_pressure)
    return b.content()


class _Builder:
    """The items of one outcome as they are added, and what the notes and the error marks need.

    One per :func:`build_content` call; never shared.
    """

    def __init__(self, outcome: Outcome, tables: Tables, units: UnitSystem, hemoglobin_unit: str | None) -> None:
        self.outcome, self.tables, self.units = outcome, tables, units
        self.codes = tables.codes.codes
        catalogue = tables.units
        self.targets: dict[str, str] = {}  # unit -> the unit it is shown in, looked up once per call
        if hemoglobin_unit is not None:
            for code, unit in catalogue.units.items():
                if unit.dimension == "mass_concentration":
                    self.targets[code] = hemoglobin_unit
        self.by_path: dict[str, list[str]] = {}  # record path -> the notes of its WARNING and ERROR findings
        for finding in outcome.findings:
            if finding.severity is not Severity.INFO:
                self.by_path.setdefault(finding.path, []).append(finding_note(finding, self.say))
        self.items: list[ResultItem] = []
        self.paths: dict[str, str] = {}  # item key -> the record path whose ERROR findings question it
        self.replaced: set[str] = set()  # paths of lab values not forwarded: their errors question nothing
        predicted = outcome.session.results.predicted
        self.lab_set = predicted.reference_set if predicted is not None else None

    def show(self, q: Quantity) -> Quantity:
        """The quantity in the destination's units."""
        if q.unit == Z_SCORE_UNIT:
            return q  # a plain number in every unit system
        catalogue = self.tables.units
        target = self.targets.get(q.unit)
        if target is None:
            target = self.targets[q.unit] = catalogue.display_unit(catalogue.units[q.unit].dimension, self.units)
        if q.unit == target:
            return q  # what express() returns for the same unit
        return express(q, target, catalogue)

    def say(self, q: Quantity) -> str:
        return quantity_text(self.show(q))

    def add(
        self,
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
    ) -> None:
        """One item; ``replaces_lab_value``: the findings at ``path`` are about the lab's value,
        which this recomputed value replaces, so they are carried as notes but do not question it."""
        if q is None:
            return
        if replaces_lab_value:
            self.replaced.add(path)
        elif path:
            self.paths[key] = path
        show = self.show
        shown = show(q)
        flag: Flag | None = None
        low_shown = high_shown = None
        range_text = None
        others: tuple[tuple[Quantity, str], ...] = ()
        range_notes: tuple[str, ...] = ()
        lab_range = f"{LAB_RANGE_TEXT}, {self.lab_set or 'reference set not named by the lab'}"
        if reference is not None:  # GLI-2017: the range and the flag from the z-score; the lab's LLN beside it
            low_shown, high_shown, flag = show(reference.lln), show(reference.uln), reference.flag
            range_text = GLI_RANGE_TEXT
            range_notes = (reference_note(reference, show),)
            if low is not None:
                others = ((show(low), lab_range),)
                range_notes += (f"{lab_range}: {quantity_text(show(low))}, as reported by the lab.",)
        elif low is not None:
            low_shown = show(low)
            flag = "L" if shown.value < low_shown.value else "N"
            range_text = lab_range if self.lab_set else LAB_RANGE_TEXT
        found = self.by_path.get(path) if path and self.by_path else None
        extra = tuple(found) if found else ()
        if computed and not any(BRIDGE_NAME in note for note in notes + extra):
            extra += (COMPUTED_NOTE,)  # both outputs say which values the lab did not report
        self.items.append(
            ResultItem(
                key,
                self.codes[key],
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

    def content(self) -> ReportContent:
        """The items with their blood values and error marks, and the report's notes."""
        outcome, c = self.outcome, self.outcome.session.conditions
        blood = {
            key: Supporting(key, self.codes[key], self.show(q))
            for key, q in (("hemoglobin", c.hemoglobin), ("carboxyhemoglobin", c.carboxyhemoglobin))
            if q is not None
        }
        present = {item.key for item in self.items}  # blood values are not items: derivedFrom drops them
        items = [_keep_present_sources(item, present) if item.derived_from else item for item in self.items]
        if blood:
            items = [_with_supporting(item, blood) for item in items]
        errors = [f for f in outcome.findings if f.severity is Severity.ERROR and f.path not in self.replaced]
        items = _questioned(items, self.paths, errors)
        attached: set[str] = set()  # the record paths whose finding notes an item carries
        if self.by_path:
            carried = {note for item in items for note in item.notes}
            attached = {path for path, notes in self.by_path.items() if carried.intersection(notes)}
        return ReportContent(tuple(items), report_notes(outcome, attached, self.say, self.tables.grades))


def _results(b: _Builder) -> None:
    """DLCO, VA and KCO as the lab reported them (KCO computed when it did not), with their ranges."""
    r, d = b.outcome.session.results, b.outcome.derived
    lln = r.predicted.lower_limits if r.predicted is not None else None
    b.add("dlco", r.dlco, low=lln.dlco if lln else None, path="results.dlco", reference=d.reference_dlco)
    b.add("va", r.va, low=lln.va if lln else None, path="results.va", reference=d.reference_va)
    if r.kco is not None:
        b.add("kco", r.kco, low=lln.kco if lln else None, path="results.kco", reference=d.reference_kco)
    else:
        kco_lln = lln.kco if lln else None
        b.add("kco", d.kco, low=kco_lln, derived_from=("dlco", "va"), computed=True, reference=d.reference_kco)


def _adjusted_results(b: _Builder) -> None:
    """DLCO adjusted to standard haemoglobin and to sea level."""
    r, d = b.outcome.session.results, b.outcome.derived
    if d.dlco_hb_adjusted is not None:
        # The bridge's own Cotes adjustment whenever Hb is known: a lab's value (possibly the
        # wrong way round) is never forwarded as the Hb-adjusted result; it is named in a note.
        lab_value = r.dlco_hb_adjusted
        said = f"; the lab reported {b.say(lab_value)}" if lab_value is not None else ""
        b.add(
            "dlco_hb_adjusted",
            d.dlco_hb_adjusted,
            derived_from=("dlco", "hemoglobin"),
            computed=True,
            path="results.dlco_hb_adjusted",
            notes=(f"Adjusted to standard haemoglobin (Cotes) by {BRIDGE_NAME}{said}.",),
            replaces_lab_value=True,
        )
    else:  # the bridge cannot recompute it (no usable sex): the lab's value, with its findings
        b.add(
            "dlco_hb_adjusted", r.dlco_hb_adjusted, derived_from=("dlco", "hemoglobin"), path="results.dlco_hb_adjusted"
        )
    b.add(
        "dlco_pressure_adjusted",
        d.dlco_pressure_adjusted,
        derived_from=("dlco", "barometric_pressure"),
        computed=True,
        notes=("DLCO x (1 + 0.0031 (PIO2 - 150)), PIO2 = FIO2 x (PB - 47), computed by dlco-bridge",),
    )


def _gli_values(b: _Builder) -> None:
    """GLI-2017, computed here: predicted, per cent predicted and z-score of each result."""
    d = b.outcome.derived
    for name, reference in (("dlco", d.reference_dlco), ("kco", d.reference_kco), ("va", d.reference_va)):
        if reference is None:
            continue
        compared = _compared_from(name, reference.basis, d)
        note = (f"Reference set {GLI_SOURCE}.",)
        b.add(f"{name}_predicted", reference.predicted, computed=True, notes=note)
        b.add(
            f"{name}_percent_predicted",
            reference.percent_predicted,
            derived_from=(*compared, f"{name}_predicted"),
            computed=True,
            notes=note,
        )
        b.add(
            f"{name}_z_score",
            Quantity(value=round(reference.z_score, 2), unit=Z_SCORE_UNIT, decimals=2),
            derived_from=(*compared, f"{name}_predicted"),
            computed=True,
            notes=(f"{reference.reference_set} z-score: {reference.band}, from the {basis_text(reference)}.",),
        )


def _lab_predicted_values(b: _Builder) -> None:
    """The lab's own predicted values (another reference set), under keys of their own, and per cent of them."""
    pred, d = b.outcome.session.results.predicted, b.outcome.derived
    if pred is not None:
        lab_note = (f"Reference set {b.lab_set or 'not named by the lab'}: the lab's predicted value, as reported.",)
        b.add("lab_dlco_predicted", pred.dlco, notes=lab_note)
        b.add("lab_kco_predicted", pred.kco, notes=lab_note)
        b.add("lab_va_predicted", pred.va, notes=lab_note)
    note = (
        f"Per cent of the lab's predicted value (reference set {b.lab_set or 'not named'}), computed by {BRIDGE_NAME}.",
    )
    # Per cent predicted compares the value the site's reference_basis names (S17: adjusted to sea level).
    dlco_from = (*_compared_from("dlco", d.dlco_basis, d), "lab_dlco_predicted")
    kco_from = (*_compared_from("kco", d.kco_basis, d), "lab_kco_predicted")
    b.add("lab_dlco_percent_predicted", d.dlco_percent_predicted, derived_from=dlco_from, computed=True, notes=note)
    b.add("lab_kco_percent_predicted", d.kco_percent_predicted, derived_from=kco_from, computed=True, notes=note)
    va_from = ("va", "lab_va_predicted")
    b.add("lab_va_percent_predicted", d.va_percent_predicted, derived_from=va_from, computed=True, notes=note)


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
