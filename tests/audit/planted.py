"""A planted archive: a few thousand invented sessions with a known number of each problem.

Built from the bundled samples (``01-healthy-adult`` and ``09-legacy-hb-wrong-direction``)
with new identifiers, dates and values, the way ``benchmarks/bench_convert.py`` varies them.
Every name, identifier and lab is invented. :data:`PLANTED` says what the audit must find.
"""

from __future__ import annotations

import copy
from collections import Counter
from pathlib import Path
from typing import Any

import orjson

from bridge.tables.files import samples_dir

TRADITIONAL_PER_SI = 2.987  # mL/min/mmHg per mmol/min/kPa  # source: ATS/ERS 2017 DLCO standard, units
LOWMARSH = "Lowmarsh Respiratory Physiology Lab (fictional)"
SALTREACH = "Saltreach Breathing Lab (fictional)"
BRACKENFOLD = "Brackenfold Chest Clinic (fictional)"
HIGHCAIRN = "Highcairn Lung Function Unit (fictional)"
SCRIPT_NAME = "<script>alert('planted')</script>"

SEX_CHANGED = range(5)  # Lowmarsh patients whose last session says female
BIRTH_CHANGED = range(10, 14)  # ... whose second session has another birth date
JUMPED = range(20, 26)  # ... whose last DLCO is written x2.987 in SI (no KCO and no lab predicted value;
# the GLI-2017 predicted value from sex, age and height betrays it as a probable unit mislabel)
CONFLICTING = range(30, 37)  # ... whose first test id appears again with other content
COPIED = range(40, 42)  # ... whose first file is copied byte for byte (not a conflict)
HB_WRONG = 8  # copies of sample 09, each its own patient
RAW = 20  # copies of sample 06 (three manoeuvres with raw gas data), each its own patient
SALTREACH_IN_SI = 3  # Saltreach writes traditional units but for these
BRACKENFOLD_OTHER_SET = 4  # Brackenfold uses GLI 2017 but for these
PREDICTED_OFF = range(50, 53)  # Lowmarsh patients whose first predicted DLCO, said to be GLI 2017, is 15 % high
# A file of many sessions read through its field map: Lowmarsh's CSV export, which holds the sessions of
# samples 04, 06 and 10 (source: docs/field-maps.md, "the legacy samples", twins field by field)
EXPORT = "lowmarsh-results.csv"
EXPORT_SESSIONS = 3

