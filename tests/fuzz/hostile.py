"""Hypothesis strategies for hostile ``dlco-result/1`` inputs, each drawn as a :class:`Case` (label + bytes).

Four families:

- :func:`structural_mutations`: a bundled sample (08 is the malformed one) with keys replaced,
  deleted or added at random paths, values of the wrong type, deep nesting, odd encodings;
- :func:`targeted_mutations`: the numbers and units the arithmetic depends on: zeros,
  negatives, ``Infinity``/``NaN``, huge (``1e308``, ``1e400`` as text) and tiny (``1e-320``)
  values, units unknown or of the wrong dimension, gas fractions 0/equal/1, breath-hold 0;
- :func:`byte_mutations`: truncation at a random byte, flipped or random bytes, UTF-16,
  UTF-32, Latin-1 with non-ASCII names, text that is not JSON;
- :func:`schema_documents`: documents generated from docs/dlco-result-1.schema.json (objects
  walked by :class:`SchemaWalk`, every leaf by hypothesis-jsonschema), as the schema allows
  them and with units drawn from the catalogue.

All names are invented. Numbers that Python cannot hold as a float (``1e400``, a 4,400-digit
integer) are written into the JSON text verbatim through :class:`Raw`.
"""

from __future__ import annotations

import copy
import json
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import date, datetime
from functools import cache
from pathlib import Path
from typing import Any

from hypothesis import strategies as st
from hypothesis_jsonschema import from_schema

from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parents[2]
SAMPLE_PATHS = sorted((ROOT / "samples").glob("0*.json"))
SAMPLE_BYTES = {p.name: p.read_bytes() for p in SAMPLE_PATHS}
SAMPLE_TREES = {name: json.loads(data) for name, data in SAMPLE_BYTES.items()}
WITH_MANOEUVRES = [name for name, tree in SAMPLE_TREES.items() if tree.get("manoeuvres")]
FORMAT_SCHEMA_PATH = ROOT / "docs" / "dlco-result-1.schema.json"

Path_ = tuple[str | int, ...]


@dataclass(frozen=True, slots=True)
class Case:
    """One fuzz input: how it was made, and its bytes."""

    label: str
    data: bytes

    def __repr__(self) -> str:
        shown = self.data if len(self.data) <= 300 else self.data[:300] + b"..."
        return f"Case({self.label!r}, {len(self.data)} bytes: {shown!r})"


@dataclass(frozen=True, slots=True)
class Raw:
    """JSON text written verbatim where a value goes (numbers no float can hold, deep nesting)."""

    text: str

    def __repr__(self) -> str:
        return self.text if len(self.text) <= 40 else f"{self.text[:20]}...({len(self.text)} chars)"


# ---------- hostile leaves ----------

