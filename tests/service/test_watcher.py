"""When an inbox file is complete, and the one place that shortens watchdog's move-pairing wait."""

from __future__ import annotations

import logging
from pathlib import Path

import pytest
from watchdog.observers.inotify_move_event_grouper import InotifyMoveEventGrouper

from bridge.service.watcher import MOVE_PAIRING_SECONDS, is_candidate, pair_moves_quickly


def test_the_installed_watchdog_still_has_the_private_wait() -> None:
    """pair_moves_quickly shortens the installed watchdog's wait; an upgrade that moves it fails here first."""
    applied = pair_moves_quickly()

    assert (True, MOVE_PAIRING_SECONDS) == (applied, InotifyMoveEventGrouper.delay)


def test_a_grouper_with_a_delay_gets_the_short_wait() -> None:
    """The wait is set on the class the observer reads it from."""

    class Grouper:
        delay = 0.5

    applied = pair_moves_quickly(Grouper)

    assert (True, MOVE_PAIRING_SECONDS) == (applied, Grouper.delay)


def test_a_grouper_without_the_delay_is_one_warning_not_a_crash(caplog: pytest.LogCaptureFixture) -> None:
    """A watchdog whose private attribute is gone: one warning, and the service goes on."""

    class Grouper:
        pass

    with caplog.at_level(logging.WARNING, logger="dlco_bridge"):
        applied = pair_moves_quickly(Grouper)

    assert (False, ["watchdog_private_api"]) == (applied, [getattr(r, "event", "") for r in caplog.records])


@pytest.mark.parametrize(
    ("name", "expected"),
    [("result.json", True), (".result.json", False), ("result.json.part", False), ("result.json.tmp", False)],
)
def test_hidden_and_temporary_names_are_never_taken(name: str, expected: bool) -> None:
    """A writer's temporary or hidden names wait; any other name is a candidate."""
    assert expected == is_candidate(Path(name))
