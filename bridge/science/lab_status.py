"""The lab's own status of each value it sent (HL7 v2.5.1 table 0085, as in OBX-11), applied to the record (pure).

Owns: :class:`ResultStatusTable` (what each status code means for the bridge: final,
preliminary, not sent, withdraw; read from ``mappings/result_status.toml`` by
``bridge.tables.result_status``) and :func:`apply_lab_status`, the pipeline's step before derive.
A value the lab marked as not to be reported (X, I, N, O) or as wrong or deleted (W, D) is
taken out of the record, as if the lab had not exported it, with a finding, so nothing is
computed from it; a value marked preliminary (P, R, S) stays, and its status stays in the record
for the emitters, which send it (and what is computed from it) as preliminary; final statuses
(F, C, U) are dropped. A status applies to its own value only, never to the whole record.
Withdrawing what was sent earlier is the correction's work (``bridge.emit.status``): a value
taken out here is simply no longer produced.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import MISSING, dataclass, fields, is_dataclass, replace
from typing import Any, Literal

from bridge.errors import InvalidField
from bridge.model import Finding, Session, Severity
from bridge.values import field_types

StatusAction = Literal["final", "preliminary", "not_sent", "withdraw"]
STATUS_ACTIONS: tuple[StatusAction, ...] = ("final", "preliminary", "not_sent", "withdraw")

PRELIMINARY_CODE = "LAB_STATUS_PRELIMINARY"
NOT_SENT_CODE = "LAB_STATUS_NOT_SENT"
WITHDRAWN_CODE = "LAB_STATUS_WITHDRAWN"

_STEP = re.compile(r"([a-z][a-z0-9_]*)(?:\[(\d+)\])?")  # names may hold digits (fev1, fef25_75)


@dataclass(frozen=True, slots=True)
class ResultStatus:
    """One code of HL7 table 0085: its meaning as the table words it, and what the bridge does."""

    code: str
    meaning: str
    action: StatusAction


@dataclass(frozen=True, slots=True)
class ResultStatusTable:
    """Every status code a record may carry, by code."""

    statuses: Mapping[str, ResultStatus]

    def get(self, code: str) -> ResultStatus | None:
        return self.statuses.get(code)

    def is_preliminary(self, code: str | None) -> bool:
        found = self.statuses.get(code) if code is not None else None
        return found is not None and found.action == "preliminary"


def apply_lab_status(
    session: Session, table: ResultStatusTable, source: str = ""
) -> tuple[Session, tuple[Finding, ...]]:
    """The record with each value the lab marked not to be sent taken out, and a finding per status that matters.

    ``lab_status`` keeps only the preliminary statuses afterwards (the emitters read them).
    Raises InvalidField for a code table 0085 does not have, a path that names no value of the
    record, or a required value (the record cannot be read without it) marked not to be sent.
    """
    if not session.lab_status:
        return session, ()
    findings: list[Finding] = []
    kept: dict[str, str] = {}
    for path, code in session.lab_status.items():
        status = table.get(code)
        if status is None:
            known = ", ".join(sorted(table.statuses))
            expected = f"a result status of HL7 table 0085 ({known}), got {code!r}"
            raise InvalidField(f"lab_status.{path}", expected, source)
        present = _value_at(session, path, source) is not None
        said = f"the lab marked {path} {code} ({status.meaning.rstrip('.')})"
        if status.action == "final":
            continue
        if status.action == "preliminary":
            kept[path] = code
            if present:
                findings.append(_finding(PRELIMINARY_CODE, Severity.INFO, path, f"{said}: sent as preliminary."))
            continue
        if present:
            session = _without(session, path, code, source)
        if status.action == "withdraw":
            text = f"{said}: not sent; a value sent for it earlier is withdrawn."
            findings.append(_finding(WITHDRAWN_CODE, Severity.WARNING, path, text))
        else:
            findings.append(_finding(NOT_SENT_CODE, Severity.INFO, path, f"{said}: not sent."))
    return replace(session, lab_status=kept), tuple(findings)


def _finding(code: str, severity: Severity, path: str, message: str) -> Finding:
    return Finding(code=code, severity=severity, path=path, message=message)


def _steps(path: str, source: str) -> list[tuple[str, int | None]]:
    steps = []
    for part in path.split("."):
        match = _STEP.fullmatch(part)
        if match is None:
            raise InvalidField("lab_status", f"a path to a value of the record (results.dlco), got {path!r}", source)
        steps.append((match[1], int(match[2]) if match[2] is not None else None))
    return steps


def _value_at(session: Session, path: str, source: str) -> Any:
    """The value at ``path`` (None when it or a part above it is absent); a path the model lacks is refused."""
    node: Any = session
    for name, index in _steps(path, source):
        if node is None:
            return None
        if not is_dataclass(node) or name not in field_types(type(node)) or name == "lab_status":
            raise InvalidField("lab_status", f"a path to a value of the record (results.dlco), got {path!r}", source)
        node = getattr(node, name)
        if index is not None:
            if not isinstance(node, tuple):
                raise InvalidField("lab_status", f"an index only on manoeuvres, got {path!r}", source)
            node = node[index] if index < len(node) else None
    return node


def _without(session: Session, path: str, code: str, source: str) -> Session:
    """The record with the value at ``path`` left out (its default, None); a required value is refused."""

    def drop(model: Any, steps: list[tuple[str, int | None]]) -> Any:
        (name, index), rest = steps[0], steps[1:]
        current = getattr(model, name)
        if index is not None:
            items = list(current)
            if not rest:
                raise InvalidField("lab_status", f"a path to one value of a manoeuvre, got {path!r}", source)
            items[index] = drop(items[index], rest)
            return replace(model, **{name: tuple(items)})
        if rest:
            return replace(model, **{name: drop(current, rest)})
        if _is_required(type(model), name):
            expected = f"a status that lets the record keep the value (it is required), got {code!r}"
            raise InvalidField(f"lab_status.{path}", expected, source)
        return replace(model, **{name: None})

    result: Session = drop(session, _steps(path, source))
    return result


def _is_required(cls: type[Any], name: str) -> bool:
    """Whether the record type ``cls`` has no default for field ``name``."""
    found = next(f for f in fields(cls) if f.name == name)
    return found.default is MISSING and found.default_factory is MISSING
