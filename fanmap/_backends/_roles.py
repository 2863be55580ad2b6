"""Guess what a variable is (gate, field, R_xx, R_xy, current, sweep index) from its name and units."""

import re

from ..errors import InputError
from ..units import parse_unit

# Roles a variable can play.
FIELD = "field"
GATE = "gate"
TOP = "top_gate"
BOTTOM = "bottom_gate"
XX = "xx"
XY = "xy"
CURRENT = "current"
SWEEP = "sweep"
DIRECTION = "direction"


def squash(name):
    """Lower-case name without separators: ``"R_xx (4pt)"`` -> ``"rxx4pt"``."""
    return re.sub(r"[^0-9a-zµ]", "", str(name).lower())


_FIELD_NAMES = {"b", "bz", "bfield", "field", "magneticfield", "bext", "bapplied", "magnet",
                "magnetfield", "bperp", "fieldt", "h", "hfield"}
_TOP_NAMES = {"vtg", "vt", "vtop", "vtopgate", "topgate", "tg", "top", "vgtop", "vgt", "topgatevoltage"}
_BOTTOM_NAMES = {"vbg", "vb", "vbottom", "vbottomgate", "bottomgate", "bg", "bottom", "vback",
                 "vbackgate", "backgate", "back", "vgbottom", "vgb", "vgback", "bottomgatevoltage",
                 "backgatevoltage"}
_GATE_NAMES = {"vg", "gate", "vgate", "gatevoltage", "ug", "vgs", "vsg", "gatebias"}
_SWEEP_NAMES = {"sweep", "sweepindex", "sweepno", "sweepnumber", "sweepid", "scan", "scanindex",
                "scanno", "trace", "traceindex", "run", "repetition", "repeat"}
_DIRECTION_NAMES = {"sweepdirection", "direction", "sweepdir", "dir"}
_CURRENT_NAMES = {"i", "current", "iexc", "iac", "excitation", "excitationcurrent", "isd", "ibias",
                  "idc", "ids", "isource"}


def _signal_component(squashed):
    """'xx', 'xy' or None from names like rxx, R_xx, vxx, sigma_xy, rho_xx, gxx, rhall."""
    match = re.match(r"^(r|v|g|s|sigma|rho|res|resistance|conductance|lockin|x|y)?(xx|xy|yx|yy)", squashed)
    if match:
        return {"xx": XX, "yy": XX, "xy": XY, "yx": XY}[match.group(2)]
    if re.match(r"^(r|v|rho)?(hall|h)$", squashed) or squashed.startswith("hall"):
        return XY
    if squashed in ("r", "r4pt", "r4p", "r2pt", "resistance", "rlong", "rl", "rho", "rsq",
                    "rsheet", "g", "g2pt", "conductance", "sigma", "longitudinal"):
        return XX
    if any(word in squashed for word in ("lockin", "signal", "amplitude", "magnitude")):
        return XX  # a lock-in output with no xx/xy in its name: the first one is taken as R_xx
    return None


def name_role(name, long_name=""):
    """Role suggested by a variable's name (then its ``long_name``), or None."""
    for text in (name, long_name):
        sq = squash(text)
        if not sq:
            continue
        if sq in _DIRECTION_NAMES:
            return DIRECTION
        if sq in _SWEEP_NAMES:
            return SWEEP
        if sq in _FIELD_NAMES:
            return FIELD
        if sq in _TOP_NAMES:
            return TOP
        if sq in _BOTTOM_NAMES:
            return BOTTOM
        if sq in _GATE_NAMES:
            return GATE
        if sq in _CURRENT_NAMES:
            return CURRENT
        component = _signal_component(sq)
        if component:
            return component
        # long_name phrases
        low = str(text).lower()
        if "hall" in low:
            return XY
        if "longitudinal" in low:
            return XX
        if "top" in low and "gate" in low:
            return TOP
        if ("bottom" in low or "back" in low) and "gate" in low:
            return BOTTOM
        if "gate" in low:
            return GATE
        if "field" in low:
            return FIELD
        if "current" in low:
            return CURRENT
    return None


def unit_quantity(units_text, where):
    """Quantity of a unit string, or None when there is no unit; raises on a bad spelling."""
    if units_text is None or str(units_text).strip() in ("", "1", "-", "none", "None", "a.u.", "arb"):
        return None
    try:
        return parse_unit(units_text, where=where).quantity
    except InputError:
        return "unknown"


_AXIS_ROLES = (FIELD, GATE, TOP, BOTTOM)
_SIGNAL_QUANTITIES = ("resistance", "sheet_resistance", "conductance")


def classify(name, long_name, units_text, where):
    """(role, reason) from name and units together; role may be None.

    Units decide the quantity when they are present; the name decides which
    of several roles of that quantity (a voltage is a gate or a lock-in
    signal).
    """
    by_name = name_role(name, long_name)
    quantity = unit_quantity(units_text, where)
    unit_note = f"units {units_text!r}" if quantity else "no units"
    if quantity == "field":
        return FIELD, f"{unit_note}"
    if quantity == "current":
        return CURRENT, unit_note
    if quantity in _SIGNAL_QUANTITIES:
        role = by_name if by_name in (XX, XY) else XX
        return role, f"{unit_note}, name" if by_name in (XX, XY) else f"{unit_note}"
    if quantity == "voltage":
        if by_name in (GATE, TOP, BOTTOM, XX, XY):
            return by_name, f"name and {unit_note}"
        return GATE, f"{unit_note} (voltage with a name that is not a signal)"
    if by_name is not None:
        return by_name, f"name ({unit_note})"
    return None, unit_note


def is_axis(role):
    return role in _AXIS_ROLES
