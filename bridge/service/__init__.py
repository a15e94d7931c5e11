"""The watch-folder service (shell): everything ``dlco-bridge watch`` does besides the pure pipeline.

Owns the I/O around the core, one module per job: :mod:`~bridge.service.watcher` (when an inbox
file is complete), :mod:`~bridge.service.intake` (what becomes of it: ledger first, then archive
or quarantine), :mod:`~bridge.service.ledger` (the SQLite state and the single-instance lock),
:mod:`~bridge.service.delivery` and :mod:`~bridge.service.backoff` (due outbox rows to
transports), :mod:`~bridge.service.transports` (MLLP, FHIR REST, file, memory),
:mod:`~bridge.service.metrics`, :mod:`~bridge.service.loopback` (the one lifecycle of every
listener), :mod:`~bridge.service.logs`, :mod:`~bridge.service.files`, and
:mod:`~bridge.service.runner` (the two loops and the graceful stop).

The core never imports this package (``tests/test_architecture.py``); the CLI builds the ledger
and transports and passes them in. Importing the package imports nothing: each caller names
the module it needs.
"""