SPECIAL_NUMBERS: tuple[float | int, ...] = (
    0, 0.0, -0.0, 1, -1, -0.5, 1e308, -1e308, 1.7976931348623157e308, 1e-320, 5e-324, -5e-324,
    math.inf, -math.inf, math.nan, 1e16, 2**63, -(2**63), 10**30, 0.9999999999999999, 1.0000000000000002,
)  # fmt: skip
RAW_NUMBERS = (
    "1e400", "-1e400", "1e-400", "1e308", "-1e308", "1e-320", "4.9e-324", "-0", "-0.0", "0e0", "0E-400",
    "1" + "0" * 400,  # an integer no float holds
    "9" * 4400,  # more digits than Python's int() accepts by default
    "0.1000000000000000000000000000001",  # more reported decimals than a Quantity keeps
    "7.4600", "123456789012345678901234567890.5", "1E+2", "1.0e-7",
)  # fmt: skip
ODD_TEXT = (
    "", " ", "\t", "\r\n", "\r", "\n", "\x00", "\x1c\x0b", "|^~\\&", "\\E\\", "\\.br\\", "MSH|^~\\&|", "\ud800",
    "\udfff", "\U0001f4a8", "\u01c4", "\u202e", "\ufeff", "\u0130", "a" * 300, "\u00df" * 80,
    "Fictiv\u00e9 \u00d8lander", "null", "NaN", "1e308", "2026-02-30", "2026-03-02T25:00:00+00:00",
    "0001-01-01", "9999-12-31", "9999-12-31T23:59:59-23:59", "2026-03-02T09:15:00", "2026-03-02T09:15:00+14:00",
    "0001-01-01T00:00:00+00:00", "LOW-2026-0001", "dlco-result/1", "urn:x", "https://example.invalid/id|x",
)  # fmt: skip
ODD_UNITS = (
    "", " ", "furlong", "mL/min/mmHg ", "MMOL/MIN/KPA", "\u00b5mol/min/kPa", "\u3396", "\uff4d\uff2c", "L\u200b",
    "mmol/min/kPa\x00", "10*3", "[iU]", "mL/min/mm[Hg]/L/L", "K", "[degF]", "mL/(min.mm[Hg])", "\ud800",
    "\U0001f4a8", "L" * 1000, "null", "1/min",
)  # fmt: skip
DEPTHS = (20, 200, 900, 1100, 5000, 100_000)


@cache
def catalogue_units() -> tuple[str, ...]:
    """Every unit code and alias of the bundled catalogue (each valid for some field, wrong for most)."""
    units = load_tables().units
    return tuple(sorted(units.units)) + tuple(sorted(units.aliases))


def _schema_keys(node: Any) -> Iterator[str]:
    if isinstance(node, dict):
        yield from node.get("properties", {})
        for value in node.values():
            yield from _schema_keys(value)
    elif isinstance(node, list):
        for value in node:
            yield from _schema_keys(value)


@cache
def format_schema() -> dict[str, Any]:
    schema: dict[str, Any] = json.loads(FORMAT_SCHEMA_PATH.read_text(encoding="utf-8"))
    return schema


@cache
def known_keys() -> tuple[str, ...]:
    """Field names the format knows (an added key is then often valid, but in the wrong place)."""
    return tuple(sorted(set(_schema_keys(format_schema())) | {"value", "unit", "decimals", "original"}))


def deep_nesting(depth: int, kind: str) -> Raw:
    if kind == "list":
        return Raw("[" * depth + "]" * depth)
    return Raw('{"value":' * depth + "0" + "}" * depth)


numbers = st.one_of(
    st.sampled_from(SPECIAL_NUMBERS),
    st.sampled_from(RAW_NUMBERS).map(Raw),
    st.floats(),
    st.integers(),
    st.floats(-1e6, 1e6).map(lambda x: round(x, 3)),  # few decimals: gets past the reader's digit limit
    st.floats(0, 1).map(lambda x: round(x, 5)),
)
texts = st.one_of(st.sampled_from(ODD_TEXT), st.text(max_size=30))
units = st.one_of(st.sampled_from(ODD_UNITS), st.deferred(lambda: st.sampled_from(catalogue_units())))
deep = st.builds(deep_nesting, st.sampled_from(DEPTHS), st.sampled_from(("list", "object")))
leaves = st.one_of(numbers, texts, st.none(), st.booleans())
quantities = st.fixed_dictionaries(
    {"value": st.one_of(numbers, leaves), "unit": st.one_of(units, leaves)},
    optional={
        "decimals": st.one_of(st.integers(-3, 400), leaves),
        "original": st.fixed_dictionaries({"value": texts, "unit": units}),
    },
)
hostile_values = st.one_of(
    leaves,
    quantities,
    deep,
    st.lists(st.one_of(leaves, quantities), max_size=3),
    st.dictionaries(st.one_of(st.deferred(lambda: st.sampled_from(known_keys())), texts), leaves, max_size=3),
)


# ---------- the parsed tree ----------


