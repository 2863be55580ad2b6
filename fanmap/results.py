"""Plain result dataclasses, and their JSON form.

Every analysis returns one of these; the command line, the report and the
batch table only ever read them.  Values are SI; ``to_dict`` gives the JSON
contract documented in the README (NaN and infinities become ``null``).
Fields declared with ``metadata={"json": False}`` hold bulky working data
(ridge points for figures) and are left out of the JSON.
"""

import dataclasses
import json
import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["State", "FanResult", "GateResult", "to_jsonable", "dumps"]


def to_jsonable(value):
    """Recursively turn dataclasses, NumPy scalars/arrays and non-finite floats into JSON types."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: to_jsonable(getattr(value, f.name)) for f in dataclasses.fields(value)
                if f.metadata.get("json", True)}
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    return value


def dumps(result):
    """JSON text of a result dataclass."""
    return json.dumps(to_jsonable(result), indent=2, allow_nan=False) + "\n"


@dataclass
class State:
    """One fitted line of the fan: V_g = intercept + slope * B.

    ``filling`` is the filling factor as text ("2", "-6", "2/3"; for a
    satellite the Landau slope t), ``kind`` one of "integer",
    "broken-symmetry", "fractional", "satellite".
    """

    filling: str
    kind: str
    slope: float                      # V/T
    intercept: float                  # V (gate voltage at B = 0)
    points: int
    field_min: float                  # T
    field_max: float                  # T
    filling_value: float = float("nan")
    filling_stderr: float = float("nan")
    onset_field: float = float("nan")  # T, lowest field where the state is resolved
    band_filling: int | None = None    # s, satellites only
    distance_to_fraction_sigma: float | None = None  # fractional states only


@dataclass
class FanResult:
    """Calibration of one fan map (names follow the JSON contract)."""

    density_per_volt: float
    density_per_volt_stderr: float
    capacitance_per_area: float
    zero_density_voltage: float
    zero_density_voltage_stderr: float
    density_offset: float
    degeneracy: int | None
    berry_phase: int | None
    scale_from: str
    states: list[State] = field(default_factory=list)
    density_per_volt_bootstrap_stderr: float = float("nan")
    zero_density_voltage_bootstrap_stderr: float = float("nan")
    capacitance_per_area_stderr: float = float("nan")
    # parts of the total *_stderr above: fit covariance and a systematic term measured on the data
    density_per_volt_covariance_stderr: float = float("nan")
    density_per_volt_systematic: float = float("nan")
    zero_density_voltage_covariance_stderr: float = float("nan")
    zero_density_voltage_systematic: float = float("nan")
    scale_candidates: list[dict] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    material: str = "auto"
    extras: dict = field(default_factory=dict)   # optional analyses (quantum capacitance, drift, ...)
    superlattice: dict | None = None
    crosschecks: dict | None = None
    source: str | None = None
    version: str = ""
    # {"field": T array, "gate": V array, "state": index into states (-1: unassigned), "weight": array}
    ridge_points: dict | None = field(default=None, repr=False, metadata={"json": False})

    def to_dict(self):
        return to_jsonable(self)


@dataclass
class GateResult:
    """Calibration of one or more dual-gate maps."""

    top_capacitance: float
    top_capacitance_stderr: float
    bottom_capacitance: float
    bottom_capacitance_stderr: float
    capacitance_ratio: float
    capacitance_ratio_stderr: float
    top_offset: float
    top_offset_stderr: float
    bottom_offset: float
    bottom_offset_stderr: float
    degeneracy: int | None
    scale_from: str
    displacement_convention: str
    warnings: list[str] = field(default_factory=list)
    extras: dict = field(default_factory=dict)
    material: str = "auto"
    source: str | None = None
    version: str = ""
    # {"top_gate": V array, "bottom_gate": V array, "map": index of the map} for figures
    ridge_points: dict | None = field(default=None, repr=False, metadata={"json": False})

    def to_dict(self):
        return to_jsonable(self)
