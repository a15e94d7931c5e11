"""dlco-bridge: single-breath DLCO results from lab exports to FHIR R4 and HL7 v2.

Not a medical device. It normalises, recomputes and flags; local policy and licensed
practice decide what is used clinically.
"""

from bridge.errors import BridgeError, InputError
from bridge.model import Finding, Outcome, Quantity, Session, Severity
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables.files import load_tables
from bridge.version import __version__

__all__ = [
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
