"""Checking a dual-gate map and finding its fixed magnetic field.

Turns an :class:`xarray.Dataset` that follows the gate-map contract of
:mod:`fanmap._schema` into plain arrays on increasing, evenly spaced gate
axes, or raises an :class:`~fanmap.errors.InputError` that says what is wrong.
"""

import numpy as np

from . import _schema as S
from .errors import InputError, NoFanError

__all__ = ["map_field", "gate_arrays", "ZERO_FIELD"]

#: Maps below this |B| (T) are analysed as zero-field maps (neutrality ridge only).
ZERO_FIELD = 0.1

_FIELD_NAMES = ("field", "magnetic_field", "b_field", "bfield", "b", "field_t", "b_t")
_FIELD_UNITS = {"t": 1.0, "tesla": 1.0, "mt": 1e-3, "g": 1e-4, "gauss": 1e-4, "kg": 0.1}
_VOLT_UNITS = {"v": 1.0, "volt": 1.0, "volts": 1.0, "mv": 1e-3}
_OHM_UNITS = {"ohm": 1.0, "ohms": 1.0, "\u03c9": 1.0, "\u2126": 1.0, "kohm": 1e3, "k\u03c9": 1e3,
              "mohm": 1e6}


def _describe(ds):
    return ds.attrs.get("source", "the gate map")


def _field_scale(units, where, ds):
    if units is None or str(units).strip() == "":
        return 1.0  # the contract's SI default
    key = str(units).strip().lower()
    if key not in _FIELD_UNITS:
        raise InputError(f"{_describe(ds)}: field {where} has units {units!r}, not a magnetic "
                         "field; give the field with --field-value (in T)")
    return _FIELD_UNITS[key]


def map_field(gate_map, field=None):
    """The fixed magnetic field of a gate map (T).

    Taken from ``field`` when given, else from a scalar coordinate or variable
    with a field-like name or field units, else from a dataset attribute.

    Examples
    --------
    >>> import xarray as xr
    >>> ds = xr.Dataset(coords={"field": ((), 8.0, {"units": "T"})})
    >>> map_field(ds)
    8.0
    >>> map_field(xr.Dataset(attrs={"magnetic_field": "500 mT"}))
    0.5
    """
    if field is not None:
        return float(field)
    candidates = list(gate_map.coords.items()) + list(gate_map.data_vars.items())
    for name, var in candidates:
        units = var.attrs.get("units")
        named = str(name).lower() in _FIELD_NAMES
        field_units = units is not None and str(units).strip().lower() in _FIELD_UNITS
        if var.ndim == 0 and (named or field_units):
            return float(var.values) * _field_scale(units, repr(name), gate_map)
        if named and var.ndim > 0 and var.size > 0 and np.ptp(np.asarray(var.values, float)) == 0:
            return float(np.asarray(var.values, float).flat[0]) * _field_scale(units, repr(name), gate_map)
    for name, value in gate_map.attrs.items():
        if str(name).lower() not in _FIELD_NAMES:
            continue
        text = str(value).strip().split()
        try:
            number = float(text[0])
        except (ValueError, IndexError):
            raise InputError(f"{_describe(gate_map)}: attribute {name!r} = {value!r} is not a "
                             "field value; give the field with --field-value (in T)") from None
        units = text[1] if len(text) > 1 else gate_map.attrs.get(f"{name}_units")
        return number * _field_scale(units, f"attribute {name!r}", gate_map)
    raise InputError(f"{_describe(gate_map)}: no magnetic field found (no scalar coordinate, "
                     "variable or attribute 'field'); give it with --field-value (in T)")


def _scale(var, table, what, option, ds):
    units = var.attrs.get("units")
    if units is None:
        return 1.0
    key = str(units).strip().lower()
    if key not in table:
        raise InputError(f"{_describe(ds)}: {what} has units {units!r}; expected "
                         f"{', '.join(sorted(table))} ({option})")
    return table[key]


