"""What is emitted, independent of the standard: one :class:`ResultItem` per quantity.

Owns: choosing which quantities of an outcome become observations, their code, their value
in the destination's units (the lab's own digits when it reported in those units), the
reference range and abnormal flag (on the value they describe: the one per cent predicted and
the z-score compare), the predicted values of the one reference set the site charts
(``charted_predicted``: GLI-2017 computed here, or the lab's own) with the other kept in the
notes, the stated absence of a reference value the equations cannot give, what a derived value
was derived from, and which notes go with each (findings, adjustments; their wording is
``notes``, the shapes ``content``). Which results exist depends on the inputs present and the
site's settings, never on the values. Both the FHIR and the HL7 v2 emitters render this list,
so the two outputs always carry the same content. Pure.
"""

from __future__ import annotations

from dataclasses import replace

from bridge.emit.content import Flag, ReportContent, ResultGroup, ResultItem, Supporting
from bridge.emit.lung_volume_items import add_lung_volumes
from bridge.emit.notes import (
    BRIDGE_NAME,
    COMPUTED_NOTE,
    GLI_RANGE_TEXT,
    GLI_SOURCE,
    LAB_RANGE_TEXT,
    adjustment_note,
    basis_text,
    carboxyhemoglobin_note,
    finding_note,
    gli_absent_note,
    lab_note,
    not_charted,
    quantity_text,
    range_elsewhere_note,
    reference_note,
    report_notes,
)
from bridge.emit.settings import DEFAULT_CHARTED_PREDICTED, HEMOGLOBIN_DIMENSION, ChartedPredicted
from bridge.emit.spirometry_items import add_spirometry
from bridge.model import ComparedBasis, Finding, Outcome, Quantity, ReferenceValue, Severity
from bridge.science.compared import basis_key
from bridge.science.normalise import express
from bridge.science.units import UnitSystem
from bridge.tables import Tables

# The one place that says the emitted bytes changed: bump it with every change of what the
# same input produces (codes, values, identifiers, layout). It is part of the HL7 control id
# (MSH-10), so a receiver that drops repeated MSH-10s still takes the newer output.
OUTPUT_REVISION = 5
# UCUM annotation for a z-score: a dimensionless number.  # source: UCUM, curly-brace annotations
Z_SCORE_UNIT = "{Zscore}"
# The results that are compared with reference values, and how people name them.
_COMPARED = (("dlco", "DLCO"), ("kco", "KCO"), ("va", "VA"))
HB_LOCAL_ID = "hb"  # the contained Hb's id in FHIR; derivedFrom names it "#hb"


def build_content(
    outcome: Outcome,
    tables: Tables,
    units: UnitSystem,
    hemoglobin_unit: str | None = None,
    charted: ChartedPredicted = DEFAULT_CHARTED_PREDICTED,
) -> ReportContent:
    """The items and notes to emit for one outcome, in ``units`` (haemoglobin in ``hemoglobin_unit`` if set).

    ``charted``: whose predicted values are charted (``gli-2017`` or ``lab``); the other set is
    named in the notes of the result it concerns.
    """
    b = _Builder(outcome, tables, units, hemoglobin_unit, charted)
    _results(b)
    _adjusted_results(b)
    if charted == "lab":
        _lab_predicted_values(b)
    else:
        _gli_values(b)
    b.add("tlc", outcome.session.results.tlc)
    b.add("barometric_pressure", outcome.session.conditions.barometric_pressure)
    add_spirometry(b, outcome, tables)  # each spirometry phase a group of its own
    add_lung_volumes(b, outcome, tables)  # the static lung volumes, a group of their own
    return b.content()