def all_paths(node: Any, prefix: Path_ = ()) -> Iterator[Path_]:
    """Every value's path, the root first, depth first."""
    yield prefix
    if isinstance(node, dict):
        for key, value in node.items():
            yield from all_paths(value, (*prefix, key))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from all_paths(value, (*prefix, i))


def get_at(tree: Any, path: Path_) -> Any:
    for part in path:
        tree = tree[part]
    return tree


def set_at(tree: Any, path: Path_, value: Any) -> Any:
    """The tree with the value at ``path`` replaced (the root itself when the path is empty)."""
    if not path:
        return value
    get_at(tree, path[:-1])[path[-1]] = value
    return tree


def shown(path: Path_) -> str:
    text = ""
    for part in path:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else part)
    return text or "(root)"


def dumps(tree: Any, indent: int | None = 2, ascii_only: bool = True) -> str:
    """JSON text as Python writes it (NaN, Infinity, -Infinity literals), :class:`Raw` verbatim."""
    raws: list[str] = []

    def default(value: Any) -> str:
        if isinstance(value, Raw):
            raws.append(value.text)
            return f"\x00raw{len(raws) - 1}\x00"
        raise TypeError(f"not JSON: {type(value).__name__}")

    text = json.dumps(tree, indent=indent, ensure_ascii=ascii_only, default=default)
    for i, raw in enumerate(raws):
        text = text.replace(f'"\\u0000raw{i}\\u0000"', raw, 1)
    return text


ENCODINGS = ("utf-8", "utf-8-sig", "utf-16", "utf-16-le", "utf-32", "latin-1", "cp1252")


def encoded(text: str, encoding: str) -> bytes:
    """The text in an encoding; lone surrogates go through as their raw code units."""
    if encoding in ("latin-1", "cp1252"):
        return text.encode(encoding, errors="replace")
    return text.encode(encoding, errors="surrogatepass")


def document_bytes(draw: st.DrawFn, tree: Any, label: str) -> Case:
    """Serialise a tree: mostly plain UTF-8, sometimes another layout or encoding."""
    layout = draw(st.sampled_from(("indented", "indented", "indented", "compact", "raw unicode", "other encoding")))
    if layout == "other encoding":
        encoding = draw(st.sampled_from(ENCODINGS))
        return Case(f"{label}; {encoding}", encoded(dumps(tree, ascii_only=False), encoding))
    text = dumps(tree, indent=None if layout == "compact" else 2, ascii_only=layout != "raw unicode")
    return Case(f"{label}; {layout}", encoded(text, "utf-8"))


# ---------- structural mutations ----------

STRUCTURAL_OPS = (
    "like for like",
    "like for like",
    "replace",
    "delete",
    "delete",
    "add",
    "empty",
    "grow list",
    "retype",
)


def _mutate_structure(draw: st.DrawFn, tree: Any) -> tuple[Any, str]:
    paths = list(all_paths(tree))[1:]  # not the root: top-level non-objects are in byte_mutations
    path = draw(st.sampled_from(paths))
    target = get_at(tree, path)
    op = draw(st.sampled_from(STRUCTURAL_OPS))
    if op == "like for like":
        value = draw(_like(target))
        return set_at(tree, path, value), f"{shown(path)} := {value!r}"
    if op == "delete":
        parent = get_at(tree, path[:-1])
        del parent[path[-1]]
        return tree, f"del {shown(path)}"
    if op == "add" and isinstance(target, dict):
        key = draw(st.one_of(st.sampled_from(known_keys()), texts))
        value = draw(hostile_values)
        target[key] = value
        return tree, f"{shown((*path, key))} += {value!r}"
    if op == "empty":
        value = draw(st.sampled_from(({}, [], "", None)))
        return set_at(tree, path, value), f"{shown(path)} := {value!r}"
    if op == "grow list" and isinstance(target, list) and target:
        times = draw(st.sampled_from((2, 10, 200)))
        target[:] = [copy.deepcopy(target[0]) for _ in range(times)]
        return tree, f"{shown(path)} := {times} copies of its first item"
    if op == "retype":
        value = _retyped(target)
        return set_at(tree, path, value), f"{shown(path)} := {value!r}"
    value = draw(hostile_values)
    return set_at(tree, path, value), f"{shown(path)} := {value!r}"


