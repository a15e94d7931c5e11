"""Identifier searches: expected resources batched into OR-lists, and the answers matched back (pure).

Owns: which search parameter finds each resource type by identifier (Provenance has no
identifier in R4: it is found by its first entity's identifier, the session's key), the query of
one batch (``Type?param=system|value,system|value&_count=N``; the comma ORs the values, the
token's characters escaped as ``fhir_references.token`` escapes them everywhere), batching by
query length, and the verdict on each expected resource of a batch from the resources the
search returned. The query of a whole identifier system (``system|``) finds what is held
under it, for the unexpected ones.
source: FHIR R4 search.html, token search ([system]|[code], [system]|) and "Escaping Search
Parameters"; several values of one parameter separated by "," match any of them; _count; paging
by the Bundle's link "next" (http.html, "Paging")
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from bridge.emit.fhir_references import token, token_part
from bridge.reconcile.engine import ExpectedResource, Held, Verdict, classify, held_of

SEARCH_PARAMETER = MappingProxyType(
    {
        "Observation": "identifier",
        "DiagnosticReport": "identifier",
        "Patient": "identifier",
        "Provenance": "entity:identifier",  # R4 Provenance has no identifier; its entity names the source
    }
)
# A request line of about 8 kB is what many servers and proxies accept by default; the query of
# one batch stays well under it.  # common practice
MAX_QUERY_CHARS = 6000
MAX_PER_BATCH = 100  # identifiers in one OR-list, whatever their length
MAX_COUNT = 1000  # the page size asked for (a server may give fewer; "next" brings the rest)
SCAN_COUNT = 100  # the page size of a whole system's scan: small answers keep the memory of a long scan flat


@dataclass(frozen=True, slots=True)
class Batch:
    """Expected resources of one type looked for in one search."""

    resource_type: str
    expected: tuple[ExpectedResource, ...]

    def query(self) -> str:
        """``Type?param=token,token&_count=N``, relative to the server's base URL."""
        tokens = ",".join(token(e.identifier_system, e.identifier_value) for e in self.expected)
        # Room for a duplicate of every one: a page holds what the batch finds on most servers.
        count = min(MAX_COUNT, max(10, 2 * len(self.expected)))
        return f"{self.resource_type}?{SEARCH_PARAMETER[self.resource_type]}={tokens}&_count={count}"


def whole_system(resource_type: str, system: str) -> str:
    """The query of every ``resource_type`` held under the identifier ``system`` (``system|``)."""
    return f"{resource_type}?{SEARCH_PARAMETER[resource_type]}={token_part(system)}|&_count={SCAN_COUNT}"


def batches(expected: Iterable[ExpectedResource], limit: int = MAX_QUERY_CHARS) -> Iterator[Batch]:
    """Expected resources grouped by type into batches whose query fits ``limit`` characters.

    Streams: a batch leaves as soon as it is full, the unfinished ones at the end. A resource
    type no search parameter is known for is refused (ValueError): it would never be found.
    """
    open_batches: dict[str, tuple[list[ExpectedResource], int]] = {}
    for item in expected:
        kind = item.resource_type
        if kind not in SEARCH_PARAMETER:
            raise ValueError(f"no identifier search for {kind}")
        cost = len(token(item.identifier_system, item.identifier_value)) + 1
        items, used = open_batches.get(kind, ([], len(kind) + len(SEARCH_PARAMETER[kind]) + 20))
        if items and (used + cost > limit or len(items) >= MAX_PER_BATCH):
            yield Batch(kind, tuple(items))
            items, used = [], len(kind) + len(SEARCH_PARAMETER[kind]) + 20
        items.append(item)
        open_batches[kind] = (items, used + cost)
    for kind, (items, _) in open_batches.items():
        if items:
            yield Batch(kind, tuple(items))


def judge_batch(batch: Batch, resources: Sequence[Mapping[str, Any]]) -> list[Verdict]:
    """The verdict on each resource of ``batch`` from what its search returned (every page).

    Only resources of the batch's type count (a search set may carry an OperationOutcome); one
    returned twice (on two pages) counts once.
    """
    by_identifier: dict[tuple[str, str], list[Held]] = {}
    for copy in unique_held(resources, batch.resource_type):
        for pair in dict.fromkeys(copy.identifiers):
            by_identifier.setdefault(pair, []).append(copy)
    return [classify(e, by_identifier.get((e.identifier_system, e.identifier_value), ())) for e in batch.expected]


def unique_held(resources: Iterable[Mapping[str, Any]], resource_type: str) -> list[Held]:
    """The resources of ``resource_type`` as :class:`Held`, each id once."""
    seen: dict[str, Held] = {}
    for resource in resources:
        if resource.get("resourceType") == resource_type:
            copy = held_of(resource)
            seen.setdefault(copy.id or f"(no id {len(seen)})", copy)
    return list(seen.values())