def _even_axis(values, name, ds):
    values = np.asarray(values, dtype=float)
    if values.size < 15:
        raise InputError(f"{_describe(ds)}: only {values.size} {name} values; a gate map needs "
                         "at least 15 points along each gate")
    if not np.all(np.isfinite(values)):
        raise InputError(f"{_describe(ds)}: the {name} axis holds NaN or infinite voltages")
    steps = np.diff(values)
    if np.any(steps == 0):
        raise InputError(f"{_describe(ds)}: repeated {name} values; average repeats first "
                         "(fanmap.prepare)")
    return values


def gate_arrays(gate_map, field=None):
    """Plain arrays of a gate map: ``dict(top, bottom, rxx, rxy, field, source)``.

    Axes are increasing and evenly spaced (resampled linearly when they are not);
    ``rxx`` and ``rxy`` (or None) have shape (len(bottom), len(top)) in ohm.
    """
    ds = gate_map
    for dim in (S.TOP_GATE, S.BOTTOM_GATE):
        if dim not in ds.dims:
            raise InputError(
                f"{_describe(ds)}: not a gate map (dimensions {tuple(ds.dims)}, need "
                f"{S.BOTTOM_GATE!r} and {S.TOP_GATE!r}); say which gate is which with "
                "--top-gate NAME --bottom-gate NAME")
    if S.RXX not in ds.data_vars:
        raise InputError(f"{_describe(ds)}: no {S.RXX!r} variable (longitudinal resistance); "
                         "name the signal with --signal")
    ds = ds.transpose(S.BOTTOM_GATE, S.TOP_GATE, ...).sortby(S.BOTTOM_GATE).sortby(S.TOP_GATE)
    top = _even_axis(ds[S.TOP_GATE].values, "top-gate", ds) * _scale(
        ds[S.TOP_GATE], _VOLT_UNITS, "the top-gate axis", "--gate-units", ds)
    bottom = _even_axis(ds[S.BOTTOM_GATE].values, "bottom-gate", ds) * _scale(
        ds[S.BOTTOM_GATE], _VOLT_UNITS, "the bottom-gate axis", "--gate-units", ds)
    signals = {}
    for name in (S.RXX, S.RXY):
        if name not in ds.data_vars:
            signals[name] = None
            continue
        var = ds[name]
        if var.dims[:2] != (S.BOTTOM_GATE, S.TOP_GATE) or var.ndim != 2:
            raise InputError(f"{_describe(ds)}: {name!r} has dimensions {var.dims}; expected "
                             f"({S.BOTTOM_GATE!r}, {S.TOP_GATE!r})")
        values = np.asarray(var.values, dtype=float) * _scale(var, _OHM_UNITS, name, "--signal-units", ds)
        values[~np.isfinite(values)] = np.nan
        signals[name] = values
    rxx = signals[S.RXX]
    finite = np.isfinite(rxx)
    if finite.mean() < 0.5:
        raise NoFanError(f"{_describe(ds)}: {100 * (1 - finite.mean()):.0f} % of {S.RXX!r} is NaN; "
                         "nothing to fit (check the file, or crop the map to the measured part)")
    if np.nanstd(rxx) == 0:
        raise NoFanError(f"{_describe(ds)}: {S.RXX!r} is constant; the map holds no ridge")
    top, bottom, rxx, rxy = _regularise(top, bottom, rxx, signals[S.RXY])
    return {"top": top, "bottom": bottom, "rxx": rxx, "rxy": rxy,
            "field": map_field(gate_map, field), "source": ds.attrs.get("source")}


def _regularise(top, bottom, rxx, rxy):
    """Resample onto evenly spaced axes when the recorded steps vary by more than 1 %."""
    def uneven(axis):
        steps = np.diff(axis)
        return np.ptp(steps) > 0.01 * np.abs(steps.mean())

    if not (uneven(top) or uneven(bottom)):
        return top, bottom, rxx, rxy
    from scipy.interpolate import RegularGridInterpolator

    new_top = np.linspace(top[0], top[-1], top.size)
    new_bottom = np.linspace(bottom[0], bottom[-1], bottom.size)
    grid = np.stack(np.meshgrid(new_bottom, new_top, indexing="ij"), axis=-1)

    def resample(values):
        if values is None:
            return None
        return RegularGridInterpolator((bottom, top), values, bounds_error=False)(grid)

    return new_top, new_bottom, resample(rxx), resample(rxy)