def _like(value: Any) -> st.SearchStrategy[Any]:
    """Hostile values of the same JSON type (text for text, a quantity for a quantity, ...)."""
    if isinstance(value, bool):
        return st.booleans()
    if isinstance(value, int | float):
        return numbers
    if isinstance(value, str):
        return texts
    if isinstance(value, dict) and "unit" in value:
        return quantities
    if isinstance(value, list):
        return st.lists(st.sampled_from(value).map(copy.deepcopy), max_size=5) if value else st.just([])
    return hostile_values


def _retyped(value: Any) -> Any:
    """The same content in another JSON type (number <-> text, object -> list of its values)."""
    if isinstance(value, Raw):
        return value.text
    if isinstance(value, bool) or value is None:
        return str(value).lower()
    if isinstance(value, int | float):
        return str(value)
    if isinstance(value, str):
        try:
            return float(value)
        except ValueError:
            return [value]
    if isinstance(value, dict):
        return list(value.values())
    return {str(i): item for i, item in enumerate(value)}


@st.composite
def structural_mutations(draw: st.DrawFn) -> Case:
    """A bundled sample with 1-4 structural changes at random paths (one, mostly)."""
    name = draw(st.sampled_from(sorted(SAMPLE_TREES)))
    tree: Any = copy.deepcopy(SAMPLE_TREES[name])
    done = []
    for _ in range(draw(st.sampled_from((1, 1, 1, 2, 2, 3, 4)))):
        tree, what = _mutate_structure(draw, tree)
        done.append(what)
    return document_bytes(draw, tree, f"{name}: {'; '.join(done)}")


# ---------- targeted mutations ----------

GAS_FIELDS = ("inspired_co_fraction", "inspired_tracer_fraction", "alveolar_co_fraction", "alveolar_tracer_fraction")
GAS_PATTERNS: dict[str, Callable[[dict[str, Any]], tuple[float, float, float, float]]] = {
    "all 0": lambda m: (0.0, 0.0, 0.0, 0.0),
    "all 1": lambda m: (1.0, 1.0, 1.0, 1.0),
    "alveolar = inspired": lambda m: (m["inspired_co_fraction"], m["inspired_tracer_fraction"]) * 2,
    "alveolar CO 0": lambda m: (m["inspired_co_fraction"], m["inspired_tracer_fraction"], 0.0, 0.003),
    "alveolar tracer 0": lambda m: (m["inspired_co_fraction"], m["inspired_tracer_fraction"], 0.001, 0.0),
    "inspired CO 0": lambda m: (0.0, m["inspired_tracer_fraction"], 0.001, 0.002),
    "inspired tracer 0": lambda m: (m["inspired_co_fraction"], 0.0, 0.001, 0.002),
    "alveolar > inspired": lambda m: (0.001, 0.001, 0.5, 0.5),
    "all tiny": lambda m: (5e-324, 5e-324, 5e-324, 5e-324),
    "one 1": lambda m: (1.0, m["inspired_tracer_fraction"], m["alveolar_co_fraction"], m["alveolar_tracer_fraction"]),
}
# Values the formulas divide by or take the logarithm of: each is set to zero (and the like) often.
KEY_QUANTITIES = (
    ("results", "dlco"), ("results", "va"), ("results", "kco"), ("results", "dlco_hb_adjusted"), ("results", "tlc"),
    ("results", "predicted", "dlco"), ("results", "predicted", "kco"), ("results", "predicted", "va"),
    ("results", "predicted", "lower_limits", "dlco"), ("results", "predicted", "lower_limits", "kco"),
    ("results", "predicted", "lower_limits", "va"), ("conditions", "hemoglobin"), ("conditions", "carboxyhemoglobin"),
    ("conditions", "barometric_pressure"), ("conditions", "altitude"), ("conditions", "room_temperature"),
    ("patient", "height"), ("patient", "weight"),
    ("manoeuvres", 0, "breath_hold_time"), ("manoeuvres", 0, "inspired_volume"), ("manoeuvres", 0, "vital_capacity"),
    ("manoeuvres", 0, "sample_collection_time"), ("manoeuvres", 0, "instrument_dead_space"),
    ("manoeuvres", 0, "anatomic_dead_space"), ("manoeuvres", 0, "reported", "dlco"),
    ("manoeuvres", 0, "reported", "va"),
)  # fmt: skip
NEAR_ZERO = (0, 0.0, -0.0, 1e-320, 5e-324, Raw("1e-400"), Raw("0E-400"), -1, 1e308, Raw("1e400"), math.inf, math.nan)
TARGETED_OPS = ("number", "number", "key quantity", "key quantity", "unit", "gas", "conditions", "names")
NON_ASCII_NAMES = ("Fictivé", "Ølander-Fictive", "Æsa Fictive", "Fictive-Müß", "Ñandú")  # all Latin-1


