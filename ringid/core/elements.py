"""Chemical element symbols: the sample sheet's ``elements`` column and the elements of a library phase.

The symbol table is gemmi's periodic table (``gemmi.Element(z).name`` for z = 1 … 118), imported
only when a symbol is checked. Deuterium and tritium (``D``, ``T``, written in some CIF formulas)
count as hydrogen. Only the standard library is imported at module level.
"""

from __future__ import annotations

import re
from functools import lru_cache

ISOTOPES = {"D": "H", "T": "H"}
_SYMBOL = re.compile(r"[A-Z][a-z]?")


@lru_cache(maxsize=1)
def element_symbols() -> frozenset[str]:
    """The symbols of elements 1 … 118, from gemmi's periodic table."""
    import gemmi

    return frozenset(gemmi.Element(z).name for z in range(1, 119))


def parse_elements(text: str) -> tuple[str, ...]:
    """The element symbols of a space- or comma-separated list (``"Ti O"``, ``"Au,C"``), sorted and
    without repeats; an empty text is the empty tuple (no restriction).

    Raises ValueError with a one-line reason for a token that is not an element symbol (a symbol
    written in the wrong case is named with its right spelling: ``co`` might be Co or C and O).
    """
    tokens = [t for t in re.split(r"[\s,;]+", text.strip()) if t]
    known = element_symbols()
    bad = []
    for t in tokens:
        if ISOTOPES.get(t, t) in known:
            continue
        right = t[:1].upper() + t[1:].lower()
        bad.append(f"{t!r} (did you mean {right!r}?)" if right in known else repr(t))
    if bad:
        raise ValueError(f"not an element symbol: {', '.join(bad)}; write symbols such as 'Ti O' or 'Au, C'")
    return tuple(sorted({ISOTOPES.get(t, t) for t in tokens}))


def formula_elements(formula: str) -> frozenset[str] | None:
    """The elements of a chemical formula (``"Ti O2"``, ``"CeO2"``, ``"Ca C O3"``), or None when the
    formula names none (unknown elements)."""
    found = {ISOTOPES.get(s, s) for s in _SYMBOL.findall(formula or "")}
    return frozenset(found) if found else None


def phase_elements(meta: dict) -> frozenset[str] | None:
    """The elements of a library phase from its ring list's metadata: an ``elements`` list when the
    metadata has one, else the symbols of its ``formula`` (the CIF's ``_chemical_formula_sum``, or
    the cell contents reduced, as the library records it); None when neither is given."""
    given = meta.get("elements")
    if given:
        return frozenset(ISOTOPES.get(str(e), str(e)) for e in given)
    return formula_elements(str(meta.get("formula") or ""))
