"""A field map names the repeatability criterion of its source, and its choice wins over the site's."""

from __future__ import annotations

from zoneinfo import ZoneInfo

import pytest

from bridge.errors import MappingError
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.tables.field_map_parser import field_map
from tests.maps.conftest import CSV_MAP, CSV_SAMPLE

# Trial 2 of test LOW-2026-0003 with alveolar CO 0.116 % instead of 0.118 %: its DLCO from the
# gas data becomes 30.66 against trial 1's 28.49 mL/min/mmHg, 2.17 apart -- over the ERS/ATS 2017
# limit (2 mL/min/mmHg), within the ATS/ERS 2005 one (3 mL/min/mmHg).
TRIAL_2 = (b";0,118;0,229;", b";0,116;0,229;")


def _lowmarsh_map(tables: Tables, repeatability: str | None) -> FieldMap:
    text = CSV_MAP.read_text(encoding="utf-8")
    if repeatability is not None:
        text = text.replace('format = "csv"\n', f'format = "csv"\nrepeatability = "{repeatability}"\n')
    return field_map(
        text,
        "lowmarsh-csv.toml",
        tables.units,
        ZoneInfo,
        tables.grades.criterion_names,
        sex_codes=tables.hl7.sex_of_code,
    )


def _three_manoeuvres(tables: Tables, settings: PipelineSettings) -> Outcome:
    data = CSV_SAMPLE.read_bytes()
    assert TRIAL_2[0] in data
    found = process_all(data.replace(*TRIAL_2), CSV_SAMPLE.name, tables, settings)
    return next(o for o in found if isinstance(o, Outcome) and o.session.test_id == "LOW-2026-0003")


def test_the_trials_are_between_the_two_limits(tables: Tables):
    """The precondition of the next tests: trials 1 and 2 are grade A and 2.17 mL/min/mmHg apart."""
    outcome = _three_manoeuvres(tables, PipelineSettings(field_map=_lowmarsh_map(tables, None)))
    first, second = outcome.derived.manoeuvres[:2]

    assert ("A", "A") == (first.grade, second.grade)
    assert first.dlco is not None and second.dlco is not None
    assert 2.17 == round(second.dlco.value - first.dlco.value, 2)


@pytest.mark.parametrize(
    ("site", "in_map", "used", "repeatable"),
    [
        ("2017", None, "2017", False),  # no choice in the map: the site's
        ("2005", None, "2005", True),
        ("2017", "2005", "2005", True),  # the map's choice wins
        ("2005", "2017", "2017", False),
    ],
)
def test_the_map_choice_wins_over_the_site(tables: Tables, site: str, in_map: str | None, used: str, repeatable: bool):
    """Trials 2.17 apart: repeatable by the 2005 criterion only, whichever way it was chosen."""
    settings = PipelineSettings(field_map=_lowmarsh_map(tables, in_map), repeatability=site)
    derived = _three_manoeuvres(tables, settings).derived

    assert (used, repeatable) == (derived.repeatability_criterion, derived.repeatable)


def test_the_outputs_name_a_legacy_criterion(tables: Tables):
    """Read through a map that names 2005, the HL7 report note names the criterion the mean rests on."""
    from datetime import UTC, datetime

    from bridge.pipeline import Route

    settings = PipelineSettings(field_map=_lowmarsh_map(tables, "2005"))
    now = datetime(2026, 3, 6, 9, 0, tzinfo=UTC)
    data = CSV_SAMPLE.read_bytes().replace(*TRIAL_2)
    found = process_all(data, CSV_SAMPLE.name, tables, settings, now=now, routes=(Route("hl7", "traditional"),))
    outcome = next(o for o in found if isinstance(o, Outcome) and o.session.test_id == "LOW-2026-0003")
    message = outcome.payloads[0].data.decode()

    assert "repeatable by the ATS/ERS 2005 criterion, within 3 mL/min/mmHg or 10 % of the highest" in message


def test_a_map_naming_an_unknown_criterion_is_refused(tables: Tables):
    """One line: the map file, the line of the key (8: after format), the key, and the names it may take."""
    with pytest.raises(MappingError) as caught:
        _lowmarsh_map(tables, "2010")

    assert "lowmarsh-csv.toml: line 8: map.repeatability: one of 2017, 2005, got '2010'" == str(caught.value)
