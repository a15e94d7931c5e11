"""Logging set-up for the service (shell): plain text or one JSON object per line.

Owns: the formatter. Log records carry operational fields only (event, file name, hash
prefix, destination, counts); patient identifiers appear only when the settings say
``log_patient_data = true``. The service is quiet by default: INFO for each file, no payloads.
"""

from __future__ import annotations

import logging
import sys
from datetime import UTC, datetime
from typing import Any

import orjson

_STANDARD = set(vars(logging.LogRecord("", 0, "", 0, "", None, None))) | {"message", "asctime"}


def _extras(record: logging.LogRecord) -> dict[str, Any]:
    return {k: v for k, v in vars(record).items() if k not in _STANDARD}


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "at": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
            **_extras(record),
        }
        return orjson.dumps(entry, default=str).decode()


class TextFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        at = datetime.fromtimestamp(record.created, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        fields = " ".join(f"{k}={v}" for k, v in _extras(record).items())
        return f"{at} {record.levelname.lower():<7} {record.getMessage()}" + (f"  {fields}" if fields else "")


def configure(log_format: str, level: int = logging.INFO) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter() if log_format == "json" else TextFormatter())
    root = logging.getLogger("dlco_bridge")
    root.handlers[:] = [handler]
    root.setLevel(level)
    root.propagate = False
