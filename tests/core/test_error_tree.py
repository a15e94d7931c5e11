"""The exception tree drawn at the top of bridge/errors.py is the tree the module defines."""

from __future__ import annotations

import inspect
import re

import bridge.errors as errors


def test_the_drawn_tree_names_every_exception_under_its_parent():
    """Each class of bridge.errors appears in the module's drawing, indented one step under its base."""
    drawn: dict[str, str] = {}
    parents: list[str] = []  # the last class seen at each depth
    for line in (errors.__doc__ or "").splitlines():
        found = re.match(r"^ {4}((?:[│ ] {3})*)(?:[├└]── )?([A-Z][A-Za-z]+)(?:\s|$)", line)
        if found is None or not inspect.isclass(getattr(errors, found.group(2), None)):
            continue
        depth = len(found.group(1)) // 4 + (1 if "──" in line else 0)
        del parents[depth:]
        drawn[found.group(2)] = parents[-1] if parents else ""
        parents.append(found.group(2))
    defined = {
        name: cls.__bases__[0].__name__ if cls is not errors.BridgeError else ""
        for name, cls in inspect.getmembers(errors, inspect.isclass)
        if issubclass(cls, errors.BridgeError) and cls.__module__ == errors.__name__
    }

    assert defined == drawn
