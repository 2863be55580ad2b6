"""Reading options shared by every command that opens a map.

Every command adds them with :func:`add_reading_options` and opens its map
with :func:`open_from_args`, so the options are spelled the same everywhere::

    --signal NAME --hall NAME|none --gate NAME --field NAME --top-gate NAME
    --bottom-gate NAME --gate-units U --field-units U --signal-units U
    --hall-units U --units NAME=UNIT (repeatable) --excitation-current '10 nA'
    --field-value '9 T' --kind fan|gates --format netcdf|text|npz --lazy/--no-lazy
"""

import argparse

from ..errors import InputError
from ..reading import open_map

__all__ = ["add_reading_options", "reading_kwargs", "open_from_args"]


def _unit_pair(text):
    name, sep, unit = text.partition("=")
    if not sep or not name.strip() or not unit.strip():
        raise argparse.ArgumentTypeError(f"expected NAME=UNIT, got {text!r}")
    return name.strip(), unit.strip()


def add_reading_options(parser):
    """Add the reading options to an :mod:`argparse` parser (as an argument group)."""
    group = parser.add_argument_group(
        "reading options", "override what fanmap recognises in the file (see `fanmap show`)")
    group.add_argument("--signal", metavar="NAME", help="variable or column holding R_xx")
    group.add_argument("--hall", metavar="NAME", help="variable or column holding R_xy ('none' to ignore)")
    group.add_argument("--gate", metavar="NAME", help="gate axis of a fan map")
    group.add_argument("--field", metavar="NAME", help="field axis of a fan map")
    group.add_argument("--top-gate", metavar="NAME", help="top gate axis of a gate map")
    group.add_argument("--bottom-gate", metavar="NAME", help="bottom (back) gate axis of a gate map")
    group.add_argument("--gate-units", metavar="UNIT", help="units of the gate axes (V, mV, ...)")
    group.add_argument("--field-units", metavar="UNIT", help="units of the field axis (T, mT, G, kG)")
    group.add_argument("--signal-units", metavar="UNIT",
                       help="units of R_xx (ohm, kohm, ohm/sq, S, e^2/h, V, uV, nV, ...)")
    group.add_argument("--hall-units", metavar="UNIT", help="units of R_xy")
    group.add_argument("--units", metavar="NAME=UNIT", action="append", type=_unit_pair, default=[],
                       help="units of any variable (repeatable)")
    group.add_argument("--excitation-current", metavar="CURRENT",
                       help="excitation current for lock-in voltages, e.g. '10 nA' (bare number: A)")
    group.add_argument("--field-value", metavar="FIELD",
                       help="field of a gate map, e.g. '9 T' (bare number: T)")
    group.add_argument("--kind", choices=("fan", "gates"), help="force the map kind")
    group.add_argument("--format", choices=("netcdf", "text", "npz"), dest="file_format",
                       help="force the file reader (default: from the suffix)")
    lazy = group.add_mutually_exclusive_group()
    lazy.add_argument("--lazy", dest="lazy", action="store_true", default=None,
                      help="open netCDF files lazily with dask (default above 256 MiB)")
    lazy.add_argument("--no-lazy", dest="lazy", action="store_false", help="load the map into memory")
    return group


def reading_kwargs(args):
    """Keyword arguments of :func:`fanmap.reading.open_map` from parsed options."""
    units = dict(getattr(args, "units", None) or [])
    return dict(
        signal=args.signal, hall=args.hall, gate=args.gate, field=args.field,
        top_gate=args.top_gate, bottom_gate=args.bottom_gate, gate_units=args.gate_units,
        field_units=args.field_units, signal_units=args.signal_units, hall_units=args.hall_units,
        units=units, excitation_current=args.excitation_current, field_value=args.field_value,
        kind=args.kind, lazy=args.lazy, format=args.file_format,
    )


def open_from_args(args, path=None):
    """Open ``path`` (default ``args.map``) with the reading options in ``args``."""
    path = path if path is not None else getattr(args, "map", None)
    if path is None:
        raise InputError("no map file given")
    return open_map(path, **reading_kwargs(args))


def dielectric_prior(args):
    """``(thickness in m, relative permittivity)`` from --dielectric-thickness/--permittivity, or None."""
    if (args.dielectric_thickness is None) != (args.permittivity is None):
        raise InputError("give both --dielectric-thickness and --permittivity, or neither")
    if args.dielectric_thickness is None:
        return None
    if not (args.dielectric_thickness > 0 and args.permittivity > 0):
        raise InputError("--dielectric-thickness (nm) and --permittivity must be positive")
    return args.dielectric_thickness * 1e-9, args.permittivity
