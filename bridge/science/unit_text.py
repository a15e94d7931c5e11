"""How people read a unit: the trade's spelling of a UCUM code (``mL/min/mmHg``, not ``mL/min/mm[Hg]``).

Owns the one translation from UCUM (what machines get: FHIR, HL7, ``check --json``) to the
spelling printed for people by ``check``, ``convert``, ``demo`` and the findings' sentences. Pure (below
the display layer, because science writes finding sentences with it).
"""

from __future__ import annotations

from types import MappingProxyType

# UCUM atoms written in square brackets or as codes no one reads aloud, and how the trade writes them.
# source: UCUM (unitsofmeasure.org), atoms mm[Hg], [in_i], [ft_i], [lb_av], Cel
_PEOPLE = MappingProxyType(
    {
        "mm[Hg]": "mmHg",
        "[in_i]": "in",
        "[ft_i]": "ft",
        "[lb_av]": "lb",
        "Cel": "°C",
    }
)


def for_people(ucum: str) -> str:
    """``ucum`` spelt as people read it: each bracketed atom replaced by its trade spelling."""
    parts = ucum.split("/")
    return "/".join(_PEOPLE.get(part, part) for part in parts)
