"""Convert generated sessions to both outputs and compare the speed with a floor.

Run: ``python benchmarks/bench_convert.py [--sessions 10000] [--repeat 3] [--spirometry | --whole-report] [--json]``.

With ``--spirometry`` every generated session also carries a spirometry section (pre and post a
bronchodilator, with manoeuvres, after ``samples/10-spirometry-and-dlco.json``), and the same
run times the real pass twice, over the sessions without and with it: the convert speed per
session of a DLCO-only and of a spirometry + DLCO session, on the same sessions otherwise.
With ``--whole-report`` the run times three kinds side by side, each against its own floor and
with its own per-stage split: DLCO only, spirometry + DLCO (as ``--spirometry``) and the whole
report (the spirometry and lung volumes of ``samples/11-whole-report.json``, scaled by one factor
per session); the main figures are then the whole report's.

What it measures, all on one core in one process, with the same generated inputs:

* **real**: ``process(..., routes=(fhir, hl7))`` per session, the one pipeline: the bytes a
  ``convert`` run writes (FHIR transaction Bundle JSON and ORU^R01 ER7), without file I/O.
* **floor**: the cheapest honest way to read the same JSON and write bytes of the same shape:
  ``orjson.loads``, one plain dict per Observation (as many as the real Bundle has, with the
  same keys), a DiagnosticReport and a Provenance dict, ``orjson.dumps`` compact as the
  Bundle is (indented before issue 21), and an ER7 message joined from strings with one OBX per Observation. No
  validation, no unit handling, no derivation, no checks.

It prints sessions/s for both, the ratio real/floor and whether the target
(>= 2,000 sessions/s with both outputs) is met, then a per-stage breakdown on a subset and,
unless ``--validators 0``, what validating the output with fhir.resources (R4B) and hl7apy
(STRICT parse) would cost per session, as a ratio to our own build. That section is skipped,
with a message, when either library is not installed (fhir.resources comes with the
``validate`` and ``test`` extras, not with the base install). This is a script, not a test:
the figures depend on the machine, the ratio much less.

Timing: ``time.perf_counter``, best of ``--repeat`` passes over all sessions after one untimed
warm-up pass. The garbage collector stays enabled (as in the service), the tables frozen out
of its scans as ``bridge.cli.main`` does (``gc.freeze``), and ``gc.collect()`` runs before
each pass. Generated data is invented: names, identifiers and labs are made up.
"""

from __future__ import annotations

import argparse
import copy
import gc
import hashlib
import importlib
import os
import platform
import random
import statistics
import sys
import time
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from typing import Any

import orjson

from bridge.emit.fhir import to_bundle
from bridge.emit.fhir_json import dumps
from bridge.emit.hl7v2 import control_id, to_oru
from bridge.emit.observations import build_content
from bridge.emit.settings import EmitContext
from bridge.emit.status import resolve
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, Route, process
from bridge.readers.json_export import read_export
from bridge.science.checks import run_checks
from bridge.science.derive import derive
from bridge.tables import Tables
from bridge.tables.files import load_tables, samples_dir

TARGET_PER_S = 2000
TARGET_RATIO = 3.0  # "within about 3x of the floor"
SEED = 20260310
NOW = datetime(2026, 3, 10, 12, tzinfo=UTC)
CONTEXT = EmitContext(now=NOW)
ROUTES = (Route("fhir", "traditional"), Route("hl7", "traditional"))
# Nothing refused: every ERROR code the checks can raise is allowed, so every generated session
# goes through to both emitters (as preliminary values where an error was allowed), as the floor does.
SETTINGS = PipelineSettings(
    allow=frozenset({"UNIT_MISLABEL_PROBABLE", "HB_ADJUSTMENT_WRONG_DIRECTION", "NO_ACCEPTABLE_MANOEUVRE"})
)


def convert(data: bytes, name: str, tables: Tables) -> tuple[Any, ...]:
    """What ``convert`` builds for one input: the one pipeline with both routes."""
    return process(data, name, tables, SETTINGS, now=NOW, routes=ROUTES).payloads