def _mutate_target(draw: st.DrawFn, tree: dict[str, Any]) -> str:
    op = draw(st.sampled_from(TARGETED_OPS))
    if op == "number":
        numeric = [p for p in all_paths(tree) if type(get_at(tree, p)) in (int, float)]
        path = draw(st.sampled_from(numeric))
        value = draw(numbers)
        set_at(tree, path, value)
        return f"{shown(path)} := {value!r}"
    if op == "key quantity":
        path = draw(st.sampled_from(KEY_QUANTITIES))
        value = draw(st.one_of(st.sampled_from(NEAR_ZERO), numbers))
        quantity = _quantity_at(tree, path)
        quantity["value"] = value
        return f"{shown(path)}.value := {value!r}"
    if op == "unit":
        units_at = [p for p in all_paths(tree) if p and p[-1] == "unit"]
        path = draw(st.sampled_from(units_at))
        unit = draw(units)
        set_at(tree, path, unit)
        return f"{shown(path)} := {unit!r}"
    if op == "gas":
        manoeuvres = _manoeuvres(tree)
        i = draw(st.integers(0, len(manoeuvres) - 1))
        pattern = draw(st.sampled_from(sorted(GAS_PATTERNS)))
        manoeuvres[i].update(zip(GAS_FIELDS, GAS_PATTERNS[pattern](manoeuvres[i]), strict=True))
        return f"manoeuvres[{i}] gas fractions: {pattern}"
    if op == "conditions":
        fields = ("inspired_o2_fraction", "alveolar_co2_fraction")
        field = draw(st.sampled_from(fields))
        value = draw(st.one_of(st.sampled_from((0.0, 1.0, 5e-324, 0.9999999999999999)), numbers))
        tree.setdefault("conditions", {})[field] = value
        return f"conditions.{field} := {value!r}"
    patient = tree.get("patient")
    if isinstance(patient, dict):
        patient["family"], patient["given"] = draw(st.permutations(NON_ASCII_NAMES))[:2]
    return "non-ASCII names"


def _manoeuvres(tree: dict[str, Any]) -> list[dict[str, Any]]:
    """The tree's manoeuvres; those of a sample that has some are grafted on when it has none."""
    if not tree.get("manoeuvres"):
        tree["manoeuvres"] = copy.deepcopy(SAMPLE_TREES[WITH_MANOEUVRES[0]]["manoeuvres"])
    manoeuvres: list[dict[str, Any]] = tree["manoeuvres"]
    return manoeuvres


