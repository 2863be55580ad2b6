"""Read a lab file (netCDF, delimited text, npz) into one labelled map.

:func:`open_map` is the single entry point.  It recognises the gate and
field axes and the R_xx / R_xy signals from names and units, converts
everything to SI (V, T, ohm), and returns a fan map (dims ``field, gate``)
or a gate map (dims ``bottom_gate, top_gate``) as described in
:mod:`fanmap._schema`.  Every guess is written to ``attrs["recognised"]``
and can be overridden by a keyword (the same options exist on every
``fanmap`` command, see :mod:`fanmap.commands._options`).

Examples
--------
>>> import tempfile, os
>>> path = os.path.join(tempfile.mkdtemp(), "run.csv")
>>> with open(path, "w") as fh:
...     _ = fh.write("B (T), Vg [mV], Rxx (kOhm)\\n")
...     for b in (1.0, 2.0):
...         for v in (-100, 0, 100):
...             _ = fh.write(f"{b}, {v}, {1 + b * abs(v) / 100}\\n")
>>> fan = open_map(path)
>>> fan.rxx.dims, fan.gate.values.tolist(), float(fan.rxx[1, 0])
(('field', 'gate'), [-0.1, 0.0, 0.1], 3000.0)
"""

from dataclasses import dataclass, field as _dc_field

import numpy as np
import xarray as xr

from . import _schema as S
from ._backends import read_raw
from ._backends import _roles as R
from ._backends._sweeps import count_changes, cut_sweeps
from ._backends.text import BLOCK
from .errors import InputError
from .prepare import regrid_sweeps
from .units import QUANTITY_NAMES, parse_quantity, parse_unit

__all__ = ["open_map", "open_maps", "describe_map", "MAX_ABS_GATE", "MAX_ABS_FIELD"]

#: Gate voltages beyond this are taken as a unit mistake (common practice: back gates
#: rarely exceed ~100-200 V).
MAX_ABS_GATE = 500.0
#: Fields beyond this are taken as a unit mistake (the strongest pulsed magnets reach ~100 T).
MAX_ABS_FIELD = 100.0

_NONE = ("", "none", "no", "off", "-")
_CURRENT = "_current"  # a measured current carried along with the signals
_CURRENT_ATTRS = ("excitation_current", "excitation", "current", "i_exc", "iexc", "i_ac", "iac",
                  "lockin_current", "bias_current", "source_current")
_FIELD_ATTRS = ("field", "b", "magnetic_field", "bz", "b_field", "field_t")


@dataclass
class _Context:
    path: str
    options: dict
    recognised: list = _dc_field(default_factory=list)
    reasons: dict = _dc_field(default_factory=dict)
    units_read: dict = _dc_field(default_factory=dict)  # name in the map -> (units as read, origin)
    fixed_field: str = None      # a constant field column (the field of a gate map)
    fixed_gates: list = _dc_field(default_factory=list)  # gates held constant in a fan
    used: set = _dc_field(default_factory=set)  # variables of the file that went into the map

    def note(self, text):
        self.recognised.append(text)

    def error(self, text):
        return InputError(f"{self.path}: {text}")


# --- entry point ---------------------------------------------------------------

def open_map(path, *, signal=None, hall=None, gate=None, field=None, top_gate=None,
             bottom_gate=None, gate_units=None, field_units=None, signal_units=None,
             hall_units=None, units=None, excitation_current=None, field_value=None,
             kind=None, lazy=None, format=None):
    """Read a map file into a labelled fan map or gate map.

    Parameters
    ----------
    path : str or path-like
        A netCDF/HDF5 (``.nc``, ``.h5``), delimited text (``.csv``, ``.tsv``,
        ``.txt``, ``.dat``) or ``.npz`` file.
    signal, hall : str, optional
        Names of the R_xx signal and of the Hall channel; ``hall="none"``
        ignores a Hall channel.
    gate, field, top_gate, bottom_gate : str, optional
        Names (variables or dimensions) of the axes.
    gate_units, field_units, signal_units, hall_units : str, optional
        Units to use instead of (or where there are no) units in the file.
    units : dict, optional
        ``{name: unit}`` for any variable.
    excitation_current : float or str, optional
        Excitation current (A, or text like ``"10 nA"``) for lock-in voltages.
    field_value : float or str, optional
        Field of a gate map (T, or text like ``"9 T"``) when the file does not say.
    kind : {"fan", "gates"}, optional
        Force the map kind.
    lazy : bool, optional
        Open netCDF files with dask chunks (default: only files above 256 MiB).
    format : {"netcdf", "text", "npz"}, optional
        Force the reader (default: from the suffix, then the first bytes).

    Returns
    -------
    xarray.Dataset
        A fan map (dims ``field, gate``) or gate map (dims ``bottom_gate,
        top_gate``); ``attrs["source"]`` is the path and ``attrs["recognised"]``
        lists every guess, one per line.

    Raises
    ------
    InputError
        When the file cannot be read or makes no physical sense; the message
        names the file, the problem and the option that fixes it.
    """
    if kind not in (None, S.FAN, S.GATES):
        raise InputError(f"kind must be {S.FAN!r} or {S.GATES!r}, not {kind!r}")
    options = dict(signal=signal, hall=hall, gate=gate, field=field, top_gate=top_gate,
                   bottom_gate=bottom_gate, gate_units=gate_units, field_units=field_units,
                   signal_units=signal_units, hall_units=hall_units, units=dict(units or {}),
                   excitation_current=excitation_current, field_value=field_value, kind=kind)
    ctx = _Context(str(path), options)
    try:
        raw, notes, fmt = read_raw(path, format=format, lazy=lazy)
        if lazy and fmt != "netcdf":
            notes.append("lazy opening applies to netCDF only; this file was read into memory")
        ctx.note(f"format: {fmt}" + (f" ({'; '.join(notes)})" if notes else ""))
        ds = _interpret(raw, ctx)
    except InputError as exc:
        if str(path) in str(exc):
            raise
        raise InputError(f"{path}: {exc}") from None
    ds.attrs["source"] = str(path)
    ds.attrs["recognised"] = "\n".join(ctx.recognised)
    return ds


# --- recognition -----------------------------------------------------------------