TEMPLATES = (
    "01-healthy-adult.json",
    "02-anaemic-patient.json",
    "03-high-altitude.json",
    "04-raised-cohb.json",
    "05-child.json",
    "06-three-manoeuvres.json",
    "07-unit-mislabel.json",
    "09-legacy-hb-wrong-direction.json",
)
GIVEN = ("Alder", "Brisk", "Corin", "Dorran", "Elsin", "Ferelith", "Gorse", "Hollin", "Ives", "Juniper")
FAMILY = ("Fictive", "Madeup", "Notreal", "Placeholder", "Sampleson", "Testwright")
LABS = (
    ("Lowmarsh Respiratory Physiology Lab (fictional)", "Fenwick Hollow General (fictional)"),
    ("Highcairn Lung Function Unit (fictional)", "Highcairn Hill Clinic (fictional), 1800 m"),
    ("Saltreach Breathing Lab (fictional)", None),
)
MMHG_PER_KPA = 2.987  # traditional per SI for DLCO (mL/min/mmHg per mmol/min/kPa)
DLCO_SI = ("mmol/min/kPa", "mmol/(min.kPa)")
DLCO_TRAD = ("mL/min/mmHg", "mL/min/mm[Hg]", "ml/min/mm Hg")
KCO_SI = ("mmol/min/kPa/L", "mmol/(min.kPa.L)")
KCO_TRAD = ("mL/min/mmHg/L", "mL/min/mm[Hg]/L")


# ---------- generated sessions ----------


def generate(count: int, seed: int = SEED) -> list[bytes]:
    """``count`` varied ``dlco-result/1`` documents derived from the bundled samples."""
    rng = random.Random(seed)
    folder = samples_dir()
    templates = [orjson.loads((folder / name).read_bytes()) for name in TEMPLATES]
    three = next(t for t in templates if len(t.get("manoeuvres", ())) == 3)
    return [orjson.dumps(_variant(rng, i, templates, three)) for i in range(count)]


SPIROMETRY_SAMPLE = "10-spirometry-and-dlco.json"
WHOLE_REPORT_SAMPLE = "11-whole-report.json"
SCALED = ("fev1", "fvc", "fef25_75", "pef", "tlc", "frc", "rv", "vc", "ic", "erv")  # ratios (FEV1/FVC, RV/TLC) kept


def with_spirometry(inputs: Sequence[bytes], seed: int = SEED) -> list[bytes]:
    """The same sessions, each given the spirometry of sample 10 with its volumes and flows scaled."""
    return _with_sections(inputs, SPIROMETRY_SAMPLE, ("spirometry",), seed)


def with_whole_report(inputs: Sequence[bytes], seed: int = SEED) -> list[bytes]:
    """The same sessions, each given the spirometry and the lung volumes of sample 11, all scaled by one factor."""
    return _with_sections(inputs, WHOLE_REPORT_SAMPLE, ("spirometry", "lung_volumes"), seed)


def _with_sections(inputs: Sequence[bytes], sample: str, keys: Sequence[str], seed: int) -> list[bytes]:
    rng = random.Random(seed + 1)
    template = orjson.loads((samples_dir() / sample).read_bytes())
    out = []
    for data in inputs:
        doc = orjson.loads(data)
        factor = rng.uniform(0.7, 1.3)  # one factor per session: FEV1/FVC and RV/TLC stay consistent
        for key in keys:
            section = copy.deepcopy(template[key])
            for values in _value_groups(section):
                for name in SCALED:
                    if name in values:
                        values[name]["value"] = round(values[name]["value"] * factor, 2)
            doc[key] = section
        out.append(orjson.dumps(doc))
    return out


def _value_groups(section: dict[str, Any]) -> list[dict[str, Any]]:
    """The dicts of values in a spirometry section (each phase's results and manoeuvres) or lung volumes."""
    if "pre" not in section:
        return [section]
    phases = [section[p] for p in ("pre", "post") if p in section]
    return [values for phase in phases for values in (phase["results"], *phase.get("manoeuvres", ()))]


