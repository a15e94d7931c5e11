"""The public API is small and deliberate."""

from __future__ import annotations

import bridge


def test_exported_members():
    """__all__ is sorted and lists exactly the public names."""
    assert sorted(bridge.__all__) == bridge.__all__
    assert {name for name in dir(bridge) if not name.startswith("_")} >= set(bridge.__all__) - {"__version__"}
    assert bridge.__all__ == [
        "BridgeError",
        "Finding",
        "InputError",
        "Outcome",
        "PipelineSettings",
        "Quantity",
        "Route",
        "Session",
        "Severity",
        "__version__",
        "load_tables",
        "process",
    ]