class _Builder:
    """The items of one outcome as they are added, and what the notes and the error marks need.

    One per :func:`build_content` call; never shared.
    """

    def __init__(
        self, outcome: Outcome, tables: Tables, units: UnitSystem, hemoglobin_unit: str | None, charted: str
    ) -> None:
        self.outcome, self.tables, self.units, self.charted = outcome, tables, units, charted
        self.codes = tables.codes.codes
        catalogue = tables.units
        self.targets: dict[str, str] = {}  # unit -> the unit it is shown in, looked up once per call
        if hemoglobin_unit is not None:
            for code, unit in catalogue.units.items():
                if unit.dimension == HEMOGLOBIN_DIMENSION:
                    self.targets[code] = hemoglobin_unit
        self.by_path: dict[str, list[str]] = {}  # record path -> the notes of its WARNING and ERROR findings
        for finding in outcome.findings:
            if finding.severity is not Severity.INFO:
                self.by_path.setdefault(finding.path, []).append(finding_note(finding, self.say))
        self.items: list[ResultItem] = []
        self.groups: list[ResultGroup] = []  # the test groups besides the DLCO test (spirometry phases)
        self.paths: dict[str, str] = {}  # item key -> the record path whose ERROR findings question it
        self.replaced: set[str] = set()  # paths of lab values not forwarded: their errors question nothing
        predicted = outcome.session.results.predicted
        self.lab_set = predicted.reference_set if predicted is not None else None
        self.compared: dict[str, str] = {}  # quantity name -> the key of the item its comparison sits on
        self.comparisons: dict[str, _Comparison] = {}  # item key -> its range, flag and reference notes
        _comparisons(self)

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
        derived_from: tuple[str, ...] = (),
        computed: bool = False,
        path: str = "",
        notes: tuple[str, ...] = (),
        replaces_lab_value: bool = False,
    ) -> None:
        """One item; ``replaces_lab_value``: the findings at ``path`` are about the lab's value,
        which this recomputed value replaces, so they are carried as notes but do not question it.

        The range, flag and reference notes come from the comparison that sits on ``key``.
        """
        if q is None:
            return
        if replaces_lab_value:
            self.replaced.add(path)
        elif path:
            self.paths[key] = path
        shown = self.show(q)
        flag: Flag | None = None
        low_shown = high_shown = None
        range_text = None
        compared = self.comparisons.get(key)
        range_notes: tuple[str, ...] = ()
        if compared is not None:
            range_notes = compared.notes
            if compared.reference is not None:  # GLI-2017: the range and the flag from the z-score
                reference = compared.reference
                low_shown, high_shown, flag = self.show(reference.lln), self.show(reference.uln), reference.flag
                range_text = GLI_RANGE_TEXT
            elif compared.low is not None:  # the lab's lower limit of normal
                low_shown = self.show(compared.low)
                flag = "L" if shown.value < low_shown.value else "N"
                range_text = f"{LAB_RANGE_TEXT}, {self.lab_set}" if self.lab_set else LAB_RANGE_TEXT
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
                high=high_shown,
                range_text=range_text,
                derived_from=derived_from,
                computed_here=computed,
                notes=notes + extra + range_notes,
            )
        )

    def absent(self, key: str, reason: str) -> None:
        """A result sent without a value: the set of results does not depend on what could be computed."""
        self.items.append(ResultItem(key, self.codes[key], None, computed_here=True, notes=(reason,), absent=reason))

    def content(self) -> ReportContent:
        """The items with the blood values they were computed from and their error marks, and the report's notes."""
        outcome, c = self.outcome, self.outcome.session.conditions
        present = {item.key for item in self.items}  # blood values are not items: derivedFrom drops them
        hb = None
        if c.hemoglobin is not None:
            hb = Supporting("hemoglobin", self.codes["hemoglobin"], self.show(c.hemoglobin), HB_LOCAL_ID)
        items = [_with_sources(item, present, hb) if item.derived_from else item for item in self.items]
        if c.carboxyhemoglobin is not None:
            note = carboxyhemoglobin_note(self.codes["carboxyhemoglobin"], self.show(c.carboxyhemoglobin))
            items = [replace(item, notes=(*item.notes, note)) if item.key == "dlco" else item for item in items]
        errors = [f for f in outcome.findings if f.severity is Severity.ERROR and f.path not in self.replaced]
        items = _questioned(items, self.paths, errors)
        attached: set[str] = set()  # the record paths whose finding notes an item carries
        if self.by_path:
            carried = {note for item in items for note in item.notes}
            attached = {path for path, notes in self.by_path.items() if carried.intersection(notes)}
        notes = report_notes(outcome, attached, self.say, self.tables.grades)
        return ReportContent(tuple(items), notes, self.compared.get("dlco", "dlco"), tuple(self.groups))