def _variant(rng: random.Random, i: int, templates: list[dict[str, Any]], three: dict[str, Any]) -> Any:
    # about one session in five carries raw gas data for three manoeuvres
    doc = copy.deepcopy(three if rng.random() < 0.2 else rng.choice(templates))
    lab, site = rng.choice(LABS)
    doc["test_id"] = f"GEN-{i:06d}"
    doc["lab"] = {"name": lab} if site is None else {"name": lab, "site": site}
    day, hour = 1 + rng.randrange(28), 7 + rng.randrange(10)
    doc["performed_at"] = f"2026-02-{day:02d}T{hour:02d}:{rng.choice((0, 15, 30, 45)):02d}:00+01:00"
    p = doc["patient"]
    p["id"] = f"FICT-G{rng.randrange(10**6):06d}"
    p["given"], p["family"] = rng.choice(GIVEN), rng.choice(FAMILY)
    if rng.random() < 0.05:
        p.pop("given")
        p.pop("family")
    p["sex"] = rng.choice(("female", "male"))
    p["birth_date"] = f"{rng.randrange(1940, 2005)}-{1 + rng.randrange(12):02d}-{1 + rng.randrange(28):02d}"
    p["height"] = {"value": rng.randrange(150, 195), "unit": "cm"}
    _vary_conditions(rng, doc.setdefault("conditions", {}))
    if "manoeuvres" in doc:
        _vary_manoeuvres(rng, doc["manoeuvres"])
    _vary_results(rng, doc["results"])
    return doc


def _vary_conditions(rng: random.Random, c: dict[str, Any]) -> None:
    if "barometric_pressure" in c:
        pb = c["barometric_pressure"]
        pb["value"] = round(pb["value"] * rng.uniform(0.99, 1.01), 1)
    hb = rng.uniform(9.0, 17.0)  # g/dL
    roll = rng.random()
    if roll < 0.15:
        c.pop("hemoglobin", None)
    elif roll < 0.55:
        c["hemoglobin"] = {"value": round(hb * 10), "unit": "g/L"}
    elif roll < 0.9:
        c["hemoglobin"] = {"value": round(hb, 1), "unit": "g/dL"}
    else:
        c["hemoglobin"] = {"value": round(hb * 0.6206, 2), "unit": "mmol/L"}
    if rng.random() < 0.25:
        c["carboxyhemoglobin"] = {"value": round(rng.uniform(0.5, 9.0), 1), "unit": "%"}
    else:
        c.pop("carboxyhemoglobin", None)


def _vary_manoeuvres(rng: random.Random, manoeuvres: list[dict[str, Any]]) -> None:
    for m in manoeuvres:
        for key in ("alveolar_co_fraction", "alveolar_tracer_fraction"):
            m[key] = round(m[key] * rng.uniform(0.98, 1.02), 6)
        m["breath_hold_time"]["value"] = round(m["breath_hold_time"]["value"] + rng.uniform(-0.3, 0.3), 1)


def _vary_results(rng: random.Random, r: dict[str, Any]) -> None:
    """Scale DLCO and VA, keep KCO = DLCO/VA, and write them in SI or traditional units."""
    scale, va_scale = rng.uniform(0.6, 1.2), rng.uniform(0.85, 1.1)
    traditional = rng.random() < 0.5
    factor = {"dlco": scale, "va": va_scale, "kco": scale / va_scale, "dlco_hb_adjusted": scale}
    for key, q in r.items():
        if key in factor and isinstance(q, dict):
            _set_unit(rng, key, q, traditional)
            q["value"] = _rounded(q["value"] * factor[key], q["value"])
    pred = r.get("predicted")
    if pred is not None:
        for key in ("dlco", "kco", "va"):
            if key in pred:
                _set_unit(rng, key, pred[key], traditional)
        for key, q in pred.get("lower_limits", {}).items():
            _set_unit(rng, key, q, traditional)


def _set_unit(rng: random.Random, key: str, q: dict[str, Any], traditional: bool) -> None:
    """Re-express a DLCO or KCO quantity in the other unit system (with a common spelling)."""
    if key == "va":
        return
    is_si = q["unit"].startswith("mmol")
    if traditional == (not is_si):
        return
    spellings = (DLCO_TRAD if traditional else DLCO_SI) if key != "kco" else (KCO_TRAD if traditional else KCO_SI)
    q["unit"] = rng.choice(spellings)
    q["value"] = q["value"] * MMHG_PER_KPA if traditional else q["value"] / MMHG_PER_KPA
    q["value"] = round(q["value"], 1 if traditional and key != "kco" else 3 if key == "kco" else 2)


