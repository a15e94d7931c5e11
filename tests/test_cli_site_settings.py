"""Issue 11's settings on the command line: answer policy, SMART keys, retention, prune and status."""

from __future__ import annotations

from pathlib import Path

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec

from bridge.cli import main
from bridge.config import parse_settings
from bridge.errors import ConfigError
from bridge.service.ledger import Ledger, NewInput, NewMessage

SITE = 'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\n'
FHIR = '[destination.store]\npayload = "fhir"\ntransport = "fhir-rest"\nbase_url = "http://127.0.0.1:9/fhir"\n'
MLLP = '[destination.records]\npayload = "hl7"\ntransport = "mllp"\nport = 2575\n'


def _error(text: str) -> str:
    with pytest.raises(ConfigError) as caught:
        parse_settings(text, {}, source="site.toml")
    return str(caught.value)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        (SITE + MLLP + 'on_ar = "later"\n', "site.toml: destination.records.on_ar: one of dead-letter, retry"),
        (SITE + FHIR + 'client_id = "fh"\n', "site.toml: destination.store.token_url: set with client_id"),
        (
            SITE + FHIR + 'client_id = "fh"\ntoken_url = "http://127.0.0.1:9/t"\nprivate_key_file = "k.pem"\n'
            'token_env = "X"\n',
            "site.toml: destination.store.token_env: unset when client_id is set",
        ),
        (SITE + "retention_days = -1\n" + MLLP, "site.toml: retention_days: a number >= 0"),
        (SITE + "duplicate_memory_days = 0\n" + MLLP, "site.toml: duplicate_memory_days: a number >= 1"),
    ],
)
def test_a_bad_new_setting_names_its_key(text, expected):
    """Each new key is checked when read; the error names the file and key."""
    assert _error(text).startswith(expected)


def test_the_defaults_keep_todays_behaviour():
    """AE and AR dead-letter, 429/503 retried, retention off, duplicates remembered ten years."""
    settings = parse_settings(SITE + MLLP, {})
    service = settings.require_service()
    records = service.destinations[0]

    assert ("dead-letter", "dead-letter", "retry", 0.0, 3650.0) == (
        records.on_ae,
        records.on_ar,
        records.on_busy,
        service.retention_days,
        service.duplicate_memory_days,
    )


def test_a_bad_private_key_stops_watch_at_start(tmp_path: Path, capsys):
    """A P-256 key (SMART asks for RS384 or ES384): watch exits 1 with one line naming the key file."""
    # source: SMART Backend Services: clients sign with RS384 or ES384
    key = tmp_path / "client.pem"
    key.write_bytes(
        ec.generate_private_key(ec.SECP256R1()).private_bytes(
            serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
        )
    )
    config = tmp_path / "bridge.toml"
    config.write_text(
        SITE + FHIR + f'client_id = "fh"\ntoken_url = "http://127.0.0.1:9/token"\nprivate_key_file = "{key}"\n'
    )
    (tmp_path / "in").mkdir()  # the inbox exists (a missing one stops watch first)

    code = main(["watch", "--config", str(config)])

    assert 1 == code
    assert f"dlco-bridge: {key}: private_key_file: an RSA key (RS384) or an EC P-384 key (ES384)\n" == (
        capsys.readouterr().err
    )


def test_prune_and_status_on_a_small_ledger(tmp_path: Path, capsys):
    """prune --older-than 30 removes the old payload and says so; status shows the ledger's size."""
    config = tmp_path / "bridge.toml"
    config.write_text(SITE + MLLP)
    clock = [1_700_000_000.0]
    with Ledger.open(tmp_path / "st" / "ledger.sqlite3", now=lambda: clock[0]) as ledger:
        (row,) = ledger.record_input_and_enqueue(
            NewInput("c" * 64, "c.json", "T-1"), [NewMessage("records", "M-1", "T-1", "p", b"MSH|x", "text/plain")]
        )
        ledger.mark_delivered(row, "AA")

    code = main(["prune", "--config", str(config), "--older-than", "0"])
    out = capsys.readouterr().out
    main(["status", "--config", str(config)])
    status = capsys.readouterr().out

    assert 0 == code
    assert (
        "1 payload and 1 attempt record removed (delivered over 0 days ago); 0 messages, 0 inputs and "
        "0 superseded records of sent resources forgotten" in out
    )
    assert status.startswith(f"ledger {tmp_path / 'st' / 'ledger.sqlite3'}  0.")
    assert " MB (0.0 MB of payloads, " in status
