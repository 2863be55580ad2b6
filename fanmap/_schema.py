"""Names shared by every stage: the labelled-map contract.

A *fan map* is an :class:`xarray.Dataset` with dimensions ``(FIELD, GATE)``:
one row per field value (one gate sweep each, in acquisition order), with
coordinates in T and V.  A *gate map* has dimensions ``(BOTTOM_GATE,
TOP_GATE)`` in V and a scalar coordinate ``FIELD`` in T.  Signals are
resistances in ohm named ``RXX`` and (optionally) ``RXY``.  Every variable and
coordinate carries ``units`` and ``long_name`` attributes; ``MAP_KIND`` in the
dataset attributes is ``"fan"`` or ``"gates"``.  The simulator stores its
ground truth in dataset attributes whose names start with ``TRUTH_PREFIX``.
"""

FIELD = "field"
GATE = "gate"
TOP_GATE = "top_gate"
BOTTOM_GATE = "bottom_gate"
RXX = "rxx"
RXY = "rxy"
SWEEP_DIRECTION = "sweep_direction"  # optional coordinate along FIELD: +1 up, -1 down
MAP_KIND = "map_kind"
FAN = "fan"
GATES = "gates"
TRUTH_PREFIX = "truth_"

UNITS = {FIELD: "T", GATE: "V", TOP_GATE: "V", BOTTOM_GATE: "V", RXX: "ohm", RXY: "ohm"}
LONG_NAMES = {
    FIELD: "magnetic field",
    GATE: "gate voltage",
    TOP_GATE: "top gate voltage",
    BOTTOM_GATE: "bottom gate voltage",
    RXX: "longitudinal resistance",
    RXY: "Hall resistance",
}
