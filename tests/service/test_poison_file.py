"""One bad file never stops the feed: whatever processing one input raises, it is quarantined.

A "poison" file is one whose processing raises something other than a clean ``InputError``
(an ``OverflowError`` from a value near the float limit, a model's ``ValidationError``, a
``ZeroDivisionError``), or whose payload fails to build for one destination. The service test
drives a real ``dlco-bridge watch``; it holds whether the core refuses such a value as bad
input or the intake catches what the core raised. The in-process tests pin the intake's own
internal-error branch with a processor that raises. All data is invented.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from bridge import __version__
from bridge.config import parse_settings
from bridge.emit.outputs import payloads
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process
from bridge.service.intake import Intake, Processor
from bridge.service.ledger import Ledger
from bridge.service.logs import JsonFormatter
from bridge.service.metrics import Metrics
from bridge.service.settings import ServiceSettings
from bridge.tables import Tables
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables
from tests.service.conftest import GOOD, drop, file_destination, make_input, mllp_destination, samples, wait_until

if TYPE_CHECKING:
    from tests.service.conftest import RecordingReceiver, Site

MakeSite = Callable[..., "Site"]

# (file name, path of the value in the export, value): each made processing raise something
# other than an InputError, or made the HL7 payload refuse the value after the pipeline took it.
POISONS = (
    ("dlco-overflow.json", ("results", "dlco", "value"), 1e308),
    ("va-overflow.json", ("results", "va", "value"), 1e308),
    ("pressure-overflow.json", ("conditions", "barometric_pressure", "value"), 1e308),
    ("hemoglobin-overflow.json", ("conditions", "hemoglobin", "value"), 1e308),
)


def poisoned(test_id: str, patient_id: str, where: tuple[str, ...], value: float) -> bytes:
    """A good sample export with one value replaced."""
    document = json.loads(make_input(test_id, patient_id))
    *parents, last = where
    node: dict[str, Any] = document
    for key in parents:
        node = node[key]
    node[last] = value
    return json.dumps(document, indent=2).encode("utf-8")


def test_poison_files_among_good_ones_are_quarantined_and_the_feed_goes_on(
    make_site: MakeSite, receiver: RecordingReceiver
) -> None:
    """Good files dropped before and after poison files are all acknowledged; the poisons are quarantined."""
    site = make_site(mllp_destination(receiver.port))
    site.start()
    before = {f"before-{n}.json": make_input(f"POISON-B{n}", f"FICT-660{n}", template=GOOD[n]) for n in range(3)}
    after = {f"after-{n}.json": make_input(f"POISON-A{n}", f"FICT-661{n}", template=GOOD[n]) for n in range(3)}
    poisons = {name: poisoned(f"POISON-P{n}", f"FICT-662{n}", where, value)
               for n, (name, where, value) in enumerate(POISONS)}  # fmt: skip
    for name, data in (before | poisons).items():
        drop(site.inbox, name, data)
    wait_until(lambda: {p.name for p in site.quarantined()} == set(poisons), "every poison file quarantined")
    assert site.process is not None and site.process.poll() is None, site.stderr()
    for name, data in after.items():
        drop(site.inbox, name, data)
    good_ids = {f"POISON-B{n}" for n in range(3)} | {f"POISON-A{n}" for n in range(3)}
    wait_until(lambda: {a.test_id for a in receiver.accepted()} == good_ids, "every good file acknowledged")
    reports = {name: json.loads((site.quarantine / f"{name}.error.json").read_bytes()) for name in poisons}
    metrics = site.metrics()
    still_running = site.process.poll() is None

    assert (True, set()) == (still_running, site.inbox_names())
    assert {name: name for name in poisons} == {name: report["file"] for name, report in reports.items()}
    assert set(before) | set(after) == {p.name for p in site.archived()}
    assert (float(len(poisons)), float(len(good_ids))) == (
        metrics["dlco_bridge_files_quarantined_total"],
        metrics["dlco_bridge_files_processed_total"],
    )
    assert 0 == site.stop()


# ---- the intake in-process ---------------------------------------------------------------


class InProcess:
    """An intake on ``tmp_path`` with its ledger and metrics, and a way to drop one file."""

    def __init__(self, settings: ServiceSettings, ledger: Ledger, metrics: Metrics, intake: Intake) -> None:
        self.settings = settings
        self.ledger = ledger
        self.metrics = metrics
        self.intake = intake

    def take(self, name: str, data: bytes) -> str:
        path = self.settings.inbox / name
        path.write_bytes(data)
        return self.intake.take(path, time.time()).result

    def report(self, name: str) -> dict[str, Any]:
        document: dict[str, Any] = json.loads((self.settings.quarantine / f"{name}.error.json").read_bytes())
        return document


@pytest.fixture
def in_process(tmp_path: Path) -> Iterator[Callable[..., InProcess]]:
    """Builds an in-process intake with the given processor and destinations (file transports)."""
    ledgers: list[Ledger] = []

    def build(processor: Processor = process, destinations: str = file_destination(), extra: str = "") -> InProcess:
        full = parse_settings(
            f'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n{extra}\n{destinations}', {}, base=tmp_path
        )
        settings = full.require_service()
        settings.inbox.mkdir()
        ledger = Ledger.open(settings.ledger_path)
        ledgers.append(ledger)
        metrics = Metrics(time.time)
        return InProcess(
            settings,
            ledger,
            metrics,
            Intake(settings, full.pipeline, MapChoice(), load_tables(), ledger, metrics, processor=processor),
        )

    yield build
    for ledger in ledgers:
        ledger.close()


def failing_on(name: str, error: BaseException) -> Processor:
    """The real pipeline, except that the input called ``name`` raises ``error``."""

    def processor(data: bytes, source: str, tables: Tables, *args: Any, **kwargs: Any) -> Outcome:
        if source == name:
            raise error
        return process(data, source, tables, *args, **kwargs)

    return processor


def quarantine_lines(caplog: pytest.LogCaptureFixture) -> list[tuple[str, str]]:
    """(level, reason) of each "input quarantined" log record."""
    return [
        (r.levelname, str(getattr(r, "reason", ""))) for r in caplog.records if r.getMessage() == "input quarantined"
    ]


def test_an_internal_error_quarantines_the_file_and_the_next_file_is_processed(
    in_process: Callable[..., InProcess], caplog: pytest.LogCaptureFixture
) -> None:
    """A ZeroDivisionError in processing: quarantined as an internal error, counted, logged without its message."""
    site = in_process(failing_on("poison.json", ZeroDivisionError("no transfer factor for FICT-6630")))
    with caplog.at_level(logging.INFO, logger="dlco_bridge"):
        poison = site.take("poison.json", make_input("INTERNAL-0001", "FICT-6630"))
        good = site.take("good.json", make_input("INTERNAL-0002", "FICT-6631"))
    report = site.report("poison.json")
    summary = site.ledger.summary()

    assert ("quarantined", "processed") == (poison, good)
    assert ("internal", "ZeroDivisionError", "no transfer factor for FICT-6630", __version__) == (
        report["kind"],
        report["error"],
        report["message"],
        report["version"],
    )
    assert "poison.json: internal error: ZeroDivisionError: no transfer factor for FICT-6630" == report["reason"]
    assert ["poison.json"] == [p.name for p in site.settings.quarantine.iterdir() if not p.name.endswith(".error.json")]
    assert (1, 1, 1, 1) == (
        site.metrics.registry.get_sample_value("dlco_bridge_files_failed_internal_total"),
        site.metrics.registry.get_sample_value("dlco_bridge_files_quarantined_total"),
        site.metrics.registry.get_sample_value("dlco_bridge_files_processed_total"),
        summary.quarantined,
    )
    assert (1, 1) == (summary.processed, summary.pending)
    assert "FICT-6630" not in "".join(JsonFormatter().format(r) for r in caplog.records)
    assert [("ERROR", "ZeroDivisionError (internal error) in test_poison_file.py")] == [
        (level, reason.partition(":")[0]) for level, reason in quarantine_lines(caplog)
    ]
    assert 1 == samples(site.metrics.render(summary))["dlco_bridge_files_failed_internal_total"]


def test_an_internal_error_is_logged_with_its_message_when_patient_data_may_be_logged(
    in_process: Callable[..., InProcess], caplog: pytest.LogCaptureFixture
) -> None:
    """With log_patient_data = true the log line carries the internal error's reason."""
    site = in_process(
        failing_on("poison.json", OverflowError("too big for FICT-6632")), extra="log_patient_data = true"
    )
    with caplog.at_level(logging.INFO, logger="dlco_bridge"):
        site.take("poison.json", make_input("INTERNAL-0003", "FICT-6632"))

    assert [("ERROR", "poison.json: internal error: OverflowError: too big for FICT-6632")] == quarantine_lines(caplog)


