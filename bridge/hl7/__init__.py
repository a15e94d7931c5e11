"""HL7 v2 text in one package (pure): what every module that writes, reads, frames or answers HL7 v2 shares.

* :mod:`.text`: separators, escaping and unescaping, splitting into messages, segments and fields, MSH fields.
* :mod:`.mllp`: the MLLP block characters, framing a message, reading blocks from a stream.
* :mod:`.ack`: reading an ACK (python-hl7) and building one.
* :mod:`.tables`: HL7 tables 0001, 0008, 0074 and 0103 as data (``mappings/hl7_tables.toml``).

It sits just above ``bridge.errors`` and ``bridge.model`` and imports nothing else of the bridge,
so the readers, the emitters, the display, the service and the CLI can all use it.
The ORU^R01 writer itself is ``bridge.emit.hl7v2`` (string joins over :mod:`.text`).
"""
