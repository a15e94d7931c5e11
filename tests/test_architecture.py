"""The pure core stays pure: no I/O, clock, randomness or global state (STYLE.md "who may import whom")."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "bridge"
CORE = [
    "errors.py",
    "model.py",
    "units.py",
    "mapping.py",
    "normalise.py",
    "physiology.py",
    "quality.py",
    "derive.py",
    "checks.py",
    "pipeline.py",
    "render.py",
    "schema.py",
    "fhirshow.py",
    "hl7show.py",
    "validate.py",
    "readers",
    "emit",
]
BANNED_MODULES = {
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
    "bridge.cli",
    "bridge.service.ledger",
    "bridge.service.transports",
    "bridge.resources",
    "bridge.service.intake",
    "bridge.config",
}
# uuid5 (deterministic, from content) is allowed; uuid1/uuid4 read the clock or randomness.
BANNED_CALLS = {"open", "print", "input", "now", "utcnow", "today", "uuid1", "uuid4", "getenv", "time"}


def _core_files() -> list[Path]:
    files: list[Path] = []
    for name in CORE:
        path = PACKAGE / name
        files.extend(sorted(path.rglob("*.py")) if path.is_dir() else [path])
    return [f for f in files if f.exists()]


def _imports(tree: ast.AST) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
    return names


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_core_module_imports_no_io(path: Path):
    """A core module imports nothing that does I/O, reads the clock or holds process state."""
    tree = ast.parse(path.read_text())
    bad = {m for m in _imports(tree) if any(m == b or m.startswith(b + ".") for b in BANNED_MODULES)}

    assert set() == bad


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(PACKAGE)))
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


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_core_module_has_no_global_statement(path: Path):
    """No core module rebinds module state with ``global``."""
    tree = ast.parse(path.read_text())

    assert [n for n in ast.walk(tree) if isinstance(n, ast.Global)] == []


def test_readers_and_emitters_do_not_import_each_other():
    """Readers and emitters speak only the model."""
    for folder, other in (("readers", "bridge.emit"), ("emit", "bridge.readers")):
        for path in sorted((PACKAGE / folder).rglob("*.py")):
            imported = _imports(ast.parse(path.read_text()))
            assert not any(m.startswith(other) for m in imported), path


def test_model_and_errors_import_only_stdlib_and_pydantic():
    """The bottom layer depends on nothing of ours but itself."""
    for name in ("model.py", "errors.py"):
        imported = _imports(ast.parse((PACKAGE / name).read_text()))
        ours = {m for m in imported if m.startswith("bridge")}
        assert ours <= {"bridge.errors"}, name
