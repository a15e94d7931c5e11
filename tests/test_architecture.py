"""Who may import whom (DEVELOPERS.md, architecture): the pure core stays pure, and the shell's parts stay apart.

The core has no I/O, clock, randomness or global state, and never imports the shell: not
one module of it, so each shell package is banned whole. Every module of ``bridge/`` is
either core, shell or an entry point, so a new module cannot escape these rules.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "bridge"
# The pure core: file and folder names under bridge/. The one list to change when core modules move.
CORE = (
    "errors.py",
    "model.py",
    "pipeline.py",
    "science",
    "tables/__init__.py",
    "tables/toml.py",
    "tables/units.py",
    "tables/grades.py",
    "tables/codes.py",
    "tables/plausibility.py",
    "tables/canonical_fields.py",
    "tables/field_map_model.py",
    "tables/field_map_parser.py",
    "readers",
    "emit",
    "display",
    "audit/__init__.py",
    "audit/rows.py",
    "audit/reduce.py",
    "audit/stats.py",
    "reconcile/__init__.py",
    "reconcile/engine.py",
    "reconcile/search.py",
    "reconcile/bundles.py",
)
# The shell: I/O and wiring. The core imports none of it, at any depth.
SHELL = (
    "cli", "config", "tables/files.py", "service", "audit/run.py", "audit/report.py", "audit/index.py",
    "reconcile/client.py", "reconcile/source.py", "reconcile/run.py", "reconcile/report.py",
)  # fmt: skip
# The public API's re-exports and ``python -m bridge``: neither core nor shell.
ENTRY_POINTS = ("__init__.py", "__main__.py")

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
BANNED_SHELL = {"bridge." + name.removesuffix(".py").replace("/", ".") for name in SHELL}
# uuid5 (deterministic, from content) is allowed; uuid1/uuid4 read the clock or randomness.
BANNED_CALLS = {"open", "print", "input", "now", "utcnow", "today", "uuid1", "uuid4", "getenv", "time"}


def _files(names: tuple[str, ...]) -> list[Path]:
    files: list[Path] = []
    for name in names:
        path = PACKAGE / name
        files.extend(sorted(path.rglob("*.py")) if path.is_dir() else [path])
    return [f for f in files if f.exists()]


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


@pytest.mark.parametrize("path", _files(CORE), ids=_id)
def test_core_module_imports_no_io(path: Path):
    """A core module imports nothing that does I/O, reads the clock or holds process state."""
    bad = {m for m in _imports(path) if _within(m, BANNED_IO)}

    assert set() == bad


@pytest.mark.parametrize("path", _files(CORE), ids=_id)
def test_core_module_imports_no_shell(path: Path):
    """A core module imports no part of the shell: not the CLI, config, the table loader or any of bridge.service."""
    bad = {m for m in _imports(path) if _within(m, BANNED_SHELL)}

    assert set() == bad


@pytest.mark.parametrize("path", _files(CORE), ids=_id)
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


@pytest.mark.parametrize("path", _files(CORE), ids=_id)
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


@pytest.mark.parametrize("path", _files(CORE), ids=_id)
def test_core_module_holds_no_mutable_module_state(path: Path):
    """No core module keeps a dict, list or set at module level (tables are tuples, frozensets or read-only maps)."""
    names = [n for n in _mutable_module_values(ast.parse(path.read_text())) if n != "__all__"]

    assert [] == names


def test_the_mutable_state_check_has_teeth():
    """A module-level dict, list comprehension or set() call is caught; a tuple and a frozenset are not."""
    source = "A = {}\nB = [x for x in ()]\nC = set()\nD = (1, 2)\nE = frozenset()\nF: dict[str, int] = {}\n"

    assert ["A", "B", "C", "F"] == _mutable_module_values(ast.parse(source))


def test_every_module_is_core_shell_or_entry_point():
    """No module of bridge/ escapes the rules above by being in neither list."""
    listed = set(_files(CORE)) | set(_files(SHELL)) | set(_files(ENTRY_POINTS))

    assert [] == [_id(p) for p in sorted(PACKAGE.rglob("*.py")) if p not in listed]


def test_core_and_shell_lists_do_not_overlap():
    """A module is core or shell, never both."""
    assert set() == set(_files(CORE)) & set(_files(SHELL))


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
    for name in ("model.py", "errors.py"):
        ours = {m for m in _imports(PACKAGE / name) if _within(m, {"bridge"})}
        assert set() == {m for m in ours if not _within(m, {"bridge.errors"})}, name