def _quantity_at(tree: dict[str, Any], path: Path_) -> dict[str, Any]:
    """The quantity object at ``path``, created (with the unit of a sample) when missing."""
    if path[0] == "manoeuvres":
        _manoeuvres(tree)
    node: Any = tree
    for part in path[:-1]:
        node = node[part] if isinstance(part, int) else node.setdefault(part, {})
    found = node.get(path[-1])
    if not isinstance(found, dict):
        found = node[path[-1]] = {"value": 1, "unit": _sample_unit(path)}
    return found  # type: ignore[no-any-return]


def _sample_unit(path: Path_) -> str:
    for tree in SAMPLE_TREES.values():
        try:
            unit = get_at(tree, (*path, "unit"))
        except (KeyError, IndexError, TypeError):
            continue
        return str(unit)
    return "1"


@st.composite
def targeted_mutations(draw: st.DrawFn) -> Case:
    """A sample with 1-3 hostile values where the arithmetic and unit handling look."""
    name = draw(st.sampled_from(sorted(SAMPLE_TREES)))
    tree: dict[str, Any] = copy.deepcopy(SAMPLE_TREES[name])
    if draw(st.booleans()):
        _manoeuvres(tree)  # half the time with raw manoeuvres, so derive recomputes from them
    done = [_mutate_target(draw, tree) for _ in range(draw(st.integers(1, 3)))]
    return document_bytes(draw, tree, f"{name}: {'; '.join(done)}")


def sample_with(name: str, changes: dict[str, Any], manoeuvres: bool = False) -> Case:
    """A sample with fixed changes (``"results.dlco.value": 1e308``; ``None`` deletes); for @example."""
    tree: dict[str, Any] = copy.deepcopy(SAMPLE_TREES[name])
    if manoeuvres:
        _manoeuvres(tree)
    for dotted, value in changes.items():
        path: Path_ = tuple(int(p) if p.isdigit() else p for p in dotted.split("."))
        if value is None:
            del get_at(tree, path[:-1])[path[-1]]
        else:
            set_at(tree, path, value)
    label = "; ".join(f"{k} := {v!r}" for k, v in changes.items())
    return Case(f"{name}: {label}", dumps(tree).encode("utf-8"))


# ---------- byte-level mutations ----------

NOT_JSON = (
    b"", b" \n\t ", b"\xef\xbb\xbf", b"\xef\xbb\xbf\xef\xbb\xbf{}", b"null", b"[]", b'"dlco-result/1"', b"{", b"}",
    b'{"format": "dlco-result/1"}', b'{"format": "dlco-result/1",}', b'{"format": "dlco-result/1" // note\n}',
    b'{"format": "dlco-result/1", "format": "dlco-result/2"}', b"MSH|^~\\&|LAB|||\rPID|1\r", b"\x00" * 64,
    b'{"format": "dlco-result/1", "test_id": "\xff\xfe"}', b"\xff\xfe{\x00}\x00", b'{"format": "\\ud800"}',
)  # fmt: skip
BYTE_OPS = ("truncate", "truncate", "flip", "insert", "delete", "random", "encoding", "not json", "splice", "wrap deep")


