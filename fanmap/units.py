"""Unit spellings found in lab files, and their conversion to SI.

A unit string is parsed into a :class:`Unit`: the physical quantity it
measures and the factor that takes a value to SI (V, T, ohm, S, A).  The
spellings are the ones acquisition programs and hand-written headers use:
``mV``, ``µV``/``uV``, ``kOhm``, ``Ω``, ``G`` (gauss), ``kG``, ``e^2/h``,
``ohm/sq`` and so on.

Quantities: ``"voltage"``, ``"field"``, ``"resistance"``,
``"sheet_resistance"`` (ohm per square), ``"conductance"``, ``"current"``.

Examples
--------
>>> parse_unit("kOhm")
Unit(quantity='resistance', factor=1000.0, text='kOhm')
>>> float(to_si(250.0, "mV"))
0.25
>>> f"{parse_quantity('10 nA', 'current'):.1e}"
'1.0e-08'
"""

import re
from typing import NamedTuple

import numpy as np

from .errors import InputError
from .physics import CONDUCTANCE_QUANTUM_SINGLE, VON_KLITZING

__all__ = [
    "Unit", "SI_UNITS", "QUANTITY_NAMES", "parse_unit", "to_si", "convert", "parse_quantity",
    "known_spellings",
]

#: The SI unit each quantity is stored in.
SI_UNITS = {
    "voltage": "V", "field": "T", "resistance": "ohm", "sheet_resistance": "ohm",
    "conductance": "S", "current": "A",
}

#: Human names for messages.
QUANTITY_NAMES = {
    "voltage": "a voltage", "field": "a magnetic field", "resistance": "a resistance",
    "sheet_resistance": "a sheet resistance", "conductance": "a conductance",
    "current": "a current",
}


class Unit(NamedTuple):
    """A parsed unit: SI value = ``factor`` * value in this unit."""

    quantity: str
    factor: float
    text: str


_PREFIXES = {
    "": 1.0, "p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "m": 1e-3,
    "k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9,
}

# Base spellings (compared case-insensitively unless listed in _CASE_SENSITIVE).
_BASES = {
    "v": ("voltage", 1.0), "volt": ("voltage", 1.0), "volts": ("voltage", 1.0),
    "t": ("field", 1.0), "tesla": ("field", 1.0),
    "g": ("field", 1e-4), "gs": ("field", 1e-4), "gauss": ("field", 1e-4),
    "oe": ("field", 1e-4),  # oersted: equal to gauss in vacuum (common practice)
    "ohm": ("resistance", 1.0), "ohms": ("resistance", 1.0),
    "s": ("conductance", 1.0), "siemens": ("conductance", 1.0), "mho": ("conductance", 1.0),
    "a": ("current", 1.0), "amp": ("current", 1.0), "amps": ("current", 1.0),
    "ampere": ("current", 1.0), "amperes": ("current", 1.0),
}
# Single-letter symbols are case-sensitive: "T" (tesla) but "t" is not a unit we accept
# on its own, "S" (siemens) but "s" is seconds, "G" (gauss), "A" (ampere).
_CASE_SENSITIVE = {"V", "T", "G", "S", "A"}

_SHEET = re.compile(r"^(?P<base>.*?)\s*(/\s*(sq|square|□|\[\]|squares)|per\s+square|sq\^?-1)$",
                    re.IGNORECASE)
_QUANTUM = re.compile(r"^(?P<mult>\d+(\.\d+)?)?\s*\*?\s*(?P<q>e\^?2/h|e\*\*2/h|e²/h|h/e\^?2|h/e\*\*2|h/e²)$",
                      re.IGNORECASE)


def _normalise(text):
    text = str(text).strip()
    while len(text) >= 2 and text[0] + text[-1] in ("()", "[]", "{}"):
        text = text[1:-1].strip()
    for omega in ("Ω", "Ω", "ω"):
        text = text.replace(omega, "ohm")
    return text.replace(" ", "") if len(text) < 12 or "/" in text else text


def _parse_simple(text):
    """Prefix + base (``kOhm``, ``mT``, ``µV``), or None."""
    if text in _CASE_SENSITIVE:
        return _BASES[text.lower()]
    low = text.lower()
    if low in _BASES and len(low) > 1:
        return _BASES[low]
    for prefix, scale in _PREFIXES.items():
        if not prefix or not text.startswith(prefix):
            continue
        rest = text[len(prefix):]
        if rest in _CASE_SENSITIVE:
            base = _BASES[rest.lower()]
        elif len(rest) > 1 and rest.lower() in _BASES:
            base = _BASES[rest.lower()]
        else:
            continue
        if prefix == "K" and base[0] != "resistance":
            continue  # "KOhm" is a common misspelling of kohm; "KV" or "KG" are not accepted
        return base[0], base[1] * scale
    return None