class _Comparison:
    """What sits on the item a quantity is compared as: the GLI-2017 reference or the lab's LLN, and the notes."""

    __slots__ = ("low", "notes", "reference")

    def __init__(self, reference: ReferenceValue | None, low: Quantity | None, notes: tuple[str, ...]) -> None:
        self.reference, self.low, self.notes = reference, low, notes


def _comparisons(b: _Builder) -> None:
    """For DLCO, KCO and VA: the item the charted comparison sits on, with the other set's values as notes."""
    outcome = b.outcome
    r, d, pred = outcome.session.results, outcome.derived, outcome.session.results.predicted
    for name, label in _COMPARED:
        measured = {"dlco": r.dlco, "kco": r.kco or d.kco, "va": r.va}[name]
        if measured is None:
            continue
        gli_basis: ComparedBasis = {"dlco": d.dlco_basis, "kco": d.kco_basis}.get(name) or "measured"
        lab_basis: ComparedBasis = (d.lab_basis if name != "va" else None) or "measured"
        reference: ReferenceValue | None = getattr(d, f"reference_{name}")
        gli = reference_note(reference, b.show) if reference is not None else gli_absent_note(d.reference_not_computed)
        lab_predicted = getattr(pred, name) if pred is not None else None
        limits = pred.lower_limits if pred is not None else None
        lab_low = getattr(limits, name) if limits is not None else None
        lab = None
        if lab_predicted is not None or lab_low is not None:
            percent = getattr(d, f"{name}_percent_predicted")
            altitude = pred is not None and pred.altitude_adjusted and name != "va"
            lab = lab_note(b.lab_set, lab_predicted, lab_low, percent, lab_basis, altitude, b.say)
        if b.charted == "lab":
            key, comparison = basis_key(name, lab_basis), _Comparison(None, lab_low, (not_charted(gli, "the lab's"),))
        else:
            lab_notes = (not_charted(lab, "GLI-2017"),) if lab is not None else ()
            key, comparison = basis_key(name, gli_basis), _Comparison(reference, None, (gli, *lab_notes))
        b.compared[name] = key
        b.comparisons[key] = comparison
        if key != name:  # the result as measured points to the value its range and flag sit on
            display = b.codes[key].display
            b.comparisons[name] = _Comparison(None, None, (range_elsewhere_note(label, display),))


def _results(b: _Builder) -> None:
    """DLCO, VA and KCO as the lab reported them (KCO computed when it did not)."""
    r, d = b.outcome.session.results, b.outcome.derived
    b.add("dlco", r.dlco, path="results.dlco")
    b.add("va", r.va, path="results.va")
    if r.kco is not None:
        b.add("kco", r.kco, path="results.kco")
    else:
        b.add("kco", d.kco, derived_from=("dlco", "va"), computed=True)