def _rounded(value: float, like: float) -> float:
    text = repr(like)
    digits = len(text.split(".")[1]) if "." in text else 0
    return round(value, max(digits, 1))


# ---------- the floor: same JSON in, bytes of the same shape out ----------

_CAT = "http://terminology.hl7.org/CodeSystem/observation-category"
_UCUM = "http://unitsofmeasure.org"
_INTERP = "http://terminology.hl7.org/CodeSystem/v3-ObservationInterpretation"


def floor_convert(data: bytes, observations: int) -> tuple[bytes, bytes]:
    """Plain dicts and string joins: what any converter of this input must at least spend."""
    doc = orjson.loads(data)
    patient, lab = doc["patient"], doc["lab"]
    test_id, when = doc["test_id"], doc["performed_at"]
    quantities = [q for q in doc["results"].values() if isinstance(q, dict) and "unit" in q]
    quantities += [q for q in doc.get("conditions", {}).values() if isinstance(q, dict)]
    subject = {"type": "Patient", "identifier": {"system": patient["id_system"], "value": patient["id"]}}
    entries = []
    obx = []
    for k in range(observations):
        q = quantities[k % len(quantities)]
        ident = f"{lab['name']}|{test_id}|q{k}"
        value_q = {"value": q["value"], "unit": q["unit"], "system": _UCUM, "code": q["unit"]}
        resource = {
            "resourceType": "Observation",
            "identifier": [{"system": "urn:dlco-bridge:observation-id", "value": ident}],
            "status": "final",
            "category": [{"coding": [{"system": _CAT, "code": "procedure", "display": "Procedure"}]}],
            "code": {"coding": [{"system": "urn:x", "code": f"Q{k}", "display": "q"}], "text": "q"},
            "subject": subject,
            "effectiveDateTime": when,
            "issued": "2026-03-10T12:00:00+00:00",
            "performer": [{"type": "Organization", "display": lab["name"]}],
            "valueQuantity": value_q,
            "interpretation": [{"coding": [{"system": _INTERP, "code": "N", "display": "Normal"}]}],
            "referenceRange": [{"low": value_q, "text": "LLN (5th percentile)"}],
        }
        url = f"urn:uuid:{k:08x}-0000-5000-8000-{len(ident):012x}"
        entries.append({"fullUrl": url, "resource": resource, "request": {"method": "POST", "url": ident}})
        obx.append(
            "|".join(("OBX", str(k + 1), "NM", f"Q{k}^q^L", "", str(q["value"]), f"{q['unit']}^{q['unit']}^UCUM"))
            + f"|>{q['value']}|N|||F|||{when}"
        )
    refs = [{"reference": e["fullUrl"]} for e in entries]
    entries.append(
        {
            "fullUrl": "urn:uuid:report",
            "resource": {
                "resourceType": "DiagnosticReport",
                "status": "final",
                "subject": subject,
                "result": refs,
            },
            "request": {"method": "POST", "url": "DiagnosticReport"},
        }
    )
    entries.append(
        {
            "fullUrl": "urn:uuid:provenance",
            "resource": {"resourceType": "Provenance", "target": refs, "recorded": when},
            "request": {"method": "POST", "url": "Provenance"},
        }
    )
    bundle = orjson.dumps({"resourceType": "Bundle", "type": "transaction", "entry": entries})
    name = f"{patient.get('family', '')}^{patient.get('given', '')}"
    segments = [
        f"MSH|^~\\&|DLCO-BRIDGE|PFT-LAB|RECORDS|HOSPITAL|20260310120000+0000||ORU^R01^ORU_R01|{test_id}|P|2.5.1",
        f"PID|1||{patient['id']}^^^X&{patient['id_system']}&URI||{name}||{patient['birth_date']}|M",
        f"ORC|RE|{test_id}|{test_id}",
        f"OBR|1|{test_id}|{test_id}|81458-2^Pulmonary function test panel^LN|||{when}||||||||||||||||PF|F",
        *obx,
    ]
    return bundle, ("\r".join(segments) + "\r").encode("utf-8")