def _units_of(raw, name, ctx, override=None):
    """Unit text for variable ``name``: option, then the file's attributes."""
    if ctx.options["units"].get(name):
        return ctx.options["units"][name], "option"
    if override:
        return override, "option"
    attrs = raw[name].attrs if name in raw.variables else {}
    for key in ("units", "unit", "Units", "UNITS"):
        if attrs.get(key) not in (None, ""):
            return str(attrs[key]), "file"
    return None, None


def _long_name(raw, name):
    attrs = raw[name].attrs if name in raw.variables else {}
    return str(attrs.get("long_name", attrs.get("standard_name", "")))


def _classify_all(raw, ctx):
    info = {}
    for name in raw.variables:
        if name == BLOCK:
            continue
        unit_text, _ = _units_of(raw, name, ctx)
        role, reason = R.classify(name, _long_name(raw, name), unit_text, f"{name!r}")
        info[name] = (role, reason)
    return info


def _require_name(raw, name, option, ctx):
    if name is None:
        return None
    if name not in raw.variables and name not in raw.dims:
        raise ctx.error(f"--{option.replace('_', '-')} {name!r} is not in the file; "
                        f"it has {_inventory(raw)}")
    return name


def _inventory(raw):
    parts = []
    for name in raw.variables:
        if name == BLOCK:
            continue
        var = raw[name]
        unit = var.attrs.get("units")
        dims = f"({', '.join(map(str, var.dims))})" if var.dims else "(scalar)"
        parts.append(f"{name!r} {dims}" + (f" [{unit}]" if unit else ""))
    return "variables " + ", ".join(parts) if parts else "no variables"


def _pick_signals(raw, info, ctx):
    opts = ctx.options
    signal = _require_name(raw, opts["signal"], "signal", ctx)
    hall_opt = opts["hall"]
    no_hall = isinstance(hall_opt, str) and hall_opt.strip().lower() in _NONE
    hall = None if no_hall else _require_name(raw, hall_opt, "hall", ctx)
    numeric = [n for n in raw.data_vars if n != BLOCK and raw[n].ndim >= 1
               and np.issubdtype(raw[n].dtype, np.number)]
    if signal is None:
        xx = [n for n in numeric if info[n][0] == R.XX]
        if not xx:
            raise ctx.error(f"no R_xx signal recognised among {_inventory(raw)}; name it with "
                            "--signal NAME (and --signal-units if the file has none)")
        best = max(raw[n].ndim for n in xx)
        xx = [n for n in xx if raw[n].ndim == best]
        signal = xx[0]
        ctx.note(f"signal: {signal!r} by {info[signal][1]}"
                 + (f" (also looked like R_xx: {', '.join(map(repr, xx[1:]))})" if len(xx) > 1 else ""))
    else:
        ctx.note(f"signal: {signal!r} (option)")
    if hall is None and not no_hall:
        xy = [n for n in numeric if info[n][0] == R.XY and n != signal
              and set(raw[n].dims) == set(raw[signal].dims)]
        if xy:
            hall = xy[0]
            ctx.note(f"hall: {hall!r} by {info[hall][1]}")
        else:
            ctx.note("hall: none found (name one with --hall NAME)")
    elif hall is not None:
        ctx.note(f"hall: {hall!r} (option)")
    if hall == signal:
        raise ctx.error(f"--signal and --hall both name {signal!r}")
    return signal, hall


_AXIS_OPTIONS = (("gate", R.GATE), ("field", R.FIELD), ("top_gate", R.TOP), ("bottom_gate", R.BOTTOM))


def _axis_candidates(raw, info, dims, signals):
    """Axis-like variables: coordinates of ``dims``, 1-D variables along them, or same-shape 2-D ones."""
    out = []
    for name in raw.variables:
        if name in signals or name == BLOCK:
            continue
        var = raw[name]
        if not np.issubdtype(var.dtype, np.number):
            continue
        if var.ndim == 1 and var.dims[0] in dims:
            out.append(name)
        elif var.ndim == 2 and set(var.dims) == set(dims) and len(dims) == 2:
            out.append(name)
    return out


def _assign_axes(raw, info, candidates, ctx):
    """Map role -> variable name for the axes, honouring options."""
    chosen = {}
    for option, role in _AXIS_OPTIONS:
        name = _require_name(raw, ctx.options[option], option, ctx)
        if name is None:
            continue
        if name not in raw.variables:  # a bare dimension without coordinate values
            raise ctx.error(f"dimension {name!r} has no coordinate values; add them to the file")
        chosen[role] = name
        ctx.reasons[name] = "option"
    taken = set(chosen.values())
    guesses = [(n, info[n][0], info[n][1]) for n in candidates
               if n not in taken and R.is_axis(info[n][0])]
    roles_taken = set(chosen)
    for name, role, reason in guesses:
        if role in roles_taken:
            continue
        chosen[role] = name
        roles_taken.add(role)
        ctx.reasons[name] = f"by {reason}"
    # a second plain gate voltage alongside the first: a gate map with unnamed roles
    plain_gates = [n for n, role, _ in guesses if role == R.GATE and n not in chosen.values()]
    return chosen, plain_gates


def _varies(raw, name):
    values = np.asarray(raw[name].values, dtype=float)
    finite = values[np.isfinite(values)]
    return finite.size > 1 and float(np.ptp(finite)) > 0