def parse_unit(text, *, where=None):
    """Parse a unit string.

    Parameters
    ----------
    text : str
        The unit as written (brackets are allowed: ``"(kOhm)"``).
    where : str, optional
        Where the unit was found, for the error message (``"column 'B' of run.csv"``).

    Returns
    -------
    Unit

    Raises
    ------
    InputError
        If the spelling is not recognised.

    Examples
    --------
    >>> parse_unit("µV").factor
    1e-06
    >>> parse_unit("kG").quantity, parse_unit("kG").factor
    ('field', 0.1)
    >>> round(parse_unit("e^2/h").factor * 25812.80745, 6)
    1.0
    """
    original = str(text)
    norm = _normalise(original)
    if not norm:
        raise InputError(f"empty unit{' for ' + where if where else ''}")
    match = _QUANTUM.match(norm)
    if match:
        mult = float(match.group("mult") or 1.0)
        if match.group("q").lower().startswith("e"):
            return Unit("conductance", mult * CONDUCTANCE_QUANTUM_SINGLE, original)
        return Unit("resistance", VON_KLITZING / mult, original)
    match = _SHEET.match(norm)
    if match:
        base = _parse_simple(match.group("base"))
        if base is not None and base[0] == "resistance":
            return Unit("sheet_resistance", base[1], original)
    if norm.lower() in ("1/ohm", "ohm^-1", "ohm-1"):
        return Unit("conductance", 1.0, original)
    base = _parse_simple(norm)
    if base is None:
        raise InputError(
            f"unit {original!r}{' of ' + where if where else ''} is not recognised; "
            f"known units: {known_spellings()}")
    return Unit(base[0], float(base[1]), original)


def known_spellings():
    """A short list of accepted spellings, for messages."""
    return ("V, mV, uV/µV, nV, kV; T, mT, G, kG; ohm/Ω, kohm, Mohm, h/e^2; ohm/sq; "
            "S, mS, uS/µS, e^2/h; A, mA, uA/µA, nA, pA")


def to_si(values, unit, *, expect=None, where=None):
    """Convert ``values`` given in ``unit`` (a string or :class:`Unit`) to SI.

    ``expect`` (a quantity name or a tuple of them) checks that the unit
    measures the right thing.

    Examples
    --------
    >>> to_si([1.0, 2.0], "kG").tolist()
    [0.1, 0.2]
    """
    unit = unit if isinstance(unit, Unit) else parse_unit(unit, where=where)
    if expect is not None:
        allowed = (expect,) if isinstance(expect, str) else tuple(expect)
        if unit.quantity not in allowed:
            wanted = " or ".join(QUANTITY_NAMES[q] for q in allowed)
            raise InputError(
                f"unit {unit.text!r}{' of ' + where if where else ''} measures "
                f"{QUANTITY_NAMES[unit.quantity]}, but {wanted} is needed")
    if np.isscalar(values) or isinstance(values, (list, tuple)):
        return np.asarray(values, dtype=float) * unit.factor
    return values * unit.factor


def convert(values, from_unit, to_unit):
    """Convert between two units of the same quantity.

    Examples
    --------
    >>> float(convert(1.5, "T", "G"))
    15000.0
    """
    source = parse_unit(from_unit)
    target = parse_unit(to_unit)
    if source.quantity != target.quantity:
        raise InputError(f"cannot convert {from_unit!r} ({QUANTITY_NAMES[source.quantity]}) "
                         f"to {to_unit!r} ({QUANTITY_NAMES[target.quantity]})")
    return np.asarray(values, dtype=float) * (source.factor / target.factor)


_NUMBER_UNIT = re.compile(r"^\s*([-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?)\s*(.*?)\s*$")


def parse_quantity(text, expect=None, *, default_unit=None, where=None):
    """Parse ``"10 nA"``, ``"0.5T"`` or a bare number into an SI float.

    A bare number is taken in ``default_unit`` (SI when not given).

    Examples
    --------
    >>> parse_quantity("250 mT", "field")
    0.25
    >>> parse_quantity(1e-8, "current")
    1e-08
    """
    if isinstance(text, (int, float, np.integer, np.floating)):
        value, unit_text = float(text), ""
    else:
        match = _NUMBER_UNIT.match(str(text))
        if not match:
            raise InputError(f"{text!r}{' for ' + where if where else ''} is not a number "
                             "with an optional unit (write e.g. '10 nA')")
        value, unit_text = float(match.group(1)), match.group(4)
    if not unit_text:
        if default_unit is None:
            return value
        unit_text = default_unit
    return float(to_si(value, unit_text, expect=expect, where=where))
