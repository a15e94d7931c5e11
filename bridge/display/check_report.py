"""Human and machine renderings of checked outcomes (the ``check`` command's output).

Owns: turning an :class:`bridge.model.Outcome` into readable text or a JSON-ready dict, in SI
or traditional units. Pure: returns strings and dicts; the CLI prints them.
"""

from __future__ import annotations

from dataclasses import fields, is_dataclass
from typing import Any

from bridge.display.lung_volume_text import lung_volume_lines
from bridge.display.spirometry_text import spirometry_lines
from bridge.emit.settings import HEMOGLOBIN_DIMENSION
from bridge.model import ComparedBasis, Finding, Outcome, Quantity, ReferenceValue, Severity
from bridge.science.compared import BASIS_WORDS
from bridge.science.normalise import express
from bridge.science.unit_text import for_people
from bridge.science.units import UnitSystem
from bridge.tables import Tables
from bridge.values import plain

CAUTION = (
    "dlco-bridge is not a medical device: it normalises, recomputes and flags data. "
    "Local policy and licensed clinical practice decide whether and how results are used."
)

_RESULT_LABELS = (
    ("dlco", "DLCO"),
    ("va", "VA (BTPS)"),
    ("kco", "KCO"),
    ("dlco_hb_adjusted", "DLCO Hb-adjusted"),
    ("tlc", "TLC single-breath"),
)
_CONDITION_LABELS = (
    ("barometric_pressure", "barometric pressure"),
    ("altitude", "altitude"),
    ("hemoglobin", "haemoglobin"),
    ("carboxyhemoglobin", "carboxyhaemoglobin"),
    ("room_temperature", "room temperature"),
)
_DERIVED_LABELS = (
    ("kco", "KCO = DLCO/VA"),
    ("dlco_hb_adjusted", "DLCO adjusted to standard Hb"),
    ("dlco_cohb_adjusted", "DLCO adjusted for COHb"),
    ("dlco_pressure_adjusted", "DLCO adjusted to sea level"),
    ("kco_pressure_adjusted", "KCO adjusted to sea level"),
    ("kco_hb_adjusted", "KCO adjusted to standard Hb"),
    ("dlco_hb_pressure_adjusted", "DLCO adjusted to Hb, sea level"),
    ("kco_hb_pressure_adjusted", "KCO adjusted to Hb, sea level"),
    ("dlco_from_manoeuvres", "DLCO from manoeuvre gas data"),
    ("va_from_manoeuvres", "VA from manoeuvre gas data"),
)
# Per cent of the lab's predicted values: each shown with the value it compares.
_LAB_PERCENT_LABELS = (
    ("dlco", "DLCO % of the lab's predicted"),
    ("kco", "KCO % of the lab's predicted"),
    ("va", "VA % of the lab's predicted"),
)