@st.composite
def byte_mutations(draw: st.DrawFn) -> Case:
    """A sample's bytes (or a mutated sample's) truncated, corrupted, re-encoded or replaced."""
    if draw(st.integers(0, 3)) == 0:
        base = draw(st.one_of(structural_mutations(), targeted_mutations()))
    else:
        name = draw(st.sampled_from(sorted(SAMPLE_BYTES)))
        base = Case(name, SAMPLE_BYTES[name])
    data, label = base.data, base.label
    op = draw(st.sampled_from(BYTE_OPS))
    if op == "truncate":
        cut = draw(st.integers(0, max(0, len(data) - 1)))
        return Case(f"{label}; cut at byte {cut}", data[:cut])
    if op == "flip":
        at = draw(st.integers(0, len(data) - 1)) if data else 0
        byte = draw(st.integers(0, 255))
        return Case(f"{label}; byte {at} := {byte:#04x}", data[:at] + bytes([byte]) + data[at + 1 :])
    if op == "insert":
        at = draw(st.integers(0, len(data)))
        extra = draw(st.binary(min_size=1, max_size=8))
        return Case(f"{label}; insert {extra!r} at {at}", data[:at] + extra + data[at:])
    if op == "delete":
        at = draw(st.integers(0, len(data)))
        size = draw(st.integers(1, 40))
        return Case(f"{label}; delete {size} bytes at {at}", data[:at] + data[at + size :])
    if op == "random":
        return Case("random bytes", draw(st.binary(max_size=2000)))
    if op == "encoding":
        encoding = draw(st.sampled_from(ENCODINGS))
        names = draw(st.permutations(NON_ASCII_NAMES))
        text = data.decode("utf-8", errors="replace")
        text = text.replace("Fictive", names[0]).replace("(fictional)", names[1])
        return Case(f"{label}; non-ASCII names; {encoding}", encoded(text, encoding))
    if op == "not json":
        return Case("not a dlco-result/1 document", draw(st.sampled_from(NOT_JSON)))
    if op == "splice":
        other = SAMPLE_BYTES[draw(st.sampled_from(sorted(SAMPLE_BYTES)))]
        a, b = draw(st.integers(0, len(data))), draw(st.integers(0, len(other)))
        return Case(f"{label}; first {a} bytes + another sample from byte {b}", data[:a] + other[b:])
    depth = draw(st.sampled_from(DEPTHS))
    nested = deep_nesting(depth, draw(st.sampled_from(("list", "object")))).text.encode("ascii")
    where = draw(st.sampled_from(("document", "value")))
    if where == "document":
        return Case(f"nested {depth} deep", nested)
    return Case(f"format tag + {depth}-deep value", b'{"format": "dlco-result/1", "lab": ' + nested + b"}")


# ---------- documents from the format's JSON Schema ----------

# The dimension of each quantity field, as docs/format.md lists them (for the catalogue variant).
FIELD_DIMENSIONS = {
    "dlco": "diffusing_capacity", "dlco_hb_adjusted": "diffusing_capacity", "kco": "transfer_coefficient",
    "va": "volume", "tlc": "volume", "inspired_volume": "volume", "vital_capacity": "volume",
    "instrument_dead_space": "volume", "anatomic_dead_space": "volume", "breath_hold_time": "time",
    "sample_collection_time": "time", "barometric_pressure": "pressure", "altitude": "length", "height": "length",
    "weight": "mass", "hemoglobin": "mass_concentration", "carboxyhemoglobin": "fraction",
    "room_temperature": "temperature",
}  # fmt: skip
_NOT_CONSTRAINTS = ("title", "description", "default")


@cache
def units_of(dimension: str) -> tuple[str, ...]:
    """The catalogue's codes of one dimension and the aliases that resolve to them."""
    catalogue = load_tables().units
    codes = sorted(code for code, unit in catalogue.units.items() if unit.dimension == dimension)
    return tuple(codes) + tuple(sorted(a for a, code in catalogue.aliases.items() if code in codes))


