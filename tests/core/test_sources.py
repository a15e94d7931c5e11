"""docs/sources.md: it exists where the code cites it, and it names every constant of the equations.

A constant recalled without a source is marked `# from memory` in the code and "recalled" in
docs/sources.md; one read in its source is marked neither way. These checks keep the two in step.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SOURCES = ROOT / "docs" / "sources.md"
PHYSIOLOGY = ROOT / "bridge" / "science" / "physiology.py"


def _citing_files() -> list[Path]:
    candidates = [*ROOT.glob("bridge/**/*.py"), *ROOT.glob("mappings/**/*.toml"), *ROOT.glob("docs/*.md")]
    return sorted(p for p in candidates if "docs/sources.md" in p.read_text(encoding="utf-8") and p != SOURCES)


def _constants() -> dict[str, str]:
    """Module-level UPPER_CASE names of physiology.py and the source line(s) that define them, with comments."""
    text = PHYSIOLOGY.read_text(encoding="utf-8")
    lines = text.splitlines()
    found = {}
    for node in ast.parse(text).body:
        if isinstance(node, ast.Assign) and isinstance(node.targets[0], ast.Name) and node.targets[0].id.isupper():
            found[node.targets[0].id] = lines[node.lineno - 1]
    return found


def _row(name: str) -> str:
    rows = [line for line in SOURCES.read_text(encoding="utf-8").splitlines() if f"`{name}`" in line]
    return rows[0] if rows else ""


def test_the_code_cites_a_file_that_exists():
    assert _citing_files(), "nothing cites docs/sources.md any more: drop this test with the file"
    assert SOURCES.is_file()


def test_every_source_key_of_the_equations_is_listed():
    docstring = ast.get_docstring(ast.parse(PHYSIOLOGY.read_text(encoding="utf-8"))) or ""
    keys = re.findall(r"^\s+(\w+) --", docstring, flags=re.MULTILINE)
    table = SOURCES.read_text(encoding="utf-8")

    assert keys
    assert [] == [k for k in keys if f"| {k} |" not in table]


@pytest.mark.parametrize("name", sorted(_constants()))
def test_every_constant_has_a_row_that_matches_its_tag(name: str):
    """A constant tagged `# from memory` is 'recalled' in docs/sources.md; an untagged one is not."""
    row = _row(name)

    assert row, f"{name} is not in docs/sources.md"
    recalled = "| recalled" in row
    assert recalled == ("# from memory" in _constants()[name] or _tagged_above(name))


def _tagged_above(name: str) -> bool:
    """A `# from memory` in the comment block right above the constant counts as its tag."""
    lines = PHYSIOLOGY.read_text(encoding="utf-8").splitlines()
    at = next(i for i, line in enumerate(lines) if line.startswith(f"{name} ="))
    block = []
    for line in reversed(lines[:at]):
        if not line.startswith("#"):
            break
        block.append(line)
    return any("# from memory" in line for line in block)