# What the audit must find: exactly these, no more, no fewer (hand-counted from the plan above).
PLANTED = Counter(
    {
        "PATIENT_SEX_CHANGED": len(SEX_CHANGED),
        "PATIENT_BIRTH_DATE_CHANGED": len(BIRTH_CHANGED),
        "SERIES_UNIT_JUMP": len(JUMPED),
        # source: GLI-2017 equations (Stanojevic et al., ERJ 2017): ~262 mL/min/mmHg lies far outside
        # the predicted distribution while 262 / 2.987 lies inside it
        "UNIT_MISLABEL_PROBABLE": len(JUMPED),
        "OUT_OF_RANGE": len(JUMPED),  # ~262 mL/min/mmHg is beyond the plausible DLCO range of the record check
        "DUPLICATE_TEST_ID_CONFLICT": len(CONFLICTING),
        "UNIT_CONVENTIONS_MIXED": 1,  # Saltreach
        "REFERENCE_SETS_MIXED": 1,  # Brackenfold
        "HB_ADJUSTMENT_WRONG_DIRECTION": HB_WRONG,
        "HB_ADJUSTMENT": HB_WRONG,  # sample 09: Hb 11.2 g/dL, the adjustment is noted
        "PRESSURE_ADJUSTMENT": HB_WRONG,  # sample 09: measured at 1800 m
        "BREATH_HOLD_OUT_OF_TARGET": RAW + 1,  # sample 06 (and its twin in the export): manoeuvre 3 held 7.2 s
        "MANOEUVRE_NOT_ACCEPTABLE": RAW + 1,  # sample 06 (and its twin): manoeuvre 3, VI/VC 78 % (VI at BTPS)
        "COHB_RAISED": 1,  # the export's twin of sample 04: COHb 8.5 %
        # the export's twin of sample 10: FEV1 and FVC each change after the bronchodilator (one finding each)
        "SPIROMETRY_BRONCHODILATOR_RESPONSE": 2,
        # ... and its manoeuvres (numbered columns): FEV1 and FVC graded before and after, one finding each
        # (source: ATS/ERS 2019 spirometry standard, Table 10: graded separately, per phase)
        "SPIROMETRY_GRADE": 4,
        # GLI-2017 predicted values differ by sex: the sessions planted female carry a male's predicted value
        "PREDICTED_NOT_FROM_CLAIMED_SET": len(PREDICTED_OFF) + len(SEX_CHANGED),
        "UNREADABLE_INPUT": 3,  # three half-written files
        "UNKNOWN_FORMAT": 2,  # two other formats named .json (no reader claims them); scan.pdf is skipped, not read
    }
)
SESSIONS = {LOWMARSH: (600, 3), SALTREACH: (300, 3), BRACKENFOLD: (100, 2)}  # patients, sessions each
READABLE = sum(p * s for p, s in SESSIONS.values()) + len(CONFLICTING) + len(COPIED) + HB_WRONG + RAW + EXPORT_SESSIONS
CLEAN = READABLE - HB_WRONG - len(JUMPED)  # the record findings of severity error: Hb wrong way, unit mislabels
UNREADABLE = 5  # three half-written files, two other formats (the binary scan.pdf is skipped, not read)
FILES = READABLE - EXPORT_SESSIONS + 1 + UNREADABLE  # one file a session, but the export: one file of three
# Kept out of the hand-over for a decision: the records the gate refuses, every version of a conflicting
# test id, and the sessions the patient checks name (errors across records)
DECISION = HB_WRONG + len(JUMPED) + 2 * len(CONFLICTING) + len(SEX_CHANGED) + len(BIRTH_CHANGED)
COPIES = len(COPIED)  # byte-identical copies: handed over once
READY = READABLE - DECISION - COPIES


def _sample(name: str) -> dict[str, Any]:
    loaded: dict[str, Any] = orjson.loads((samples_dir() / name).read_bytes())
    return loaded


def _traditional(doc: dict[str, Any]) -> None:
    """Write DLCO and KCO (and their predicted values) in mL/min/mmHg."""
    results = doc["results"]
    predicted = results["predicted"]
    for holder in (results, predicted, predicted["lower_limits"]):
        holder["dlco"] = {"value": round(holder["dlco"]["value"] * TRADITIONAL_PER_SI, 1), "unit": "mL/min/mmHg"}
        holder["kco"] = {"value": round(holder["kco"]["value"] * TRADITIONAL_PER_SI, 2), "unit": "mL/min/mmHg/L"}


def session(lab: str, patient: int, visit: int) -> dict[str, Any]:
    """One ordinary session: sample 01 with this patient's identity, this visit's date and a varied DLCO."""
    doc = _sample("01-healthy-adult.json")
    prefix = {LOWMARSH: "LM", SALTREACH: "SR", BRACKENFOLD: "BF"}[lab]
    doc["test_id"] = f"{prefix}-{patient:05d}-{visit}"
    doc["lab"] = {"name": lab}
    doc["performed_at"] = f"{2019 + visit}-{1 + patient % 12:02d}-10T09:00:00+00:00"
    doc["patient"]["id"] = f"FICT-{prefix}{patient:05d}"
    scale = 0.92 + 0.016 * ((patient * 7 + visit * 3) % 10)  # 0.92 to 1.064: no jump between visits
    results = doc["results"]
    results["dlco"]["value"] = round(results["dlco"]["value"] * scale, 2)
    results["kco"]["value"] = round(results["kco"]["value"] * scale, 3)
    if lab == SALTREACH and patient >= SALTREACH_IN_SI:
        _traditional(doc)
    if lab == BRACKENFOLD and patient < BRACKENFOLD_OTHER_SET and visit == 0:
        results["predicted"]["reference_set"] = "ECSC 1993 (as the lab named it)"
    if lab == LOWMARSH:
        _plant(doc, patient, visit)
    return doc