def shown(quantity: Quantity, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> Quantity:
    """The quantity in the unit its dimension is shown in for ``units``; haemoglobin in ``hb_unit`` if set.

    The same rule as the outputs (``emit.observations``): ``emit.hemoglobin_unit`` names the unit
    of every mass concentration, whatever the unit system.
    """
    dimension = tables.units.units[quantity.unit].dimension
    if hb_unit is not None and dimension == HEMOGLOBIN_DIMENSION:
        return express(quantity, hb_unit, tables.units)
    return express(quantity, tables.units.display_unit(dimension, units), tables.units)


def _text(quantity: Quantity, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> str:
    q = shown(quantity, tables, units, hb_unit)
    text = f"{q.text()} {for_people(q.unit)}"  # people read the trade's spelling; --json keeps UCUM
    original = quantity.original
    if original is not None and (for_people(original.unit) != for_people(q.unit) or original.value != q.text()):
        text += f"   (as sent: {original.value} {original.unit})"
    return text


def finding_text(finding: Finding, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> str:
    """A finding's message with its quantities in ``units``."""

    def say(quantity: Quantity) -> str:
        q = shown(quantity, tables, units, hb_unit)
        return f"{q.text()} {for_people(q.unit)}"

    return finding.text(say)


def _row(
    label: str, quantity: Quantity | None, tables: Tables, units: UnitSystem, hb_unit: str | None = None
) -> list[str]:
    return [] if quantity is None else [f"    {label:<32}{_text(quantity, tables, units, hb_unit)}"]


def _lab_basis(outcome: Outcome, name: str) -> ComparedBasis:
    """The value the lab's own predicted value of ``name`` is compared with."""
    return (outcome.derived.lab_basis if name != "va" else None) or "measured"


def _reference_rows(outcome: Outcome, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> list[str]:
    """GLI-2017 predicted, LLN, ULN, z-score and band of each result, the lab's own values beside them.

    Every comparison says in brackets which value it compares (measured, adjusted to sea level, ...).
    """
    d, pred = outcome.derived, outcome.session.results.predicted
    lab_set = pred.reference_set or "reference set not stated" if pred is not None else None
    if lab_set and pred is not None and pred.altitude_adjusted:
        lab_set += ", predicted values adjusted to the altitude of the test"
    lines = ["  reference values (GLI-2017 computed by dlco-bridge" + (f"; the lab's: {lab_set})" if lab_set else ")")]
    for name, label in (("dlco", "DLCO"), ("kco", "KCO"), ("va", "VA")):
        ref: ReferenceValue | None = getattr(d, f"reference_{name}")
        if ref is not None:
            basis = BASIS_WORDS[ref.basis]
            lines.append(
                f"    {label + ' GLI-2017':<32}predicted {_brief(ref.predicted, tables, units, hb_unit)}  "
                f"LLN {_brief(ref.lln, tables, units, hb_unit)}  ULN {_brief(ref.uln, tables, units, hb_unit)}  "
                f"z {ref.z_score:.2f} ({ref.band})  {ref.percent_predicted.text()} %  [{basis}]"
            )
        lab_predicted = getattr(pred, name) if pred is not None else None
        lab_lln = getattr(pred.lower_limits, name) if pred is not None and pred.lower_limits is not None else None
        if lab_predicted is not None or lab_lln is not None:
            parts = [f"predicted {_brief(lab_predicted, tables, units, hb_unit)}"] if lab_predicted is not None else []
            parts += [f"LLN {_brief(lab_lln, tables, units, hb_unit)}"] if lab_lln is not None else []
            percent = getattr(d, f"{name}_percent_predicted")
            parts += [f"{percent.text()} %"] if percent is not None else []
            basis = f"  [{BASIS_WORDS[_lab_basis(outcome, name)]}]" if percent is not None else ""
            lines.append(f"    {label + ' lab':<32}" + "  ".join(parts) + basis)
    if d.reference_not_computed is not None:
        lines.append(f"    GLI-2017 not computed: {d.reference_not_computed}")
    return lines if len(lines) > 1 else []


def _brief(quantity: Quantity, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> str:
    q = shown(quantity, tables, units, hb_unit)
    return f"{q.text()} {for_people(q.unit)}"


def outcome_text(outcome: Outcome, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> str:
    """A readable report of one outcome: record, recomputed values, findings."""
    s, d = outcome.session, outcome.derived
    p = s.patient
    lines = [
        f"{outcome.source}  test {s.test_id}",
        f"  patient {p.id} ({p.id_system})  {p.sex.value}  born {p.birth_date}  "
        f"age {d.age_years:.1f} y  height {p.height.text()} cm",
        f"  performed {s.performed_at.isoformat()}  {s.lab.name}" + (f" / {s.lab.site}" if s.lab.site else ""),
        f"  results ({units} units)",
    ]
    for name, label in _RESULT_LABELS:
        lines += _row(label, getattr(s.results, name), tables, units, hb_unit)
    lines += _reference_rows(outcome, tables, units, hb_unit)
    lines += spirometry_lines(
        outcome,
        lambda q: _text(q, tables, units, hb_unit),
        lambda q: _brief(q, tables, units, hb_unit),
    )
    lines += lung_volume_lines(
        outcome,
        lambda q: _text(q, tables, units, hb_unit),
        lambda q: _brief(q, tables, units, hb_unit),
    )
    lines.append("  conditions")
    for name, label in _CONDITION_LABELS:
        lines += _row(label, getattr(s.conditions, name), tables, units, hb_unit)
    lines.append("  recomputed by dlco-bridge")
    for name, label in _DERIVED_LABELS:
        lines += _row(label, getattr(d, name), tables, units, hb_unit)
    for name, label in _LAB_PERCENT_LABELS:
        percent = getattr(d, f"{name}_percent_predicted")
        if percent is not None:
            lines.append(f"    {label:<32}{percent.text()} %  [{BASIS_WORDS[_lab_basis(outcome, name)]}]")
    for m in d.manoeuvres:
        parts = [f"grade {m.grade}" + (f" ({'; '.join(m.grade_reasons)})" if m.grade_reasons else "")]
        if m.va is not None:
            parts.append(f"VA {_text(m.va, tables, units, hb_unit)}")
        if m.dlco is not None:
            parts.append(f"DLCO {_text(m.dlco, tables, units, hb_unit)}")
        lines.append(f"    manoeuvre {m.index + 1}: " + ", ".join(parts))
    if d.session_grade is not None:
        basis = "".join(f"; {caveat}" for caveat in d.grade_not_evaluated)
        lines.append(f"    session quality grade {d.session_grade}" + (f" ({basis[2:]})" if basis else ""))
    if d.reported_manoeuvres:
        used = ", ".join(str(i + 1) for i in d.reported_manoeuvres)
        verdict = {True: "repeatable", False: "not repeatable", None: "nothing to compare with"}[d.repeatable]
        if d.repeatable is not None and d.repeatability_criterion is not None:
            verdict += f" ({tables.grades.criterion(d.repeatability_criterion).description})"
        lines.append(f"    reported value from manoeuvre(s) {used}: {verdict}")
    if d.quality_caution is not None:
        lines.append(f"    interpret with caution: {d.quality_caution}")
    lines.append(f"  findings ({len(outcome.findings)})")
    for f in outcome.findings:
        lines.append(f"    {f.severity.value.upper():<8}{f.code}  {f.path}")
        lines.append(f"            {finding_text(f, tables, units, hb_unit)}")
    if not outcome.findings:
        lines.append("    none")
    return "\n".join(lines)


def outcome_json(outcome: Outcome, tables: Tables, units: UnitSystem, hb_unit: str | None = None) -> dict[str, Any]:
    """A JSON-ready dict of one outcome with quantities in ``units``."""

    def convert(node: Any) -> Any:
        if isinstance(node, Quantity):
            q = shown(node, tables, units, hb_unit)
            out: dict[str, Any] = {"value": float(q.text()), "unit": q.unit}
            if node.original is not None:
                out["original"] = plain(node.original)
            return out
        if isinstance(node, dict):
            return {k: convert(v) for k, v in node.items() if v is not None}
        if isinstance(node, list | tuple):
            return [convert(v) for v in node]
        return node

    session = _shallow(outcome.session)
    derived = _shallow(outcome.derived)
    return {
        "source": outcome.source,
        "sha256": outcome.source_sha256,
        "units": units,
        "session": convert(session),
        "derived": convert(derived),
        "findings": [
            {
                "code": f.code,
                "severity": f.severity.value,
                "path": f.path,
                "message": finding_text(f, tables, units, hb_unit),
            }
            for f in outcome.findings
        ],
        "worst": _worst(outcome),
    }


def _shallow(model: Any) -> Any:
    """Model -> dict keeping Quantity objects (so they can be shown in the chosen units)."""
    if isinstance(model, Quantity):
        return model
    if is_dataclass(model):
        return {f.name: _shallow(getattr(model, f.name)) for f in fields(model)}
    if isinstance(model, tuple):
        return [_shallow(v) for v in model]
    if isinstance(model, dict):
        return {key: _shallow(value) for key, value in model.items()}
    if hasattr(model, "isoformat"):
        return model.isoformat()
    if hasattr(model, "value") and isinstance(getattr(model, "value", None), str):
        return model.value  # enums
    return model


def _worst(outcome: Outcome) -> str:
    order = [Severity.INFO, Severity.WARNING, Severity.ERROR]
    worst = max((order.index(f.severity) for f in outcome.findings), default=-1)
    return order[worst].value if worst >= 0 else "none"