# ---------- timing ----------


def best_of(repeat: int, run: Callable[[], None]) -> tuple[float, list[float]]:
    """Best wall time of ``repeat`` passes (gc enabled, collected before each pass)."""
    times = []
    for _ in range(repeat):
        gc.collect()
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return min(times), times


def real_pass(inputs: Sequence[bytes], tables: Tables) -> Callable[[], None]:
    def run() -> None:
        for i, data in enumerate(inputs):
            convert(data, f"gen-{i}.json", tables)

    return run


def floor_pass(inputs: Sequence[bytes], counts: Sequence[int]) -> Callable[[], None]:
    def run() -> None:
        for data, n in zip(inputs, counts, strict=True):
            floor_convert(data, n)

    return run


STAGES = (
    "read + normalise",
    "derive",
    "check",
    "Outcome (sha256 + model)",
    "build_content + statuses (once, shared)",
    "FHIR (to_bundle + compact JSON)",
    "HL7 (to_oru+control_id)",
)


def stage_breakdown(inputs: Sequence[bytes], tables: Tables) -> dict[str, float]:
    """Microseconds per session of each pipeline stage, session by session (as the real pass runs).

    Each session goes through every stage before the next one starts, so nothing is held
    between sessions; best of three passes over ``inputs`` (by total).
    """
    clock = time.perf_counter
    best: list[float] | None = None
    for _ in range(3):
        totals = [0.0] * len(STAGES)
        gc.collect()
        for i, data in enumerate(inputs):
            name = f"gen-{i}.json"
            t0 = clock()
            session = read_export(data, name, tables.units)
            t1 = clock()
            derived = derive(session, tables)
            t2 = clock()
            findings = run_checks(session, derived, tables)
            t3 = clock()
            digest = hashlib.sha256(data).hexdigest()
            outcome = Outcome(source=name, source_sha256=digest, session=session, derived=derived, findings=findings)
            t4 = clock()
            content = build_content(outcome, tables, CONTEXT.units)
            statuses = resolve(outcome, content, tables, CONTEXT)
            t5 = clock()
            dumps(to_bundle(outcome, tables, CONTEXT, content, statuses), indent=False)
            t6 = clock()
            to_oru(outcome, tables, CONTEXT, content, statuses).encode()
            control_id(outcome, CONTEXT)
            t7 = clock()
            marks = (t0, t1, t2, t3, t4, t5, t6, t7)
            for k in range(len(STAGES)):
                totals[k] += marks[k + 1] - marks[k]
        if best is None or sum(totals) < sum(best):
            best = totals
    assert best is not None
    return {label: value * 1e6 / len(inputs) for label, value in zip(STAGES, best, strict=True)}


ORU_BUDGET_S = 0.005  # one ORU^R01 well under a millisecond; 5 ms leaves slack (was a timed unit test)


def oru_per_message(tables: Tables, runs: int = 200) -> float:
    """Mean seconds per ``to_oru`` on the first bundled sample (formerly tests/emit/test_hl7v2.py)."""
    outcome = process((samples_dir() / TEMPLATES[0]).read_bytes(), TEMPLATES[0], tables)
    to_oru(outcome, tables, CONTEXT)
    start = time.perf_counter()
    for _ in range(runs):
        to_oru(outcome, tables, CONTEXT)
    return (time.perf_counter() - start) / runs


def missing_validator() -> str | None:
    """The first validator library that is not installed, or None when both are."""
    for module in ("fhir.resources", "hl7apy"):
        try:
            importlib.import_module(module)
        except ImportError:
            return module
    return None


