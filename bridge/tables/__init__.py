"""The tables in ``mappings/`` parsed into science's typed values (pure; the layer above science).

Owns: parsing each table's text, one module each (``units``, ``grades``, ``plausibility``,
``codes``, ``result_status``, ``spirometry_grades``, through the one TOML error path in ``toml``;
the GLI-2017 reference equations by ``bridge.science.reference``), and the field maps
(``canonical_fields``, ``field_map_*``). The value types, the :class:`Tables` bundle among them,
live below in ``bridge.science.table_values`` and are re-exported here. Reading the files from
disk is ``bridge.tables.files``, the only module of this package that does I/O.
"""

from __future__ import annotations

from bridge.science.table_values import Bound, Code, CodeTable, Plausibility, Tables

__all__ = ["Bound", "Code", "CodeTable", "Plausibility", "Tables"]
