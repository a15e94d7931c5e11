"""Who may import whom (DEVELOPERS.md, architecture): layers that point one way, a pure core, shell parts apart.

Every module of ``bridge/`` belongs to one layer of LAYERS (bottom first), so a new module
cannot escape these rules; no import runs up the layers and the import graph has no cycle.
The layers below the first shell layer are the core: no I/O, clock, randomness or global
state, and never an import of the shell.
"""

from __future__ import annotations

import ast
import graphlib
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "bridge"
DEVELOPERS = PACKAGE.parent / "DEVELOPERS.md"
# The layers, bottom first: a module imports only from its own layer and the layers below it.
# Each entry is a file or folder under bridge/; a module belongs to its longest matching entry
# (tables/files.py is the loader, not the tables layer). The one list to change when modules
# move; DEVELOPERS.md ("Layers") writes the same order, and a test below keeps the two equal.
LAYERS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("base", ("errors.py", "values.py", "spirometry_record.py", "lung_volume_record.py", "model.py", "version.py")),
    ("hl7", ("hl7",)),
    ("science", ("science",)),
    ("tables", ("tables",)),
    ("readers", ("readers",)),
    ("emit", ("emit",)),
    ("display", ("display",)),
    ("pipeline", ("pipeline.py",)),
    ("audit core", ("audit/__init__.py", "audit/rows.py", "audit/reduce.py", "audit/stats.py")),
    ("reconcile core", ("reconcile/__init__.py", "reconcile/engine.py", "reconcile/search.py", "reconcile/bundles.py")),
    ("loading", ("tables/files.py", "inputs.py")),
    ("service", ("service",)),
    ("config", ("config",)),
    ("audit shell", ("audit/run.py", "audit/report.py", "audit/page.py", "audit/index.py")),
    ("reconcile shell", ("reconcile/client.py", "reconcile/source.py", "reconcile/run.py", "reconcile/report.py")),
    ("cli", ("cli",)),
    ("entry points", ("__init__.py", "__main__.py")),
)
FIRST_SHELL_LAYER = "loading"  # the pure core is every layer below it
ENTRY_LAYER = "entry points"  # the public API's re-exports and ``python -m bridge``: neither core nor shell
LAYER_NAMES = tuple(name for name, _ in LAYERS)


def _layer_of(path: Path) -> str | None:
    """The layer of a module: its longest matching entry in LAYERS, or None when no entry matches."""
    relative = path.relative_to(PACKAGE).as_posix()
    matches = [
        (len(entry), name)
        for name, entries in LAYERS
        for entry in entries
        if relative == entry or relative.startswith(entry + "/")
    ]
    return max(matches)[1] if matches else None


MODULES = sorted(PACKAGE.rglob("*.py"))
_SHELL_FROM = LAYER_NAMES.index(FIRST_SHELL_LAYER)
_ENTRY_AT = LAYER_NAMES.index(ENTRY_LAYER)
_RANKS = {p: LAYER_NAMES.index(layer) for p in MODULES if (layer := _layer_of(p)) is not None}
CORE = tuple(p for p, rank in _RANKS.items() if rank < _SHELL_FROM)
SHELL = tuple(p for p, rank in _RANKS.items() if _SHELL_FROM <= rank < _ENTRY_AT)

# Modules that do I/O, read the clock, draw random numbers or hold process state.
BANNED_IO = {
    "sqlite3",
    "socket",
    "ssl",
    "httpx",
    "watchdog",
    "logging",
    "time",
    "random",
    "os",
    "subprocess",
    "threading",
    "asyncio",
    "pathlib",
    "shutil",
    "tempfile",
    "zoneinfo",  # reads the time-zone database: the shell resolves zones and passes them in
}


def _module_name(path: Path) -> str:
    """``bridge/emit/fhir.py`` -> bridge.emit.fhir; a package's ``__init__.py`` -> the package."""
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


BANNED_SHELL = {_module_name(p) for p in SHELL}
# uuid5 (deterministic, from content) is allowed; uuid1/uuid4 read the clock or randomness.
BANNED_CALLS = {"open", "print", "input", "now", "utcnow", "today", "uuid1", "uuid4", "getenv", "time"}


def _module_package(path: Path) -> list[str]:
    """The package a module's relative imports start from: ``bridge/emit/fhir.py`` -> bridge.emit."""
    return list(path.relative_to(PACKAGE.parent).with_suffix("").parts[:-1])


