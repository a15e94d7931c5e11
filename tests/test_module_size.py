"""No module of the bridge is longer than 400 lines (DEVELOPERS.md, "Architecture": a module a reader can hold)."""

from __future__ import annotations

from pathlib import Path

BRIDGE = Path(__file__).resolve().parents[1] / "bridge"
MOST_LINES = 400  # common practice: the limit the project's contributor guide sets for a module


def test_every_module_under_bridge_is_at_most_400_lines():
    """Each .py file under bridge/ has at most 400 lines; a longer one is split by responsibility."""
    modules = sorted(BRIDGE.rglob("*.py"))
    assert modules  # the walk found the package
    too_long = {
        str(m.relative_to(BRIDGE)): n for m in modules if (n := len(m.read_text("utf-8").splitlines())) > MOST_LINES
    }
    assert {} == too_long