def _adjusted_results(b: _Builder) -> None:
    """DLCO adjusted to standard haemoglobin, DLCO and KCO adjusted to sea level, and what the comparison needs."""
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
    # At sea level whenever a pressure or altitude is given (derive), whatever the numbers.
    for name in ("dlco", "kco"):
        b.add(
            f"{name}_pressure_adjusted",
            getattr(d, f"{name}_pressure_adjusted"),
            derived_from=(name, "barometric_pressure"),
            computed=True,
            notes=(adjustment_note(name.upper(), "pressure_adjusted"),),
        )
    # The Hb-based values other than the DLCO's own are sent when the charted comparison rests on them.
    hb_based: tuple[tuple[str, tuple[str, ...], ComparedBasis], ...] = (
        ("dlco_hb_pressure_adjusted", ("dlco", "hemoglobin", "barometric_pressure"), "hb_and_pressure_adjusted"),
        ("kco_hb_adjusted", ("kco", "hemoglobin"), "hb_adjusted"),
        ("kco_hb_pressure_adjusted", ("kco", "hemoglobin", "barometric_pressure"), "hb_and_pressure_adjusted"),
    )
    for key, sources, basis in hb_based:
        if key in b.compared.values():
            label = key.partition("_")[0].upper()
            b.add(key, getattr(d, key), derived_from=sources, computed=True, notes=(adjustment_note(label, basis),))


def _gli_values(b: _Builder) -> None:
    """GLI-2017, computed here: predicted, per cent predicted and z-score of each result, or their stated absence."""
    d = b.outcome.derived
    for name, _ in _COMPARED:
        compared = b.compared.get(name)
        if compared is None:  # no such result: nothing to compare
            continue
        reference: ReferenceValue | None = getattr(d, f"reference_{name}")
        if reference is None:  # outside the equations (age 86, say): sent, but without a value
            reason = gli_absent_note(d.reference_not_computed)
            for kind in ("predicted", "percent_predicted", "z_score"):
                b.absent(f"{name}_{kind}", reason)
            continue
        note = (f"Reference set {GLI_SOURCE}.",)
        of = (f"Reference set {GLI_SOURCE}; per cent predicted of the {basis_text(reference.basis)}.",)
        sources = (compared, f"{name}_predicted")
        b.add(f"{name}_predicted", reference.predicted, computed=True, notes=note)
        b.add(f"{name}_percent_predicted", reference.percent_predicted, derived_from=sources, computed=True, notes=of)
        b.add(
            f"{name}_z_score",
            Quantity(value=round(reference.z_score, 2), unit=Z_SCORE_UNIT, decimals=2),
            derived_from=sources,
            computed=True,
            notes=(f"{reference.reference_set} z-score: {reference.band}, from the {basis_text(reference.basis)}.",),
        )


def _lab_predicted_values(b: _Builder) -> None:
    """The lab's own predicted values (another reference set) and per cent of them, charted instead of GLI-2017's."""
    pred, d = b.outcome.session.results.predicted, b.outcome.derived
    if pred is None:
        return
    lab_note_text = (f"Reference set {b.lab_set or 'not named by the lab'}: the lab's predicted value, as reported.",)
    for name, _ in _COMPARED:
        compared = b.compared.get(name)
        if compared is None:
            continue
        basis: ComparedBasis = (d.lab_basis if name != "va" else None) or "measured"
        b.add(f"lab_{name}_predicted", getattr(pred, name), notes=lab_note_text)
        note = (
            f"Per cent of the lab's predicted value (reference set {b.lab_set or 'not named'}), from the "
            f"{basis_text(basis)}, computed by {BRIDGE_NAME}.",
        )
        sources = (compared, f"lab_{name}_predicted")
        percent = getattr(d, f"{name}_percent_predicted")
        b.add(f"lab_{name}_percent_predicted", percent, derived_from=sources, computed=True, notes=note)


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


def _with_sources(item: ResultItem, present: set[str], hb: Supporting | None) -> ResultItem:
    """derivedFrom keeps the items that exist; the Hb a value was computed from travels with it."""
    kept = tuple(key for key in item.derived_from if key in present)
    supporting = (hb,) if hb is not None and "hemoglobin" in item.derived_from else ()
    if kept == item.derived_from and not supporting:
        return item
    return replace(item, derived_from=kept, supporting=supporting)
