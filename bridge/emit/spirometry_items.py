"""The spirometry items of a report: each phase a group, each value with its reference values (pure).

Owns which spirometry quantities are emitted and how: per phase (``spirometry_pre``,
``spirometry_post``, a :class:`ResultGroup` each: a FHIR panel with ``hasMember``, an HL7 OBR),
the lab's FEV1, FVC, FEV1/FVC, FEF25-75 and PEF with the range (LLN-ULN) and flag of the site's
spirometry set on the value; its predicted value, per cent predicted and z-score as results
computed here (stated absences when the set has an equation but gives no value for the person,
so which results exist never depends on the numbers); after the bronchodilator, the ERS/ATS 2022
response of FEV1 and FVC. Codes come from ``mappings/codes.toml``; ``bridge.emit.observations``
calls :func:`add_spirometry` with its builder.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from types import MappingProxyType
from typing import Protocol

from bridge.emit.content import ResultGroup, ResultItem
from bridge.model import Outcome, Quantity
from bridge.spirometry_record import BronchodilatorChange, PhaseDerived, SpirometryPhase, SpirometryReference
from bridge.tables import Code, Tables

Z_SCORE_UNIT = "{Zscore}"  # source: UCUM, curly-brace annotations (as emit.observations)
_KEYS = (("fev1", "FEV1"), ("fvc", "FVC"), ("fev1_fvc", "FEV1/FVC"), ("fef25_75", "FEF25-75"), ("pef", "PEF"))
_REFERENCED = frozenset({"fev1", "fvc", "fev1_fvc", "fef25_75"})  # quantities some spirometry set has equations for
_PHASE_WORDS = (("pre", "before the bronchodilator"), ("post", "after the bronchodilator"))
# The test group of every spirometry item key (and of each group's own key): where a correction's
# withdrawal of that result goes (bridge.emit.status).
GROUP_OF: Mapping[str, str] = MappingProxyType(
    {
        **{f"spirometry_{phase}": f"spirometry_{phase}" for phase, _ in _PHASE_WORDS},
        **{
            f"{key}_{phase}{kind}": f"spirometry_{phase}"
            for key, _ in _KEYS
            for phase, _ in _PHASE_WORDS
            for kind in ("", "_predicted", "_percent_predicted", "_z_score")
        },
        **{f"{key}_bronchodilator_response": "spirometry_post" for key in ("fev1", "fvc")},
    }
)


class Builder(Protocol):
    """What of ``emit.observations``' builder this module uses."""

    codes: Mapping[str, Code]
    items: list[ResultItem]
    groups: list[ResultGroup]

    def show(self, q: Quantity) -> Quantity: ...

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
    ) -> None: ...

    def absent(self, key: str, reason: str) -> None: ...


def add_spirometry(b: Builder, outcome: Outcome, tables: Tables) -> None:
    """The items of each phase present, in a group of their own; the response after the bronchodilator."""
    spiro, derived = outcome.session.spirometry, outcome.derived.spirometry
    if spiro is None or derived is None:
        return
    reference_set, not_computed = derived.reference_set, derived.reference_not_computed
    sets = tables.spirometry_equations.values()
    covered = {str(q) for e in sets if e.info.title == reference_set for q in e.info.quantities}
    responses = {"fev1": derived.fev1_response, "fvc": derived.fvc_response}
    for phase, words in _PHASE_WORDS:
        record: SpirometryPhase | None = getattr(spiro, phase)
        done: PhaseDerived | None = getattr(derived, phase)
        if record is None or done is None:
            continue
        group = f"spirometry_{phase}"
        start = len(b.items)
        for key, label in _KEYS:
            value: Quantity | None = getattr(record.results, key)
            if value is None:
                continue
            item_key = f"{key}_{phase}"
            b.add(item_key, value, path=f"spirometry.{phase}.results.{key}")
            reference = done.references.get(key)
            if reference is not None:
                b.items[-1] = ranged(b, b.items[-1], reference, label, words)
            if key in covered and key in _REFERENCED:
                reference_items(b, item_key, label, words, reference, reference_set, not_computed)
        if phase == "post":
            for key, label in (("fev1", "FEV1"), ("fvc", "FVC")):
                change = responses.get(key)
                if change is not None and f"{key}_pre" in {i.key for i in b.items}:
                    _response(b, key, label, change, reference_set)
        if len(b.items) > start:
            b.items[start:] = [replace(item, group=group) for item in b.items[start:]]
            b.groups.append(ResultGroup(group, b.codes[group]))


def ranged(b: Builder, item: ResultItem, ref: SpirometryReference, label: str, words: str) -> ResultItem:
    """The value with its range (LLN-ULN) and flag from the site's spirometry set."""
    note = (
        f"{label} {words} against {ref.reference_set}: predicted {_say(b, ref.predicted)}, LLN {_say(b, ref.lln)}, "
        f"ULN {_say(b, ref.uln)}, z-score {ref.z_score:.2f} ({ref.impairment if ref.flag != 'H' else 'above the ULN'})."
    )
    return replace(
        item,
        low=b.show(ref.lln),
        high=b.show(ref.uln),
        flag=ref.flag,
        range_text=f"LLN-ULN (5th-95th centile), {ref.reference_set}",
        notes=(*item.notes, note),
    )


def reference_items(
    b: Builder,
    item_key: str,
    label: str,
    words: str,
    ref: SpirometryReference | None,
    reference_set: str,
    not_computed: str | None,
) -> None:
    """Predicted, per cent predicted and z-score of one value, or their stated absence."""
    if ref is None:
        reason = f"No {reference_set} reference value: {not_computed or 'not computed'}."
        for kind in ("predicted", "percent_predicted", "z_score"):
            b.absent(f"{item_key}_{kind}", reason)
        return
    note = (f"Reference set {reference_set}, computed by dlco-bridge.",)
    sources = (item_key, f"{item_key}_predicted")
    b.add(f"{item_key}_predicted", ref.predicted, computed=True, notes=note)
    b.add(f"{item_key}_percent_predicted", ref.percent_predicted, derived_from=sources, computed=True, notes=note)
    z = Quantity(value=ref.z_score, unit=Z_SCORE_UNIT, decimals=2)
    band = ref.impairment if ref.flag != "H" else "above the ULN"
    z_note = (f"{reference_set} z-score of {label} {words}: {band}.",)
    b.add(f"{item_key}_z_score", z, derived_from=sources, computed=True, notes=z_note)


def _response(b: Builder, key: str, label: str, change: BronchodilatorChange, reference_set: str) -> None:
    verdict = "a significant response" if change.significant else "no significant response"
    note = (
        f"{label} changed by {_say(b, change.change)} after the bronchodilator: per cent of the predicted value "
        f"({reference_set}), {verdict} (ERS/ATS 2022: more than 10 %).",
    )
    sources = (f"{key}_pre", f"{key}_post")
    b.add(
        f"{key}_bronchodilator_response", change.percent_of_predicted, derived_from=sources, computed=True, notes=note
    )


def _say(b: Builder, q: Quantity) -> str:
    shown = b.show(q)
    return f"{shown.text()} {shown.unit}"
