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
OUTPUT_REVISION = 4
# UCUM annotation for a z-score: a dimensionless number.  # source: UCUM, curly-brace annotations
Z_SCORE_UNIT = "{Zscore}"


# Which result each blood value qualifies: Hb and COHb both bear on the measured DLCO (ERS/ATS
# 2017 DLCO standard: report them with it); Hb is the input of the Hb-adjusted DLCO.
_SUPPORTED_BY = MappingProxyType({"dlco": ("hemoglobin", "carboxyhemoglobin"), "dlco_hb_adjusted": ("hemoglobin",)})


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
        return quantity_text(show(q))

    by_path: dict[str, list[str]] = {}
    for finding in outcome.findings:
        if finding.severity is not Severity.INFO:
            by_path.setdefault(finding.path, []).append(finding_note(finding, say))

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
            range_notes = (reference_note(reference, show),)
            if low is not None:
                others = ((show(low), lab_range),)
                range_notes += (f"{lab_range}: {quantity_text(show(low))}, as reported by the lab.",)
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
        said = f"; the lab reported {quantity_text(show(lab_value))}" if lab_value is not None else ""
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
            notes=(f"{reference.reference_set} z-score: {reference.band}, from the {basis_text(reference)}.",),
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
    return ReportContent(tuple(items), report_notes(outcome, attached, say, tables.grades))


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