def _imports(path: Path) -> set[str]:
    """Every module ``path`` imports, as absolute names; ``from bridge import x`` counts as ``bridge.x``."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            parts = node.module.split(".") if node.module else []
            if node.level:
                package = _module_package(path)
                parts = package[: len(package) - node.level + 1] + parts
            base = ".".join(parts)
            names.add(base)
            names.update(f"{base}.{alias.name}" for alias in node.names)
    return names


def _within(module: str, packages: set[str]) -> bool:
    return any(module == p or module.startswith(p + ".") for p in packages)


def _id(path: Path) -> str:
    return str(path.relative_to(PACKAGE))


@pytest.mark.parametrize("path", CORE, ids=_id)
def test_core_module_imports_no_io(path: Path):
    """A core module imports nothing that does I/O, reads the clock or holds process state."""
    bad = {m for m in _imports(path) if _within(m, BANNED_IO)}

    assert set() == bad


@pytest.mark.parametrize("path", CORE, ids=_id)
def test_core_module_imports_no_shell(path: Path):
    """A core module imports no part of the shell: not the CLI, config, the table loader or any of bridge.service."""
    bad = {m for m in _imports(path) if _within(m, BANNED_SHELL)}

    assert set() == bad


@pytest.mark.parametrize("path", CORE, ids=_id)
def test_core_module_calls_no_io(path: Path):
    """A core module never calls open(), print(), now(), uuid4() and the like."""
    tree = ast.parse(path.read_text())
    calls = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            func = node.func
            name = func.id if isinstance(func, ast.Name) else func.attr if isinstance(func, ast.Attribute) else ""
            if name in BANNED_CALLS:
                calls.add(name)

    assert set() == calls


@pytest.mark.parametrize("path", CORE, ids=_id)
def test_core_module_has_no_global_statement(path: Path):
    """No core module rebinds module state with ``global``."""
    tree = ast.parse(path.read_text())

    assert [n for n in ast.walk(tree) if isinstance(n, ast.Global)] == []


# Module-level values that can change: containers built by a literal, a comprehension or a call.
MUTABLE_BUILDERS = (ast.Dict, ast.List, ast.Set, ast.DictComp, ast.ListComp, ast.SetComp)
MUTABLE_CALLS = {"dict", "list", "set", "defaultdict", "OrderedDict", "Counter", "deque", "bytearray"}


def _mutable_module_values(tree: ast.Module) -> list[str]:
    found = []
    for node in tree.body:
        if isinstance(node, ast.Assign | ast.AnnAssign) and node.value is not None:
            value = node.value
            called = value.func.id if isinstance(value, ast.Call) and isinstance(value.func, ast.Name) else ""
            if isinstance(value, MUTABLE_BUILDERS) or called in MUTABLE_CALLS:
                targets = node.targets if isinstance(node, ast.Assign) else [node.target]
                found += [ast.unparse(target) for target in targets]
    return found


@pytest.mark.parametrize("path", CORE, ids=_id)
def test_core_module_holds_no_mutable_module_state(path: Path):
    """No core module keeps a dict, list or set at module level (tables are tuples, frozensets or read-only maps)."""
    names = [n for n in _mutable_module_values(ast.parse(path.read_text())) if n != "__all__"]

    assert [] == names


def test_the_mutable_state_check_has_teeth():
    """A module-level dict, list comprehension or set() call is caught; a tuple and a frozenset are not."""
    source = "A = {}\nB = [x for x in ()]\nC = set()\nD = (1, 2)\nE = frozenset()\nF: dict[str, int] = {}\n"

    assert ["A", "B", "C", "F"] == _mutable_module_values(ast.parse(source))


def test_every_module_has_a_layer():
    """No module of bridge/ escapes the rules above by being in no layer."""
    assert [] == [_id(p) for p in MODULES if _layer_of(p) is None]


def test_every_layer_entry_exists():
    """Each file or folder named in LAYERS is there: a move must update the list, not leave it stale."""
    assert [] == [entry for _, entries in LAYERS for entry in entries if not (PACKAGE / entry).exists()]


_BY_NAME = {_module_name(p): p for p in MODULES}


def _our_modules(path: Path) -> set[Path]:
    """The modules of bridge/ that ``path`` imports: each imported name resolved to its longest module prefix."""
    found = set()
    for name in _imports(path):
        parts = name.split(".")
        for end in range(len(parts), 0, -1):
            target = _BY_NAME.get(".".join(parts[:end]))
            if target is not None:
                found.add(target)
                break
    found.discard(path)
    return found


def _rank(path: Path) -> int:
    layer = _layer_of(path)
    assert layer is not None, path
    return LAYER_NAMES.index(layer)


@pytest.mark.parametrize("path", MODULES, ids=_id)
def test_no_import_runs_up_the_layers(path: Path):
    """A module imports only from its own layer and the layers below it (LAYERS, bottom first)."""
    upward = sorted(f"{_id(t)} ({_layer_of(t)})" for t in _our_modules(path) if _rank(t) > _rank(path))

    assert [] == upward


def test_the_import_graph_has_no_cycle():
    """No module imports itself through others, within a layer or across layers."""
    graph = {p: _our_modules(p) for p in MODULES}

    try:
        tuple(graphlib.TopologicalSorter(graph).static_order())
        cycle: list[str] = []
    except graphlib.CycleError as error:
        cycle = [_id(p) for p in error.args[1]]
    assert [] == cycle


def test_the_layer_checks_have_teeth():
    """An edge from the science up to the tables is caught, and so is a cycle of two modules."""
    science, tables = PACKAGE / "science" / "checks.py", PACKAGE / "tables" / "codes.py"
    assert _rank(tables) > _rank(science)  # the edge science -> tables runs up
    with pytest.raises(graphlib.CycleError):
        tuple(graphlib.TopologicalSorter({science: {tables}, tables: {science}}).static_order())


def test_developers_guide_lists_the_same_layers():
    """DEVELOPERS.md writes the layer order of LAYERS, bottom first (its "Layers" block)."""
    text = DEVELOPERS.read_text(encoding="utf-8")
    block = text.split("<!-- layers -->", 2)[1]
    written = tuple(line.split(":", 1)[0].strip().lstrip("0123456789. ") for line in block.strip().splitlines())

    assert LAYER_NAMES == written


def test_readers_and_emitters_do_not_import_each_other():
    """Readers and emitters speak only the model."""
    for folder, other in (("readers", "bridge.emit"), ("emit", "bridge.readers")):
        for path in sorted((PACKAGE / folder).rglob("*.py")):
            assert set() == {m for m in _imports(path) if _within(m, {other})}, path


def test_transports_and_ledger_do_not_import_each_other():
    """Transports know no ledger and the ledger knows no transport: delivery joins them."""
    apart = (("service/transports", "bridge.service.ledger"), ("service/ledger", "bridge.service.transports"))
    for folder, other in apart:
        files = sorted((PACKAGE / folder).rglob("*.py"))
        assert files, folder  # the folders exist: a move must update this test, not empty it
        for path in files:
            assert set() == {m for m in _imports(path) if _within(m, {other})}, path


def test_model_and_errors_import_only_stdlib_and_pydantic():
    """The bottom layer depends on nothing of ours but itself."""
    for name in ("model.py", "spirometry_record.py", "lung_volume_record.py", "values.py", "errors.py"):
        ours = {m for m in _imports(PACKAGE / name) if _within(m, {"bridge"})}
        base = {"bridge.errors", "bridge.values", "bridge.spirometry_record", "bridge.lung_volume_record"}
        assert set() == {m for m in ours if not _within(m, base)}, name


def test_hl7_text_sits_just_above_the_model():
    """bridge.hl7 (HL7 v2 text, MLLP framing, ACKs, HL7 tables) imports of ours only errors and model.

    Readers, emitters, display, service and CLI all use it, so it may use none of them.
    """
    files = sorted((PACKAGE / "hl7").rglob("*.py"))
    assert files  # the package exists: a move must update this test, not empty it
    for path in files:
        ours = {m for m in _imports(path) if _within(m, {"bridge"})}
        assert set() == {m for m in ours if not _within(m, {"bridge.errors", "bridge.model", "bridge.hl7"})}, path


def test_only_bridge_hl7_writes_the_mllp_block_characters():
    """The MLLP start and end block bytes are written in bridge/hl7/mllp.py and nowhere else of bridge/."""
    # source: HL7 v2 MLLP release 2: <VT> (0x0B) starts a block, <FS> (0x1C) ends it
    spellings = ("\\x0b", "\\x1c", "\\x0B", "\\x1C", "\\013", "\\034")
    found = [
        _id(path)
        for path in sorted(PACKAGE.rglob("*.py"))
        if path != PACKAGE / "hl7" / "mllp.py"
        and path != PACKAGE / "values.py"  # the record's refusal of control characters in text, not framing
        and any(s in path.read_text() for s in spellings)
    ]

    assert [] == found