def _decide_kind(chosen, plain_gates, candidates, raw, info, ctx):
    kind = ctx.options["kind"]
    named = {ctx.options[o] for o, _ in _AXIS_OPTIONS if ctx.options[o]}
    # a column that never changes (a gate held fixed, the field of a gate map) is not an axis,
    # as long as enough other axes vary
    gate_roles = [r for r in (R.GATE, R.TOP, R.BOTTOM) if r in chosen]
    varying_gates = [chosen[r] for r in gate_roles if _varies(raw, chosen[r])] + \
        [g for g in plain_gates if _varies(raw, g)]
    field = chosen.get(R.FIELD)
    if field is not None and field not in named and not _varies(raw, field) and len(varying_gates) >= 2:
        del chosen[R.FIELD]
        ctx.fixed_field = field
        ctx.note(f"{field!r} is constant: the field of a gate map, not an axis")
    if varying_gates:
        for role in gate_roles:
            name = chosen[role]
            if name not in named and name not in varying_gates:
                del chosen[role]
                ctx.fixed_gates.append(name)
                ctx.note(f"{name!r} is constant: not an axis")
        plain_gates = [g for g in plain_gates if g in varying_gates or g in named]
    gates = [chosen[r] for r in (R.GATE, R.TOP, R.BOTTOM) if r in chosen] + plain_gates
    has_field = R.FIELD in chosen
    found = ", ".join(f"{n!r} ({info[n][0] or 'unrecognised'}: {info[n][1]})" for n in candidates) \
        or "no axis variables"
    opts = ctx.options
    if kind is None and (opts["gate"] or opts["field"]):
        kind = S.FAN
        ctx.note("map kind: fan (a gate or field axis was named)")
    elif kind is None and (opts["top_gate"] or opts["bottom_gate"]):
        kind = S.GATES
        ctx.note("map kind: gates (a top or bottom gate was named)")
    elif kind is None:
        if has_field and gates:
            kind = S.FAN
        elif len(gates) >= 2:
            kind = S.GATES
        else:
            raise ctx.error(
                f"cannot tell what the axes are: found {found}. A fan needs a gate axis and a "
                "field axis (--gate NAME --field NAME); a gate map needs two gate axes "
                "(--top-gate NAME --bottom-gate NAME); units can be given with --gate-units, "
                "--field-units or --units NAME=UNIT")
        ctx.note(f"map kind: {kind} (from the axes)")
    elif opts["kind"]:
        ctx.note(f"map kind: {kind} (option)")
    if kind == S.FAN:
        if not has_field:
            raise ctx.error(f"a fan map needs a field axis; found {found}; name it with --field NAME")
        if not gates:
            raise ctx.error(f"a fan map needs a gate axis; found {found}; name it with --gate NAME")
        gate = chosen.get(R.GATE) or gates[0]
        ctx.note(f"field: {chosen[R.FIELD]!r} {ctx.reasons.get(chosen[R.FIELD], '')}")
        ctx.note(f"gate: {gate!r} {ctx.reasons.get(gate, 'by units')}")
        ctx.used.update((chosen[R.FIELD], gate))
        return kind, {S.FIELD: chosen[R.FIELD], S.GATE: gate}
    top, bottom = chosen.get(R.TOP), chosen.get(R.BOTTOM)
    rest = [g for g in gates if g not in (top, bottom)]
    if top is None and rest:
        top = rest.pop(0) if bottom is not None else rest.pop(1) if len(rest) > 1 else rest.pop(0)
        ctx.note(f"top gate: {top!r} guessed (override with --top-gate NAME)")
    if bottom is None and rest:
        bottom = rest.pop(0)
        ctx.note(f"bottom gate: {bottom!r} guessed (override with --bottom-gate NAME)")
    if top is None or bottom is None:
        raise ctx.error(f"a gate map needs two gate axes; found {found}; name them with "
                        "--top-gate NAME --bottom-gate NAME")
    for label, name in (("bottom gate", bottom), ("top gate", top)):
        if name in ctx.reasons:
            ctx.note(f"{label}: {name!r} {ctx.reasons[name]}")
    ctx.used.update((bottom, top))
    return kind, {S.BOTTOM_GATE: bottom, S.TOP_GATE: top}


# --- units and conversion ----------------------------------------------------------

_AXIS_QUANTITY = {S.FIELD: "field", S.GATE: "voltage", S.TOP_GATE: "voltage", S.BOTTOM_GATE: "voltage"}
_AXIS_UNIT_OPTION = {S.FIELD: "field_units", S.GATE: "gate_units", S.TOP_GATE: "gate_units",
                     S.BOTTOM_GATE: "gate_units"}


def _axis_factor(raw, name, axis, ctx):
    opt = _AXIS_UNIT_OPTION[axis]
    unit_text, origin = _units_of(raw, name, ctx, ctx.options[opt])
    quantity = _AXIS_QUANTITY[axis]
    flag = "--" + opt.replace("_", "-")
    if unit_text is None:
        si = "T" if quantity == "field" else "V"
        ctx.note(f"units of {name!r}: none in the file, assumed {si} (set {flag})")
        ctx.units_read[axis] = ("", origin)
        return 1.0, si
    try:
        unit = parse_unit(unit_text, where=f"{name!r}")
    except InputError as exc:
        raise ctx.error(f"{exc}; set {flag} or --units {name}=UNIT") from None
    if unit.quantity != quantity:
        raise ctx.error(f"{name!r} is used as the {axis.replace('_', ' ')} but its units "
                        f"{unit_text!r} measure {QUANTITY_NAMES[unit.quantity]}; set {flag} if the "
                        f"label is wrong, or choose the axis with --{axis.replace('_', '-')} NAME")
    if origin == "option" or unit.factor != 1.0:
        ctx.note(f"units of {name!r}: {unit_text} ({origin}) -> {'T' if quantity == 'field' else 'V'}")
    ctx.units_read[axis] = (unit_text, origin)
    return unit.factor, unit_text