def validator_costs(inputs: Sequence[bytes], tables: Tables) -> dict[str, float]:
    """Milliseconds per session to validate our output with fhir.resources and hl7apy."""
    from fhir.resources.R4B.bundle import Bundle
    from hl7apy.consts import VALIDATION_LEVEL
    from hl7apy.parser import parse_message

    built = [convert(d, f"v-{i}.json", tables) for i, d in enumerate(inputs)]
    fhir_trees = [orjson.loads(p[0].data) for p in built]
    er7 = [p[1].data.decode("utf-8") for p in built]
    Bundle.model_validate(fhir_trees[0])  # first use builds the pydantic models: not counted
    parse_message(er7[0], validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    ms = 1e3 / len(inputs)
    start = time.perf_counter()
    for tree in fhir_trees:
        Bundle.model_validate(tree)
    fhir_ms = (time.perf_counter() - start) * ms
    start = time.perf_counter()
    for text in er7:
        parse_message(text, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    hl7_ms = (time.perf_counter() - start) * ms
    return {"fhir_resources_r4b_validate_ms": fhir_ms, "hl7apy_strict_parse_ms": hl7_ms}


# ---------- report ----------


def machine() -> dict[str, Any]:
    return {
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "machine": platform.machine(),
        "nproc": os.cpu_count(),
        "date": datetime.now(UTC).strftime("%Y-%m-%d"),
    }


def measure_kind(inputs: Sequence[bytes], tables: Tables, repeat: int, subset: int) -> dict[str, Any]:
    """Real pass, floor (as many Observations as the real output) and per-stage split for these sessions."""
    # untimed warm-up of the real path: also counts the Observations per session for the floor
    counts: list[int] = []
    real_bytes = 0
    for i, data in enumerate(inputs):
        fhir, hl7 = convert(data, f"gen-{i}.json", tables)
        counts.append(hl7.data.count(b"\rOBX|"))
        real_bytes += len(fhir.data) + len(hl7.data)
    floor_bytes = sum(len(f) + len(h) for f, h in map(floor_convert, inputs, counts))
    floor_best, floor_all = best_of(repeat, floor_pass(inputs, counts))
    real_best, real_all = best_of(repeat, real_pass(inputs, tables))
    stages = stage_breakdown(inputs[: min(subset, len(inputs))], tables)
    return {
        "n": len(inputs),
        "counts": counts,
        "real_bytes": real_bytes,
        "floor_bytes": floor_bytes,
        "floor_best": floor_best,
        "floor_all": floor_all,
        "real_best": real_best,
        "real_all": real_all,
        "stages": stages,
    }


def _kind_summary(kind: dict[str, Any]) -> dict[str, Any]:
    n = kind["n"]
    return {
        "real_sessions_per_s": round(n / kind["real_best"]),
        "floor_sessions_per_s": round(n / kind["floor_best"]),
        "ratio_real_to_floor": round(kind["real_best"] / kind["floor_best"], 1),
        "real_us_per_session": round(kind["real_best"] / n * 1e6, 1),
        "floor_us_per_session": round(kind["floor_best"] / n * 1e6, 1),
        "observations_per_session": round(statistics.mean(kind["counts"]), 1),
        "output_kb_per_session": {
            "real": round(kind["real_bytes"] / n / 1024, 1),
            "floor": round(kind["floor_bytes"] / n / 1024, 1),
        },
        "stages_us_per_session": {k: round(v, 1) for k, v in kind["stages"].items()},
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sessions", type=int, default=10_000)
    parser.add_argument("--repeat", type=int, default=3, help="timed passes; the best is reported")
    parser.add_argument("--subset", type=int, default=1000, help="sessions in the per-stage breakdown")
    parser.add_argument("--validators", type=int, default=50, help="sessions validated (0: skip)")
    parser.add_argument("--json", action="store_true", help="print one machine-readable JSON line")
    parser.add_argument(
        "--spirometry",
        action="store_true",
        help="give each session a spirometry section (pre and post) and also time the DLCO-only sessions",
    )
    parser.add_argument(
        "--whole-report",
        action="store_true",
        help="time three kinds side by side: DLCO only, spirometry + DLCO (sample 10) and the whole report"
        " (sample 11: spirometry, lung volumes and DLCO); the main figures are the whole report's",
    )
    args = parser.parse_args(argv)
    if args.spirometry and args.whole_report:
        parser.error("--whole-report already times the spirometry + DLCO sessions; give one of the two")
    say = (lambda *a: None) if args.json else print

    tables = load_tables()
    gc.freeze()  # as the command line does once its tables are loaded (bridge.cli.main)
    say(f"generating {args.sessions} sessions (seed {SEED}) ...")
    dlco_only = generate(args.sessions)
    inputs = with_spirometry(dlco_only) if args.spirometry else dlco_only
    kinds: dict[str, dict[str, Any]] = {}
    if args.whole_report:
        say(f"timing three kinds of session, best of {args.repeat} each ...")
        kinds["DLCO only"] = measure_kind(dlco_only, tables, args.repeat, args.subset)
        kinds["spirometry + DLCO"] = measure_kind(with_spirometry(dlco_only), tables, args.repeat, args.subset)
        inputs = with_whole_report(dlco_only)
    say(f"timing, best of {args.repeat} (gc enabled, collected before each pass) ...")
    main_kind = measure_kind(inputs, tables, args.repeat, args.subset)
    if args.whole_report:
        kinds["whole report"] = main_kind
    counts, stages = main_kind["counts"], main_kind["stages"]
    real_bytes, floor_bytes = main_kind["real_bytes"], main_kind["floor_bytes"]
    floor_best, floor_all = main_kind["floor_best"], main_kind["floor_all"]
    real_best, real_all = main_kind["real_best"], main_kind["real_all"]
    dlco_only_best = best_of(args.repeat, real_pass(dlco_only, tables))[0] if args.spirometry else None
    n = len(inputs)
    real_rate, floor_rate = n / real_best, n / floor_best
    ratio = real_best / floor_best
    subset = inputs[: min(args.subset, n)]
    oru_s = oru_per_message(tables)
    missing = missing_validator() if args.validators else None
    validators = validator_costs(inputs[: args.validators], tables) if args.validators and not missing else {}

    result: dict[str, Any] = {
        "sessions": n,
        "repeat": args.repeat,
        "gc": "enabled, collected before each pass",
        "real_sessions_per_s": round(real_rate),
        "floor_sessions_per_s": round(floor_rate),
        "ratio_real_to_floor": round(ratio, 1),
        "target_sessions_per_s": TARGET_PER_S,
        "target_met": real_rate >= TARGET_PER_S,
        "real_us_per_session": round(real_best / n * 1e6, 1),
        "floor_us_per_session": round(floor_best / n * 1e6, 1),
        "real_passes_s": [round(t, 3) for t in real_all],
        "floor_passes_s": [round(t, 3) for t in floor_all],
        "output_kb_per_session": {
            "real": round(real_bytes / n / 1024, 1),
            "floor": round(floor_bytes / n / 1024, 1),
        },
        "observations_per_session": round(statistics.mean(counts), 1),
        "stages_us_per_session": {k: round(v, 1) for k, v in stages.items()},
        "stage_subset": len(subset),
        "oru_us_per_message_sample01": round(oru_s * 1e6, 1),
        "oru_within_budget": oru_s < ORU_BUDGET_S,
        **machine(),
    }
    if dlco_only_best is not None:
        result["spirometry"] = True
        result["real_us_per_session_dlco_only"] = round(dlco_only_best / n * 1e6, 1)
        result["real_us_per_session_spirometry_and_dlco"] = result["real_us_per_session"]
    if kinds:
        result["kinds"] = {name: _kind_summary(kind) for name, kind in kinds.items()}
    if validators:
        build_us = stages["FHIR (to_bundle + compact JSON)"], stages["HL7 (to_oru+control_id)"]
        result["validators_ms_per_session"] = {k: round(v, 2) for k, v in validators.items()}
        result["validator_to_build_ratio"] = {
            "fhir": round(validators["fhir_resources_r4b_validate_ms"] * 1e3 / build_us[0]),
            "hl7": round(validators["hl7apy_strict_parse_ms"] * 1e3 / build_us[1]),
        }
        result["validator_sessions"] = args.validators
    if missing:
        result["validators_skipped"] = f"{missing} is not installed"

    if args.json:
        print(orjson.dumps(result).decode())
        return 0
    _print_report(result, stages, validators)
    return 0


def _print_report(result: dict[str, Any], stages: dict[str, float], validators: dict[str, float]) -> None:
    met = "met" if result["target_met"] else "NOT met"
    size = result["output_kb_per_session"]
    real_us, floor_us = result["real_us_per_session"], result["floor_us_per_session"]
    print()
    print(f"machine: {result['nproc']} CPUs, Python {result['python']}, {result['date']}; one core used")
    print(f"sessions: {result['sessions']}, {result['observations_per_session']} Observations/OBX each")
    print(f"output per session: real {size['real']} kB, floor {size['floor']} kB")
    if result.get("spirometry"):
        print(
            f"convert per session, same run: DLCO only {result['real_us_per_session_dlco_only']} µs, "
            f"spirometry + DLCO {result['real_us_per_session_spirometry_and_dlco']} µs"
        )
    print(f"real  (process + FHIR + HL7):   {result['real_sessions_per_s']:6d} sessions/s ({real_us} µs each)")
    print(f"floor (orjson + dicts + joins): {result['floor_sessions_per_s']:6d} sessions/s ({floor_us} µs each)")
    print(
        f"ratio real/floor: {result['ratio_real_to_floor']}x; target {TARGET_PER_S} sessions/s "
        f"(about {TARGET_RATIO:.0f}x the floor): {met}"
    )
    print()
    print(f"per stage, {result['stage_subset']} sessions, session by session (µs per session):")
    total = sum(stages.values())
    for label, value in stages.items():
        print(f"  {label:48} {value:8.1f}  {value / total:5.1%}")
    print(f"  {'total':48} {total:8.1f}")
    budget = "within" if result["oru_within_budget"] else "OVER"
    print(
        f"to_oru on {TEMPLATES[0]}: {result['oru_us_per_message_sample01']} µs per message "
        f"({budget} the {ORU_BUDGET_S * 1e3:g} ms budget)"
    )
    if "kinds" in result:
        _print_kinds(result["kinds"])
    if "validators_skipped" in result:
        print()
        print(f"validators skipped: {result['validators_skipped']} (pip install -e '.[test]' to measure them)")
    if validators:
        ratios = result["validator_to_build_ratio"]
        fhir_ms, hl7_ms = validators["fhir_resources_r4b_validate_ms"], validators["hl7apy_strict_parse_ms"]
        print()
        print(f"validators, {result['validator_sessions']} sessions (why they run in tests only):")
        print(f"  fhir.resources R4B Bundle.model_validate: {fhir_ms:7.2f} ms, {ratios['fhir']}x FHIR build")
        print(f"  hl7apy parse_message STRICT:              {hl7_ms:7.2f} ms, {ratios['hl7']}x HL7 build")


def _print_kinds(kinds: dict[str, dict[str, Any]]) -> None:
    names = list(kinds)
    print()
    print("three kinds of session, same run (floor with as many Observations as each real output):")
    print(f"  {'':42}" + "".join(f"{name:>20}" for name in names))
    rows = (
        ("Observations/OBX per session", lambda k: k["observations_per_session"]),
        (
            "output per session, kB (real/floor)",
            lambda k: f"{k['output_kb_per_session']['real']}/{k['output_kb_per_session']['floor']}",
        ),
        ("real, sessions/s", lambda k: k["real_sessions_per_s"]),
        ("real, µs per session", lambda k: k["real_us_per_session"]),
        ("floor, sessions/s", lambda k: k["floor_sessions_per_s"]),
        ("floor, µs per session", lambda k: k["floor_us_per_session"]),
        ("ratio real/floor", lambda k: f"{k['ratio_real_to_floor']}x"),
    )
    for label, value in rows:
        print(f"  {label:42}" + "".join(f"{value(kinds[name])!s:>20}" for name in names))
    print("  per stage, µs per session:")
    for stage in STAGES:
        print(f"    {stage:40}" + "".join(f"{kinds[name]['stages_us_per_session'][stage]:>20}" for name in names))
    totals = [round(sum(kinds[name]["stages_us_per_session"].values()), 1) for name in names]
    print(f"    {'total':40}" + "".join(f"{t:>20}" for t in totals))


if __name__ == "__main__":
    sys.exit(main())
