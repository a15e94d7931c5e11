"""The stand-in's FHIR search: ``GET [base]/Type?identifier=...`` with OR-lists, ``_count`` and pages.

Owns reading a search's query (``identifier``, or a Provenance's ``entity:identifier``, each a
comma-separated list of tokens ``system|value``, ``system|`` or ``value``, with FHIR's backslash
escapes; ``_count``; ``_after``, the stand-in's own page marker: the last id of the page before)
and answering it with a ``searchset`` Bundle whose ``link`` "next" brings the following page. Any other parameter is a
400 OperationOutcome: a reconcile that asks for what the stand-in does not do should fail loudly,
not see an empty answer. It must not parse transactions or touch the store's tables itself.
source: FHIR R4 search.html (token search, "Escaping Search Parameters", _count, OR by ","),
http.html#paging and bundle.html (searchset, entry.search.mode "match")
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from urllib.parse import parse_qsl, urlencode

from bridge.service.receiver.store import ResourceStore, Token

DEFAULT_COUNT = 100
MAX_COUNT = 1000
PARAMETERS = {"Observation": "identifier", "DiagnosticReport": "identifier", "Patient": "identifier",
              "Provenance": "entity:identifier"}  # fmt: skip


class SearchRefused(Exception):
    """The search cannot be answered; the text goes into the OperationOutcome."""


@dataclass(frozen=True, slots=True)
class Search:
    """One search as the stand-in understood it."""

    kind: str
    param: str  # the index's name: identifier, or entity (Provenance's entity:identifier)
    tokens: tuple[Token, ...]
    count: int
    after: int  # the page starts after this resource id
    pairs: tuple[tuple[str, str], ...]  # the query without _after, to build the next page's link


def parse_search(kind: str, query: str) -> Search:
    """A search of ``kind`` from the query string (after the ``?``); SearchRefused when it is none the stand-in does."""
    parameter = PARAMETERS.get(kind)
    if parameter is None:
        raise SearchRefused(f"a search of {', '.join(PARAMETERS)}, got {kind or 'no type'}")
    pairs = parse_qsl(query, keep_blank_values=True, strict_parsing=False)
    tokens: list[Token] = []
    count, after = DEFAULT_COUNT, 0
    for name, value in pairs:
        if name == parameter:
            tokens.extend(_token(text) for text in _split(value, ","))
        elif name in ("_count", "_after"):
            if not value.isdigit():
                raise SearchRefused(f"{name}: a whole number, got {value!r}")
            count, after = (min(int(value), MAX_COUNT), after) if name == "_count" else (count, int(value))
        else:
            raise SearchRefused(f"the parameters {parameter}, _count (and _after): {name} is not searched here")
    if not tokens:
        raise SearchRefused(f"{parameter}=system|value (comma-separated for several)")
    kept = tuple((n, v) for n, v in pairs if n != "_after")
    return Search(kind, parameter.partition(":")[0], tuple(tokens), max(count, 1), after, kept)


def answer(store: ResourceStore, search: Search, base_url: str) -> bytes:
    """The searchset Bundle of one page, as JSON bytes (the stored bodies are written as they are)."""
    bodies, more = store.search(search.kind, search.param, list(search.tokens), search.after, search.count)
    here = f"{base_url}/{search.kind}?{urlencode(search.pairs)}"
    links = [{"relation": "self", "url": f"{here}&_after={search.after}" if search.after else here}]
    if more:
        links.append({"relation": "next", "url": f"{here}&_after={bodies[-1][0]}"})
    entries = ",".join(
        '{"fullUrl":' + json.dumps(f"{base_url}/{search.kind}/{rid}") + ',"resource":' + body
        + ',"search":{"mode":"match"}}'
        for rid, body in bodies
    )  # fmt: skip
    return ('{"resourceType":"Bundle","type":"searchset","link":' + json.dumps(links)
            + ',"entry":[' + entries + "]}").encode()  # fmt: skip


def _split(text: str, separator: str) -> list[str]:
    """``text`` split at each ``separator`` not escaped by a backslash (the escapes stay)."""
    parts, current, escaped = [], [], False
    for char in text:
        if escaped:
            current.append(char)
            escaped = False
        elif char == "\\":
            current.append(char)
            escaped = True
        elif char == separator:
            parts.append("".join(current))
            current = []
        else:
            current.append(char)
    parts.append("".join(current))
    return parts


def _unescape(text: str) -> str:
    out, escaped = [], False
    for char in text:
        if escaped or char != "\\":
            out.append(char)
            escaped = False
        else:
            escaped = True
    return "".join(out)


def _token(text: str) -> Token:
    """``system|value`` (both), ``system|`` (any value), ``|value`` (no system) or ``value`` (any system)."""
    pieces = _split(text, "|")
    if len(pieces) == 1:
        return None, _unescape(pieces[0])
    if len(pieces) != 2:
        raise SearchRefused(f"a token system|value, got {text!r}")
    system, value = _unescape(pieces[0]), _unescape(pieces[1])
    return system, value or None
