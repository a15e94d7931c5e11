"""Damage planted in the stand-in's store, for rehearsing ``reconcile`` (``stand-in --lose VALUE`` ...).

Owns what each kind of damage does to the resources found by an identifier value (any system; a
Provenance by its source file's ``sha256:...``), as a receiver might: ``lose`` forgets them,
``alter`` changes an Observation's value by one in its last digit (another resource gets status
``amended``), ``withdraw`` marks them ``entered-in-error``, ``duplicate`` stores a second copy,
``extra`` stores a copy under the identifier value ``<value>-extra`` (a resource the bridge never
sent). Each returns one line per resource touched; a value that finds nothing is a ``LookupError``.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from decimal import Decimal

from bridge.service.receiver.store import ResourceStore, StoredResource

KINDS = ("lose", "alter", "withdraw", "duplicate", "extra")


def plant(store: ResourceStore, kind: str, value: str) -> list[str]:
    """Apply one kind of damage to every resource found by ``value``; what was done, one line each."""
    found = store.by_token(value)
    if not found:
        raise LookupError(f"{value}: no resource found by this identifier value")
    return [_ACTIONS[kind](store, item) for item in found]


def _lose(store: ResourceStore, item: StoredResource) -> str:
    store.delete(item)
    return f"lost {item.reference}"


def _alter(store: ResourceStore, item: StoredResource) -> str:
    body = copy.deepcopy(item.body)
    quantity = body.get("valueQuantity")
    if isinstance(quantity, dict) and isinstance(quantity.get("value"), int | float):
        before = Decimal(repr(quantity["value"]))
        step = Decimal(1).scaleb(before.as_tuple().exponent)  # type: ignore[arg-type]  # one in the last digit
        quantity["value"] = float(before + step) if before.as_tuple().exponent else int(before + step)
        done = f"value {before} -> {quantity['value']}"
    else:
        body["status"] = "amended"
        done = "status -> amended"
    changed = store.change(item, body)
    return f"altered {changed.reference} ({done})"


def _withdraw(store: ResourceStore, item: StoredResource) -> str:
    changed = store.change(item, {**item.body, "status": "entered-in-error"})
    return f"withdrew {changed.reference} (status entered-in-error)"


def _duplicate(store: ResourceStore, item: StoredResource) -> str:
    twin = store.copy(item, f"{item.criteria}#copy-{item.id}", item.body)
    return f"duplicated {item.reference} as {twin.reference}"


def _extra(store: ResourceStore, item: StoredResource) -> str:
    body = copy.deepcopy(item.body)
    for identifier in body.get("identifier") or []:
        identifier["value"] = f"{identifier['value']}-extra"
    for entity in body.get("entity") or []:
        entity["what"]["identifier"]["value"] = f"{entity['what']['identifier']['value']}-extra"
    extra = store.copy(item, f"{item.criteria}#extra-{item.id}", body)
    return f"added {extra.reference} (a copy of {item.reference} under a value never sent)"


_ACTIONS: dict[str, Callable[[ResourceStore, StoredResource], str]] = {
    "lose": _lose,
    "alter": _alter,
    "withdraw": _withdraw,
    "duplicate": _duplicate,
    "extra": _extra,
}