def test_an_input_error_report_says_kind_input(in_process: Callable[..., InProcess]) -> None:
    """A clean InputError still gives today's report (field, expected), marked kind input, not counted as internal."""
    site = in_process()
    document = json.loads(make_input("INPUT-0001", "FICT-6633"))
    document["patient"]["birth_date"] = "not a date"
    result = site.take("bad.json", json.dumps(document).encode())
    report = site.report("bad.json")

    assert ("quarantined", "input", "InvalidField", "patient.birth_date", 0) == (
        result,
        report["kind"],
        report["error"],
        report["field"],
        site.metrics.registry.get_sample_value("dlco_bridge_files_failed_internal_total"),
    )


def with_condition(name: str, **update: object) -> Processor:
    """The real pipeline, with one of the outcome's conditions changed after it (what an emitter may refuse)."""

    def processor(
        data: bytes, source: str, tables: Tables, settings: PipelineSettings, *, now: Any, routes: Any, **_: Any
    ) -> Outcome:
        outcome = process(data, source, tables)  # read, derive and check; emitted below
        conditions = outcome.session.conditions
        quantity = getattr(conditions, name)
        assert quantity is not None
        changed = replace(conditions, **{name: replace(quantity, **update)})
        outcome = replace(outcome, session=replace(outcome.session, conditions=changed))
        built = [
            payload
            for route in routes
            for payload in payloads(outcome, tables, settings.emit.context(now, route.units), (route.kind,))
        ]
        return replace(outcome, payloads=tuple(built))

    return processor