def _check_axis_values(values, axis, name, unit_text, ctx):
    values = np.asarray(values, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise ctx.error(f"axis {name!r} has no finite values")
    limit = MAX_ABS_FIELD if axis == S.FIELD else MAX_ABS_GATE
    biggest = float(np.max(np.abs(finite)))
    if biggest > limit:
        si = "T" if axis == S.FIELD else "V"
        hint = "mT or G" if axis == S.FIELD else "mV"
        opt = "--field-units" if axis == S.FIELD else "--gate-units"
        raise ctx.error(f"axis {name!r} reaches {biggest:.4g} {si} (units {unit_text!r}), beyond the "
                        f"plausible {limit:g} {si}: the units are probably wrong; set {opt} "
                        f"(e.g. {opt} {hint.split()[0]})")


def _excitation_current(raw, signal, ctx):
    opt = ctx.options["excitation_current"]
    if opt is not None:
        value = parse_quantity(opt, "current", where="--excitation-current")
        ctx.note(f"excitation current: {value:.4g} A (option)")
        return value
    for name in raw.variables:
        if raw[name].ndim == 0 and R.name_role(name) == R.CURRENT:
            unit_text, _ = _units_of(raw, name, ctx)
            value = parse_quantity(float(raw[name].values), "current", default_unit=unit_text or "A",
                                   where=f"{name!r}")
            ctx.note(f"excitation current: {value:.4g} A from scalar {name!r}")
            return value
    for attrs, where in ((raw[signal].attrs, f"attribute of {signal!r}"), (raw.attrs, "file attribute")):
        lowered = {str(k).lower(): k for k in attrs}
        for key in _CURRENT_ATTRS:
            if key in lowered:
                real = lowered[key]
                unit_text = attrs.get(f"{real}_units") or attrs.get(f"{real}_unit")
                value = attrs[real]
                if isinstance(value, (list, tuple, np.ndarray)):
                    value = np.asarray(value).ravel()[0]
                try:
                    if isinstance(value, (bytes, str)):
                        value = value.decode() if isinstance(value, bytes) else value
                        si = parse_quantity(value, "current", default_unit=unit_text or "A", where=real)
                    else:
                        si = parse_quantity(float(value), "current", default_unit=unit_text or "A",
                                            where=real)
                except InputError as exc:
                    raise ctx.error(f"{exc}; set --excitation-current") from None
                ctx.note(f"excitation current: {si:.4g} A from {where} {real!r}")
                return si
    return None


def _signal_to_ohm(values, raw, name, role, ctx, current, other=None):
    """Convert one signal to ohm.  ``other`` is the partner conductance for a tensor inversion."""
    opt = "signal_units" if role == S.RXX else "hall_units"
    flag = "--" + opt.replace("_", "-")
    unit_text, origin = _units_of(raw, name, ctx, ctx.options[opt])
    attrs = {}
    ctx.units_read[role] = (unit_text or "", origin)
    if unit_text is None:
        ctx.note(f"units of {name!r}: none in the file, assumed ohm (set {flag})")
        biggest = np.nanmax(np.abs(values)) if np.size(values) else np.nan
        biggest = float(biggest.compute() if hasattr(biggest, "compute") else biggest)
        if biggest < 1e-2:
            ctx.note(f"warning: {name!r} never exceeds {biggest:.3g}, tiny for ohm: if it is a "
                     f"conductance (S, e^2/h) or a lock-in voltage, set {flag}")
        return values, attrs
    try:
        unit = parse_unit(unit_text, where=f"{name!r}")
    except InputError as exc:
        raise ctx.error(f"{exc}; set {flag} or --units {name}=UNIT") from None
    if unit.quantity == "resistance":
        if unit.factor != 1.0 or origin == "option":
            ctx.note(f"units of {name!r}: {unit_text} ({origin}) -> ohm")
        return values * unit.factor, attrs
    if unit.quantity == "sheet_resistance":
        ctx.note(f"{name!r} is a sheet resistivity ({unit_text}); kept as ohm per square")
        attrs["sheet_resistivity"] = 1
        return values * unit.factor, attrs
    if unit.quantity == "voltage":
        if current is None:
            raise ctx.error(f"{name!r} is a voltage ({unit_text}), so an excitation current is needed "
                            "to turn it into a resistance; give it with --excitation-current "
                            "(e.g. --excitation-current '10 nA') or as a file attribute "
                            "'excitation_current'")
        per = f"{current:.4g} A" if np.ndim(current) == 0 else "the measured current"
        ctx.note(f"{name!r}: lock-in voltage ({unit_text}) / {per} -> ohm")
        return values * (unit.factor / current), attrs
    if unit.quantity == "conductance":
        g = values * unit.factor
        if other is not None:
            other_g = other
            denominator = g**2 + other_g**2
            ctx.note(f"{name!r}: conductivity ({unit_text}) inverted as a tensor with the other "
                     "channel: rho = sigma / (sigma_xx^2 + sigma_xy^2)")
            return g / denominator, attrs
        ctx.note(f"{name!r}: conductance ({unit_text}) -> resistance 1/G")
        with np.errstate(divide="ignore"):
            return 1.0 / g, attrs
    raise ctx.error(f"{name!r} has units {unit_text!r} ({QUANTITY_NAMES.get(unit.quantity, unit.quantity)}),"
                    f" not a resistance, conductance or lock-in voltage; set {flag}")


def _conductance_si(raw, name, ctx, role):
    opt = "signal_units" if role == S.RXX else "hall_units"
    unit_text, _ = _units_of(raw, name, ctx, ctx.options[opt])
    if unit_text is None:
        return None
    try:
        unit = parse_unit(unit_text)
    except InputError:
        return None
    return unit.factor if unit.quantity == "conductance" else None


def _convert_signals(arrays, raw, names, ctx):
    """``arrays``: role -> values in file units (numpy or DataArray); returns role -> (values, attrs).

    A measured current carried along as ``_CURRENT`` divides lock-in voltages point by point
    when no single excitation current is given.
    """
    arrays = dict(arrays)
    measured = arrays.pop(_CURRENT, None)
    current = None
    if any(_is_voltage(raw, names[r], ctx, r) for r in arrays):
        current = _excitation_current(raw, names[S.RXX], ctx)
        if current is None and measured is not None:
            name = names[_CURRENT]
            unit_text, _ = _units_of(raw, name, ctx)
            factor = 1.0
            if unit_text is None:
                ctx.note(f"units of {name!r}: none in the file, assumed A (set --units {name}=UNIT)")
            else:
                try:
                    unit = parse_unit(unit_text, where=repr(name))
                except InputError as exc:
                    raise ctx.error(f"{exc}; set --units {name}=UNIT") from None
                if unit.quantity != "current":
                    raise ctx.error(f"{name!r} has units {unit_text!r}, not a current; "
                                    "give --excitation-current")
                factor = unit.factor
            current = measured * factor
            ctx.note(f"excitation current: measured point by point in {name!r}")
    factors = {r: _conductance_si(raw, names[r], ctx, r) for r in arrays}
    tensor = len(arrays) == 2 and all(f is not None for f in factors.values())
    out = {}
    for role, values in arrays.items():
        other = None
        if tensor:
            partner = S.RXY if role == S.RXX else S.RXX
            other = arrays[partner] * factors[partner]
        out[role] = _signal_to_ohm(values, raw, names[role], role, ctx, current, other)
    return out


def _is_voltage(raw, name, ctx, role):
    opt = "signal_units" if role == S.RXX else "hall_units"
    unit_text, _ = _units_of(raw, name, ctx, ctx.options[opt])
    try:
        return unit_text is not None and parse_unit(unit_text).quantity == "voltage"
    except InputError:
        return False


# --- building the map --------------------------------------------------------------

def _interpret(raw, ctx):
    info = _classify_all(raw, ctx)
    signal, hall = _pick_signals(raw, info, ctx)
    sig = raw[signal]
    extra = [d for d in sig.dims if raw.sizes[d] == 1]
    core = [d for d in sig.dims if raw.sizes[d] > 1]
    if len(core) > 2:
        raise ctx.error(f"{signal!r} has {len(core)} dimensions of length > 1 ({', '.join(core)}); "
                        "a map has two (or one, in long format); select a slice before reading")
    if hall is not None and set(raw[hall].dims) != set(sig.dims):
        raise ctx.error(f"{hall!r} has dimensions {raw[hall].dims} but {signal!r} has {sig.dims}")
    names = {S.RXX: signal}
    if hall is not None:
        names[S.RXY] = hall
    if ctx.options["excitation_current"] is None and any(_is_voltage(raw, n, ctx, r) for r, n in names.items()):
        for name in raw.data_vars:
            if info.get(name, (None,))[0] == R.CURRENT and set(raw[name].dims) == set(sig.dims):
                names[_CURRENT] = name
                break
    scalars = {}
    for d in extra:
        for name in raw.variables:
            if raw[name].dims == (d,) and np.issubdtype(raw[name].dtype, np.number):
                scalars[name] = float(raw[name].values[0])
    if len(core) == 2:
        ds = _from_grid(raw, info, core, extra, names, ctx)
    elif len(core) == 1:
        ds = _from_long(raw, info, core[0], names, ctx)
    else:
        raise ctx.error(f"{signal!r} holds a single value; a map needs two axes")
    _finish(ds, raw, info, scalars, names, ctx)
    return ds


def _from_grid(raw, info, dims, extra, names, ctx):
    candidates = _axis_candidates(raw, info, dims, set(names.values()))
    chosen, plain = _assign_axes(raw, info, candidates, ctx)
    kind, axes = _decide_kind(chosen, plain, candidates, raw, info, ctx)
    dim_of = {}
    two_d = {}
    for axis, name in axes.items():
        var = raw[name]
        if var.ndim == 2:
            two_d[axis] = name
        else:
            dim_of[axis] = var.dims[0]
    if len(set(dim_of.values())) != len(dim_of):
        raise ctx.error(f"both axes {', '.join(map(repr, axes.values()))} lie along dimension "
                        f"{next(iter(dim_of.values()))!r}; choose axes along different dimensions")
    order = (S.FIELD, S.GATE) if kind == S.FAN else (S.BOTTOM_GATE, S.TOP_GATE)
    if two_d:
        return _grid_with_2d_axis(raw, axes, dim_of, two_d, kind, order, names, extra, ctx)
    rename = {dim_of[a]: a for a in order}
    values = {}
    for role, name in names.items():
        var = raw[name]
        for d in extra:
            var = var.isel({d: 0})
        var = var.drop_vars(list(var.coords))
        values[role] = var.rename(rename).transpose(*order)
    file_dims = tuple(raw[names[S.RXX]].squeeze(extra).dims)
    if file_dims != tuple(dim_of[a] for a in order):
        ctx.note(f"axes transposed from ({', '.join(file_dims)}) to ({', '.join(order)})")
    coords = {}
    for axis in order:
        name = axes[axis]
        factor, unit_text = _axis_factor(raw, name, axis, ctx)
        vals = np.asarray(raw[name].values, dtype=float) * factor
        _check_axis_values(vals, axis, name, unit_text, ctx)
        coords[axis] = vals
    converted = _convert_signals(values, raw, names, ctx)
    ds = xr.Dataset({role: (order, v.data, a) for role, (v, a) in converted.items()},
                    coords={axis: (axis, coords[axis]) for axis in order})
    ds.attrs[S.MAP_KIND] = kind
    # sweep direction stored along the field dimension
    if kind == S.FAN:
        field_dim = dim_of[S.FIELD]
        for name in raw.variables:
            if info.get(name, (None,))[0] == R.DIRECTION and raw[name].dims == (field_dim,):
                ds = ds.assign_coords({S.SWEEP_DIRECTION: (S.FIELD, np.sign(raw[name].values).astype(int))})
                ctx.note(f"sweep direction: from {name!r}")
    return _tidy_grid(ds, kind, axes, ctx)


def _tidy_grid(ds, kind, axes, ctx):
    """Drop non-finite axis values, sort the gate axes ascending, refuse duplicates."""
    sort_axes = (S.GATE,) if kind == S.FAN else (S.BOTTOM_GATE, S.TOP_GATE)
    for axis in ds[S.RXX].dims:
        values = ds[axis].values
        bad = ~np.isfinite(values)
        if bad.any():
            ds = ds.isel({axis: np.flatnonzero(~bad)})
            ctx.note(f"dropped {int(bad.sum())} {axis.replace('_', ' ')} value(s) that are NaN")
    for axis in sort_axes:
        values = ds[axis].values
        unique, counts = np.unique(values, return_counts=True)
        if unique.size != values.size:
            dup = unique[counts > 1]
            raise ctx.error(f"the {axis.replace('_', ' ')} axis {axes[axis]!r} repeats values "
                            f"({', '.join(f'{v:.6g}' for v in dup[:4])} V): a gridded map needs one "
                            "column per gate value; write repeated sweeps as separate rows or in "
                            "long format")
        if np.all(np.diff(values) < 0):
            ds = ds.isel({axis: slice(None, None, -1)})
            ctx.note(f"{axis.replace('_', ' ')} axis was descending; reversed to ascending")
        elif not np.all(np.diff(values) > 0):
            ds = ds.isel({axis: np.argsort(values, kind="stable")})
            ctx.note(f"{axis.replace('_', ' ')} axis was not monotonic; sorted ascending")
    if kind == S.GATES:
        return ds
    field = ds[S.FIELD].values
    if np.unique(field).size != field.size:
        ctx.note(f"field rows repeat ({field.size - np.unique(field).size} repeated): kept in "
                 "acquisition order (prepare_map averages repeats)")
    return ds


def _grid_with_2d_axis(raw, axes, dim_of, two_d, kind, order, names, extra, ctx):
    """A gridded signal whose fast axis is stored per point (values differ between sweeps)."""
    if len(two_d) == 2:
        raise ctx.error(f"both axes {', '.join(map(repr, two_d.values()))} are 2-D; at least one "
                        "axis must be a 1-D coordinate")
    fast_axis, fast_name = next(iter(two_d.items()))
    slow_axis = next(a for a in order if a != fast_axis)
    slow_name = axes[slow_axis]
    slow_dim = dim_of[slow_axis]
    sig = raw[names[S.RXX]].squeeze(extra)
    fast_dim = next(d for d in sig.dims if d != slow_dim)
    fast = raw[fast_name].transpose(slow_dim, fast_dim).values
    arrays = {r: raw[n].squeeze(extra).transpose(slow_dim, fast_dim).values for r, n in names.items()}
    ctx.note(f"{fast_name!r} differs from sweep to sweep: each sweep regridded onto one common grid")
    sweeps = [{"slow": float(raw[slow_name].values[i]), "slow_spread": 0.0, "fast": fast[i],
               "direction": 1 if np.nansum(np.diff(fast[i])) >= 0 else -1,
               "signals": {r: arrays[r][i] for r in arrays}, "first_index": i}
              for i in range(fast.shape[0])]
    return _assemble(sweeps, raw, axes, kind, slow_axis, fast_axis, names, ctx)


def _from_long(raw, info, dim, names, ctx):
    candidates = _axis_candidates(raw, info, (dim,), set(names.values()))
    chosen, plain = _assign_axes(raw, info, candidates, ctx)
    kind, axes = _decide_kind(chosen, plain, candidates, raw, info, ctx)
    order = (S.FIELD, S.GATE) if kind == S.FAN else (S.BOTTOM_GATE, S.TOP_GATE)
    a0, a1 = (np.asarray(raw[axes[a]].values, dtype=float) for a in order)
    breaks = None
    sweep_vars = [n for n in candidates if info[n][0] == R.SWEEP]
    if sweep_vars:
        breaks = np.asarray(raw[sweep_vars[0]].values)
        ctx.note(f"sweeps: numbered by {sweep_vars[0]!r}")
    elif BLOCK in raw.variables and np.unique(raw[BLOCK].values).size > 1:
        breaks = np.asarray(raw[BLOCK].values)
        ctx.note(f"sweeps: {np.unique(breaks).size} blocks separated by blank lines")
    # the slow axis is the one that changes least often
    c0, c1 = count_changes(a0), count_changes(a1)
    slow_axis, fast_axis = (order[0], order[1]) if c0 <= c1 else (order[1], order[0])
    ctx.note(f"long format: {raw.sizes[dim]} points; {axes[fast_axis]!r} is swept at fixed "
             f"{axes[slow_axis]!r}")
    signals = {r: np.asarray(raw[n].values, dtype=float) for r, n in names.items()}
    sweeps = cut_sweeps(np.asarray(raw[axes[fast_axis]].values, dtype=float),
                        np.asarray(raw[axes[slow_axis]].values, dtype=float), signals, breaks)
    return _assemble(sweeps, raw, axes, kind, slow_axis, fast_axis, names, ctx)


def _assemble(sweeps, raw, axes, kind, slow_axis, fast_axis, names, ctx):
    """Build the map from sweeps (slow value + fast positions + signals) in acquisition order."""
    slow_factor, slow_unit = _axis_factor(raw, axes[slow_axis], slow_axis, ctx)
    fast_factor, fast_unit = _axis_factor(raw, axes[fast_axis], fast_axis, ctx)
    slow = np.array([s["slow"] for s in sweeps]) * slow_factor
    _check_axis_values(slow, slow_axis, axes[slow_axis], slow_unit, ctx)
    all_fast = np.concatenate([s["fast"] for s in sweeps]) * fast_factor
    _check_axis_values(all_fast, fast_axis, axes[fast_axis], fast_unit, ctx)
    spread = max(s["slow_spread"] for s in sweeps) * slow_factor
    roles = list(names)
    grid, rows, report = regrid_sweeps([s["fast"] * fast_factor for s in sweeps],
                                       {r: [s["signals"][r] for s in sweeps] for r in roles})
    ctx.note(f"{len(sweeps)} sweeps of {axes[fast_axis]!r}, common grid of {grid.size} points"
             + (f", interpolated (sweeps offset by up to {report['max_offset_steps']:.2f} steps)"
                if report["interpolated"] else ", no interpolation needed"))
    if report["gap_points"]:
        ctx.note(f"gaps: {report['gap_points']} grid point(s) inside gaps left NaN (not interpolated)")
    if report["duplicates_averaged"]:
        ctx.note(f"{report['duplicates_averaged']} repeated point(s) within a sweep averaged")
    short = report["short_sweeps"]
    for index, covered in short[:5]:
        where = "last " if index == len(sweeps) - 1 else ""
        ctx.note(f"{where}sweep {index} (at {axes[slow_axis]!r} = {sweeps[index]['slow']:.6g}) is ragged: "
                 f"covers {100 * covered:.0f}% of the grid, NaN-padded")
    if len(short) > 5:
        ctx.note(f"... and {len(short) - 5} more ragged sweeps")
    directions = np.array([s["direction"] for s in sweeps])
    order = (S.FIELD, S.GATE) if kind == S.FAN else (S.BOTTOM_GATE, S.TOP_GATE)
    data = {r: rows[r] for r in roles}
    if kind == S.FAN and slow_axis == S.FIELD:
        coords = {S.FIELD: (S.FIELD, slow), S.GATE: (S.GATE, grid)}
        if np.unique(directions).size > 1:
            coords[S.SWEEP_DIRECTION] = (S.FIELD, directions.astype(int))
            ctx.note(f"sweep directions alternate: {int((directions > 0).sum())} up, "
                     f"{int((directions < 0).sum())} down (coordinate 'sweep_direction')")
        if spread > 0:
            ctx.note(f"field drifts by up to {spread:.3g} T within a sweep; each row carries its median")
        data = {r: (order, v) for r, v in data.items()}
    else:
        # slow axis is a gate (field sweeps at fixed gate, or a gate map): one column/row per slow value
        uniq, inverse = _levels(slow)
        if uniq.size != slow.size:
            ctx.note(f"{slow.size - uniq.size} repeated sweep(s) at the same {slow_axis.replace('_', ' ')} "
                     "averaged")
        merged = {}
        for r in roles:
            total = np.zeros((uniq.size, grid.size))
            count = np.zeros((uniq.size, grid.size))
            np.add.at(total, inverse, np.nan_to_num(rows[r]))
            np.add.at(count, inverse, np.isfinite(rows[r]))
            with np.errstate(invalid="ignore", divide="ignore"):
                merged[r] = np.where(count > 0, total / np.maximum(count, 1), np.nan)
        if order[0] == slow_axis:
            coords = {slow_axis: (slow_axis, uniq), fast_axis: (fast_axis, grid)}
            data = {r: (order, merged[r]) for r in roles}
        else:
            coords = {order[0]: (order[0], grid), order[1]: (order[1], uniq)}
            data = {r: (order, merged[r].T) for r in roles}
        if kind == S.FAN:
            ctx.note("the field was the swept axis: rows are in field order, not acquisition order")
    converted = _convert_signals({r: data[r][1] for r in roles}, raw, names, ctx)
    ds = xr.Dataset({r: (order, v, a) for r, (v, a) in converted.items()}, coords=coords)
    ds.attrs[S.MAP_KIND] = kind
    return ds


def _levels(values):
    """Distinct set points of a slow axis read back with jitter: ``(levels, index of each value)``.

    Values closer than a tenth of the typical step between set points are one level (their mean).

    Examples
    --------
    >>> levels, index = _levels(np.array([1.0, 2.0, 1.0001, 3.0, 1.9999]))
    >>> levels.round(4).tolist(), index.tolist()
    ([1.0, 2.0, 3.0], [0, 1, 0, 2, 1])
    """
    order = np.argsort(values, kind="stable")
    ordered = values[order]
    steps = np.diff(ordered)
    big = steps[steps > 1e-3 * float(np.ptp(ordered))]  # read-back jitter is far below this
    tol = 0.1 * float(np.median(big)) if big.size else 0.0
    group = np.concatenate([[0], np.cumsum(steps > tol)])
    levels = np.array([ordered[group == g].mean() for g in range(group[-1] + 1)])
    index = np.empty(values.size, dtype=int)
    index[order] = group
    return levels, index


def _scalar_field(raw, scalars, info, ctx):
    opt = ctx.options["field_value"]
    if opt is not None:
        value = parse_quantity(opt, "field", where="--field-value")
        ctx.note(f"field of the gate map: {value:.6g} T (option)")
        return value
    if ctx.fixed_field is not None:
        name = ctx.fixed_field
        factor, _ = _axis_factor(raw, name, S.FIELD, ctx)
        value = float(np.nanmedian(np.asarray(raw[name].values, dtype=float))) * factor
        ctx.note(f"field of the gate map: {value:.6g} T from the constant column {name!r}")
        return value
    for name, value in list(scalars.items()) + [(n, raw[n].values) for n in raw.variables
                                                  if raw[n].ndim == 0]:
        if info.get(name, (None,))[0] == R.FIELD:
            unit_text, _ = _units_of(raw, name, ctx)
            si = parse_quantity(float(np.asarray(value)), "field", default_unit=unit_text or "T",
                                where=repr(name))
            ctx.note(f"field of the gate map: {si:.6g} T from {name!r}")
            return si
    lowered = {str(k).lower(): k for k in raw.attrs}
    for key in _FIELD_ATTRS:
        if key in lowered:
            real = lowered[key]
            value = raw.attrs[real]
            unit_text = raw.attrs.get(f"{real}_units")
            try:
                if isinstance(value, str):
                    si = parse_quantity(value, "field", default_unit=unit_text or "T", where=real)
                else:
                    si = parse_quantity(float(np.asarray(value).ravel()[0]), "field",
                                        default_unit=unit_text or "T", where=real)
            except (InputError, ValueError, IndexError):
                continue
            ctx.note(f"field of the gate map: {si:.6g} T from file attribute {real!r}")
            return si
    ctx.note("field of the gate map: not in the file (give it with --field-value)")
    return None


def _finish(ds, raw, info, scalars, names, ctx):
    kind = ds.attrs[S.MAP_KIND]
    for name in list(ds.coords) + list(ds.data_vars):
        if name in S.UNITS:
            ds[name].attrs.setdefault("units", S.UNITS[name])
            ds[name].attrs.setdefault("long_name", S.LONG_NAMES[name])
    if S.SWEEP_DIRECTION in ds.coords:
        ds[S.SWEEP_DIRECTION].attrs.update(units="1", long_name="gate sweep direction (+1 up, -1 down)")
    for role, name in names.items():
        if role == _CURRENT:
            continue
        ds[role].attrs["original_name"] = name
        if ds[role].attrs.get("sheet_resistivity"):
            ds[role].attrs["long_name"] = S.LONG_NAMES[role].replace("resistance", "resistivity") \
                + " (per square)"
    ctx.used.update(names.values())
    ctx.used.update(ctx.fixed_gates)
    if ctx.fixed_field:
        ctx.used.add(ctx.fixed_field)
    unused = [n for n in raw.data_vars if n not in ctx.used and n != BLOCK
              and info.get(n, (None,))[0] not in (R.SWEEP, R.DIRECTION)]
    if unused:
        ctx.note(f"not used: {', '.join(map(repr, unused))}")
    for var, (unit_text, origin) in ctx.units_read.items():
        if var in ds.variables:
            ds[var].attrs["original_units"] = unit_text or "(none: SI assumed)"
            ds[var].attrs["units_from"] = origin or "assumed"
    for name in ctx.fixed_gates:
        unit_text, _ = _units_of(raw, name, ctx, ctx.options["gate_units"])
        try:
            factor = parse_unit(unit_text).factor if unit_text else 1.0
        except InputError:
            continue
        value = float(np.nanmedian(np.asarray(raw[name].values, dtype=float))) * factor
        ds.attrs[f"fixed_{name}"] = value
        ctx.note(f"{name!r} held at {value:.6g} V (attribute 'fixed_{name}')")
    if kind == S.GATES:
        value = _scalar_field(raw, scalars, info, ctx)
        if value is not None:
            _check_axis_values([value], S.FIELD, "field", "T", ctx)
            ds.coords[S.FIELD] = ((), value, {"units": "T", "long_name": S.LONG_NAMES[S.FIELD]})
    for key, value in raw.attrs.items():
        if key in ("source", "recognised", S.MAP_KIND):
            continue
        if isinstance(value, (str, int, float, np.integer, np.floating, np.ndarray, list, tuple)):
            ds.attrs[key] = value
    _validate(ds, kind, ctx)


def _validate(ds, kind, ctx):
    rxx = ds[S.RXX]
    finite = np.isfinite(rxx.data)
    n_finite = int(finite.sum().compute()) if hasattr(finite, "compute") else int(finite.sum())
    if n_finite == 0:
        raise ctx.error(f"{rxx.attrs.get('original_name', 'the signal')!r} is NaN everywhere; "
                        "choose another signal with --signal NAME")
    total = int(np.prod(rxx.shape))
    if n_finite < total:
        ctx.note(f"{total - n_finite} of {total} points of R_xx are NaN")
        if kind == S.FAN and ds.sizes[S.FIELD] > 1:
            last = np.asarray(rxx[-1].values, dtype=float)
            nan_last = ~np.isfinite(last)
            direction = int(ds[S.SWEEP_DIRECTION].values[-1]) if S.SWEEP_DIRECTION in ds.coords else 1
            tail = nan_last[::-1] if direction > 0 else nan_last
            run = int(np.argmin(tail)) if not tail.all() else tail.size
            if run >= max(3, 0.1 * last.size):
                ctx.note(f"the last sweep stops early: its final {run} of {last.size} points are NaN "
                         "(an interrupted sweep)")
    if kind == S.FAN:
        if ds.sizes[S.FIELD] < 2:
            raise ctx.error(f"only one field value ({float(ds[S.FIELD][0]):.4g} T): a single sweep is "
                            "not a fan; a fan needs gate sweeps at many fields (if the field was swept "
                            "instead, check --gate and --field)")
        if ds.sizes[S.GATE] < 3:
            raise ctx.error(f"only {ds.sizes[S.GATE]} gate value(s): a fan needs gate sweeps of many "
                            "points; check --gate and --field")
    else:
        for axis in (S.BOTTOM_GATE, S.TOP_GATE):
            if ds.sizes[axis] < 2:
                raise ctx.error(f"only one {axis.replace('_', ' ')} value: a gate map needs two swept "
                                "gates; check --top-gate and --bottom-gate")


# --- several files ---------------------------------------------------------------

def open_maps(paths, **options):
    """Open several map files with the same options and check that their units agree.

    Files whose axes or signals carried no units (SI assumed) cannot be
    mixed with files that gave other units for the same quantity: the
    assumption is then doubtful, and an :class:`InputError` names both files
    and the option that settles it.  Explicit, different units (mV in one
    file, V in another) are fine: each map is converted to SI.

    Returns
    -------
    list of xarray.Dataset
    """
    maps = [open_map(path, **options) for path in paths]
    flags = {S.FIELD: "--field-units", S.GATE: "--gate-units", S.TOP_GATE: "--gate-units",
             S.BOTTOM_GATE: "--gate-units", S.RXX: "--signal-units", S.RXY: "--hall-units"}
    for var, flag in flags.items():
        explicit, assumed = {}, []
        for ds in maps:
            if var not in ds.variables or "units_from" not in ds[var].attrs:
                continue
            if ds[var].attrs["units_from"] == "assumed":
                assumed.append(ds.attrs["source"])
            else:
                explicit.setdefault(ds[var].attrs["original_units"], ds.attrs["source"])
        si = S.UNITS[var]
        others = {u: src for u, src in explicit.items() if _factor_or_none(u) != 1.0}
        if assumed and others:
            unit, source = next(iter(others.items()))
            raise InputError(
                f"mixed units across files: {var.replace('_', ' ')} is in {unit} in {source} but has "
                f"no units in {assumed[0]} (read as {si}); set {flag} for the files without units, "
                "or add the units to their headers")
    return maps


def _factor_or_none(unit_text):
    try:
        return parse_unit(unit_text).factor
    except InputError:
        return None


# --- description ------------------------------------------------------------------

def _axis_line(ds, name):
    values = np.asarray(ds[name].values, dtype=float)
    units = ds[name].attrs.get("units", "")
    if values.ndim == 0:
        return f"  {name}: {float(values):.6g} {units} (scalar)"
    steps = np.diff(values)
    regular = steps.size < 2 or np.allclose(steps, steps[0], rtol=1e-3, atol=0)
    step = f"step {np.median(steps):.4g} {units}" + ("" if regular else " (irregular)") \
        if steps.size else "single value"
    return (f"  {name}: {values.size} values from {values[0]:.6g} to {values[-1]:.6g} {units}, {step}")


def describe_map(ds):
    """Text summary of a labelled map: kind, axes, signals and every guess made when reading.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> ds = xr.Dataset({"rxx": (("field", "gate"), np.ones((2, 3)), {"units": "ohm"})},
    ...                 coords={"field": [1.0, 2.0], "gate": [-1.0, 0.0, 1.0]},
    ...                 attrs={"map_kind": "fan", "source": "demo.nc", "recognised": "signal: 'rxx'"})
    >>> print(describe_map(ds).splitlines()[0])
    fan map from demo.nc
    """
    kind = ds.attrs.get(S.MAP_KIND, "unknown")
    lines = [f"{kind} map from {ds.attrs.get('source', '(memory)')}"]
    lines.append("axes:")
    dims = list(ds[S.RXX].dims) if S.RXX in ds else list(ds.dims)
    for name in dims:
        lines.append(_axis_line(ds, name))
    if kind == S.GATES and S.FIELD in ds.coords:
        lines.append(_axis_line(ds, S.FIELD))
    if S.SWEEP_DIRECTION in ds.coords:
        d = np.asarray(ds[S.SWEEP_DIRECTION].values)
        lines.append(f"  sweep_direction: {int((d > 0).sum())} rows up, {int((d < 0).sum())} rows down")
    lines.append("signals:")
    for name, var in ds.data_vars.items():
        # reductions stream through a lazily opened map instead of loading it
        low, high = float(var.min(skipna=True)), float(var.max(skipna=True))
        nan = int(var.isnull().sum())
        span = f"{low:.4g} to {high:.4g}" if np.isfinite(low) else "all NaN"
        lines.append(f"  {name}: {var.attrs.get('long_name', '')} [{var.attrs.get('units', '?')}], "
                     f"{span}" + (f", {nan} NaN" if nan else "")
                     + (f" (from {var.attrs['original_name']!r})" if "original_name" in var.attrs else ""))
    recognised = ds.attrs.get("recognised", "")
    if recognised:
        lines.append("recognised:")
        lines.extend(f"  {line}" for line in str(recognised).splitlines())
    truth = [k for k in ds.attrs if str(k).startswith(S.TRUTH_PREFIX)]
    if truth:
        lines.append(f"simulated map: {len(truth)} truth_* attributes")
    return "\n".join(lines)