class SchemaWalk:
    """A strategy for the documents docs/dlco-result-1.schema.json allows.

    Objects, ``anyOf``, ``$ref`` and arrays are walked here; every other (leaf) schema --
    strings with a ``format``, bounded numbers, enums, ``const`` -- is generated by
    hypothesis-jsonschema. (Handing it the whole document schema works too, but it rebuilds
    each property's strategy on every draw: about 130 ms a document instead of about 2.)

    With ``catalogue`` each quantity's unit is a catalogue code or alias of its field's
    dimension and its value mostly sits in 0-300 with few decimals, so the documents get
    past the unit check to the arithmetic; a share of values stays unbounded.
    """

    def __init__(self, schema: dict[str, Any], catalogue: bool) -> None:
        self.defs: dict[str, Any] = schema["$defs"]
        self.schema = schema
        self.catalogue = catalogue

    def document(self) -> st.SearchStrategy[Any]:
        return self.walk(self.schema, None)

    def walk(self, node: dict[str, Any], field: str | None) -> st.SearchStrategy[Any]:
        if field == "lab_status" and self.catalogue:  # statuses of values a record may lack, as table 0085 has them
            return st.dictionaries(st.sampled_from(STATUS_PATHS), st.sampled_from(status_codes()), max_size=3)
        if "$ref" in node:
            name = node["$ref"].rsplit("/", 1)[-1]
            if name == "Quantity" and self.catalogue and field in FIELD_DIMENSIONS:
                return self.catalogue_quantity(FIELD_DIMENSIONS[field])
            return self.walk(self.defs[name], field)
        if self.catalogue and field in ("birth_date", "performed_at"):
            return self.plausible_date(field)
        if "anyOf" in node:
            return st.one_of([self.walk(branch, field) for branch in node["anyOf"]])
        if node.get("type") == "object" and "properties" in node:
            required = set(node.get("required", ()))
            if self.catalogue:  # a record needs something to send to reach the emitters
                required |= REACH_REQUIRED & set(node["properties"])
            walked = {key: self.walk(value, key) for key, value in node["properties"].items()}
            return st.fixed_dictionaries(
                {k: v for k, v in walked.items() if k in required},
                optional={k: v for k, v in walked.items() if k not in required},
            )
        if node.get("type") == "array":
            return st.lists(self.walk(node["items"], field), max_size=5)
        return from_schema({k: v for k, v in node.items() if k not in _NOT_CONSTRAINTS})

    def catalogue_quantity(self, dimension: str) -> st.SearchStrategy[Any]:
        properties = self.defs["Quantity"]["properties"]
        clinical = st.floats(0, 300).map(lambda x: round(x, 3))
        return st.fixed_dictionaries(
            {
                "value": st.one_of(clinical, clinical, self.walk(properties["value"], None)),
                "unit": st.sampled_from(units_of(dimension)),
            }
        )

    @staticmethod
    def plausible_date(field: str) -> st.SearchStrategy[str]:
        """A birth date, or a test date-time after it and before the fuzz tests' NOW (impossible dates are refused)."""
        if field == "birth_date":
            return st.dates(date(1930, 1, 1), date(1999, 12, 31)).map(date.isoformat)
        offsets = st.sampled_from(("Z", "+00:00", "+01:00", "-07:00", "+05:45", "+14:00", "-12:00"))
        moments = st.datetimes(datetime(2000, 1, 1), datetime(2026, 3, 1))
        return st.builds(lambda moment, offset: moment.isoformat(timespec="seconds") + offset, moments, offsets)


# Optional values a lab may give a status (lab_status): any code leaves the record readable.
STATUS_PATHS = (
    "results.dlco", "results.va", "results.kco", "results.dlco_hb_adjusted", "results.tlc",
    "results.predicted.dlco", "conditions.hemoglobin", "conditions.barometric_pressure", "patient.weight",
)  # fmt: skip


@cache
def status_codes() -> tuple[str, ...]:
    """The codes of mappings/result_status.toml (HL7 v2.5.1 table 0085)."""
    return tuple(sorted(load_tables().result_status.statuses))


# Optional in the format, but without a result nothing is emitted (the record is refused).
REACH_REQUIRED = frozenset({"results", "dlco"})


@cache
def _schema_strategy(catalogue: bool) -> st.SearchStrategy[Any]:
    return SchemaWalk(format_schema(), catalogue).document()


def schema_documents(catalogue: bool) -> st.SearchStrategy[Case]:
    """Documents valid against the format's JSON Schema (so valid JSON, right types, right keys)."""
    label = "from the JSON Schema" + (", catalogue units" if catalogue else "")
    return st.deferred(lambda: _schema_strategy(catalogue)).map(lambda doc: Case(label, dumps(doc).encode("utf-8")))