FHIR_AND_HL7 = (
    '[destination.store]\npayload = "fhir"\ntransport = "file"\nfolder = "fhir-out"\n'
    '[destination.records]\npayload = "hl7"\ntransport = "file"\nfolder = "hl7-out"\n'
)


@pytest.mark.parametrize(
    ("condition", "update", "kind", "error"),
    [
        # the FHIR Bundle builds; HL7 NM (OBX-5) refuses the value
        ("barometric_pressure", {"value": 1e308}, "input", "InvalidField"),
        ("hemoglobin", {"unit": "g/furlong"}, "internal", "KeyError"),  # no emitter knows the unit
    ],
    ids=["hl7-only", "every-destination"],
)
def test_a_payload_that_fails_to_build_enqueues_nothing_for_any_destination(
    in_process: Callable[..., InProcess], condition: str, update: dict[str, object], kind: str, error: str
) -> None:
    """A payload that cannot be built quarantines the file with no message for any destination; the next goes out."""
    site = in_process(with_condition(condition, **update), destinations=FHIR_AND_HL7)
    poison = site.take("poison.json", make_input("BUILD-0001", "FICT-6634"))
    report = site.report("poison.json")
    empty = site.ledger.summary()
    site.intake.processor = process
    good = site.take("good.json", make_input("BUILD-0002", "FICT-6635"))
    summary = site.ledger.summary()

    assert ("quarantined", kind, error) == (poison, report["kind"], report["error"])
    assert (0, {}) == (empty.pending, empty.destinations)
    assert ("processed", {"records": 1, "store": 1}) == (
        good,
        {name: d.pending for name, d in summary.destinations.items()},
    )


def test_keyboard_interrupt_is_not_taken_for_a_bad_file(in_process: Callable[..., InProcess]) -> None:
    """KeyboardInterrupt in processing stops the intake: the file stays in the inbox, nothing recorded."""
    site = in_process(failing_on("file.json", KeyboardInterrupt()))
    with pytest.raises(KeyboardInterrupt):
        site.take("file.json", make_input("STOP-0001", "FICT-6636"))
    summary = site.ledger.summary()

    assert (["file.json"], False, 0) == (
        [p.name for p in site.settings.inbox.iterdir()],
        site.settings.quarantine.exists(),
        summary.quarantined,
    )


def test_an_oversize_input_that_cannot_be_read_is_left_in_place_not_hashed_as_empty(
    in_process: Callable[..., InProcess],
) -> None:
    """No made-up hash: an input over the size limit that cannot be opened raises OSError, quarantine untouched."""
    site = in_process(extra="max_input_bytes = 1")
    path = site.settings.inbox / "locked.json"
    path.mkdir()  # a path that stat() sizes but open() refuses, whoever runs the test (root too)
    (path / "an-entry-so-the-folder-has-a-size").touch()
    with pytest.raises(OSError, match=r"locked\.json"):
        site.intake.take(path, time.time())
    summary = site.ledger.summary()

    assert (True, False, 0) == (path.is_dir(), site.settings.quarantine.exists(), summary.quarantined)