def _plant(doc: dict[str, Any], patient: int, visit: int) -> None:
    if patient in SEX_CHANGED and visit == 2:
        doc["patient"]["sex"] = "female"
    if patient in BIRTH_CHANGED and visit == 1:
        doc["patient"]["birth_date"] = "1981-01-16"
    if patient in PREDICTED_OFF and visit == 0:
        predicted = doc["results"]["predicted"]["dlco"]
        predicted["value"] = round(predicted["value"] * 1.15, 2)
    if patient in JUMPED and visit == 2:
        results = doc["results"]
        results["dlco"]["value"] = round(results["dlco"]["value"] * TRADITIONAL_PER_SI, 2)
        del results["kco"], results["predicted"]


def write_archive(root: Path) -> None:
    """Write the planted archive under ``root`` (nested folders per lab and year)."""
    for lab, (patients, visits) in SESSIONS.items():
        for patient in range(patients):
            for visit in range(visits):
                doc = session(lab, patient, visit)
                folder = root / lab.split()[0].lower() / str(2019 + visit)
                folder.mkdir(parents=True, exist_ok=True)
                data = orjson.dumps(doc, option=orjson.OPT_INDENT_2)
                (folder / f"{doc['test_id']}.json").write_bytes(data)
                if lab == LOWMARSH and visit == 0 and patient in COPIED:
                    (root / "copies").mkdir(exist_ok=True)
                    (root / "copies" / f"{doc['test_id']}.json").write_bytes(data)
                if lab == LOWMARSH and visit == 0 and patient in CONFLICTING:
                    doc["results"]["dlco"]["value"] = round(doc["results"]["dlco"]["value"] + 0.05, 2)
                    (root / "resent").mkdir(exist_ok=True)
                    (root / "resent" / f"{doc['test_id']}.json").write_bytes(orjson.dumps(doc))
    legacy = root / "legacy"
    legacy.mkdir()
    for i in range(HB_WRONG):
        doc = copy.deepcopy(_sample("09-legacy-hb-wrong-direction.json"))
        doc["test_id"] = f"HC-LEGACY-{i:03d}"
        doc["patient"]["id"] = f"FICT-HC{i:05d}"
        doc["patient"]["given"] = SCRIPT_NAME  # every one: whichever the page shows as an example carries it
        (legacy / f"{doc['test_id']}.json").write_bytes(orjson.dumps(doc))
    for i in range(RAW):
        doc = _sample("06-three-manoeuvres.json")
        doc["test_id"] = f"LM-RAW-{i:03d}"
        doc["patient"]["id"] = f"FICT-RAW{i:05d}"
        (legacy / f"{doc['test_id']}.json").write_bytes(orjson.dumps(doc))
    exports = root / "exports"
    exports.mkdir()
    (exports / EXPORT).write_bytes((samples_dir() / "legacy" / EXPORT).read_bytes())
    broken = root / "broken"
    broken.mkdir()
    whole = orjson.dumps(session(LOWMARSH, 9000, 0))
    for i in range(3):
        (broken / f"half-written-{i}.json").write_bytes(whole[: 40 + 60 * i])
    (broken / "scan.pdf").write_bytes(bytes(range(256)))
    for i in range(2):
        (broken / f"other-format-{i}.json").write_bytes(orjson.dumps({"format": "spiro-summary/2", "id": i}))
