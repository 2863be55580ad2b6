"""``fanmap gates MAP [MAP ...]``: both gate capacitances, the offsets and the (n, D) map."""

from pathlib import Path

import numpy as np

from .._atomic import atomic_path, write_text_atomic
from .._cautions import CAUTIONS
from ..errors import InputError
from ..gatemap import HBN_PERMITTIVITY, fit_gates, to_density_displacement
from ..materials import MATERIAL_NAMES
from ..results import dumps
from ._options import add_reading_options, open_from_args
from ._format import value_with_error

_CM2 = 1e-4  # m^2 per cm^2


def _thickness(text):
    if text.strip().lower() in ("none", "-", "?"):
        return None
    value = float(text)
    if not value > 0:
        raise InputError(f"--dielectric-thickness: {text!r} is not a positive thickness in nm")
    return value * 1e-9


def register(subparsers):
    parser = subparsers.add_parser(
        "gates", help="fit dual-gate maps: both capacitances, offsets, (n, D) map",
        description="Find the charge-neutrality ridge (zero field) and the quantum Hall minima "
                    "(fixed field) of one or more dual-gate maps, fit them jointly and report "
                    "the top and bottom gate capacitances, their ratio and the offsets with "
                    "uncertainties; redraw the map in density and displacement field. "
                    "The field of a map comes from the file or from --field-value.")
    parser.add_argument("maps", metavar="MAP", nargs="+", help="gate map files (netCDF, text or npz)")
    parser.add_argument("--material", choices=MATERIAL_NAMES, default="auto",
                        help="material preset (names the degeneracy when R_xy cannot)")
    parser.add_argument("--json", metavar="FILE", help="write the result as JSON")
    parser.add_argument("--out", metavar="DIR",
                        help="write figures, result.json, report.html and the (n, D) map as netCDF")
    parser.add_argument("--dielectric-thickness", metavar=("TOP_NM", "BOTTOM_NM"), nargs=2,
                        type=str, help="top and bottom dielectric thickness in nm ('none' if "
                                       "unknown): a prior that names the degeneracy")
    parser.add_argument("--permittivity", metavar="EPS", nargs="+", type=float,
                        default=[HBN_PERMITTIVITY],
                        help="relative permittivity of the top [and bottom] dielectric "
                             f"(default {HBN_PERMITTIVITY}, hBN; SiO2 is 3.9)")
    parser.add_argument("--fields", metavar="T", nargs="+", type=float,
                        help="field of each map in T, in the order of the maps (overrides the "
                             "files; --field-value gives one field for every map)")
    parser.add_argument("--gate-limits", metavar=("VT_MIN", "VT_MAX", "VB_MIN", "VB_MAX"),
                        nargs=4, type=float,
                        help="planned sweep limits (V): report the fields they put across each "
                             "dielectric and warn near 1 V/nm")
    add_reading_options(parser)
    parser.set_defaults(run=run)
    return parser


def _options(args):
    eps = list(args.permittivity)
    if len(eps) == 1:
        eps = eps * 2
    if len(eps) != 2 or not all(e > 0 for e in eps):
        raise InputError("--permittivity takes one or two positive numbers (top [bottom])")
    thickness = (None, None)
    if args.dielectric_thickness:
        thickness = tuple(_thickness(t) for t in args.dielectric_thickness)
    limits = None
    if args.gate_limits:
        vt_lo, vt_hi, vb_lo, vb_hi = args.gate_limits
        if not (vt_lo < vt_hi and vb_lo < vb_hi):
            raise InputError("--gate-limits: give VT_MIN VT_MAX VB_MIN VB_MAX with MIN < MAX")
        limits = ((vt_lo, vt_hi), (vb_lo, vb_hi))
    return {"thickness": thickness, "permittivity": tuple(eps), "gate_limits": limits}


def _shown(value, err, unit, scale=1.0):
    return value_with_error(value, err, unit, scale, digits=5)


def summary(result):
    """Short human-readable summary of a :class:`~fanmap.results.GateResult`."""
    from ..physics import lever_arm_from_capacitance as lever

    r = result
    lines = [
        f"top capacitance      {_shown(r.top_capacitance, r.top_capacitance_stderr, 'F m^-2')}"
        f"   (lever arm {_shown(lever(r.top_capacitance), lever(r.top_capacitance_stderr), 'cm^-2 V^-1', _CM2)})",
        f"bottom capacitance   {_shown(r.bottom_capacitance, r.bottom_capacitance_stderr, 'F m^-2')}"
        f"   (lever arm {_shown(lever(r.bottom_capacitance), lever(r.bottom_capacitance_stderr), 'cm^-2 V^-1', _CM2)})",
        f"ratio C_t/C_b        {_shown(r.capacitance_ratio, r.capacitance_ratio_stderr, '')}",
        f"top offset V_t0      {_shown(r.top_offset, r.top_offset_stderr, 'V')}",
        f"bottom offset V_b0   {_shown(r.bottom_offset, r.bottom_offset_stderr, 'V')}",
        f"degeneracy           {r.degeneracy if r.degeneracy is not None else 'undetermined'}"
        f"   (scale from {r.scale_from})",
        f"convention           {r.displacement_convention}",
    ]
    for cand in r.extras.get("scale_candidates", []):
        lines.append(f"  candidate g = {cand['degeneracy']}: C_t = {cand['top_capacitance']:.4g}, "
                     f"C_b = {cand['bottom_capacitance']:.4g} F m^-2")
    reached = r.extras.get("max_dielectric_field")
    if reached:
        lines.append(f"largest field in map top {reached['top_V_per_nm']:.3g} V/nm, bottom "
                     f"{reached['bottom_V_per_nm']:.3g} V/nm (implied thickness "
                     f"{reached['top_thickness_nm']:.3g} / {reached['bottom_thickness_nm']:.3g} nm)")
    planned = r.extras.get("planned_dielectric_field")
    if planned:
        lines.append(f"planned sweep        top {planned['top_V_per_nm']:.3g} V/nm, bottom "
                     f"{planned['bottom_V_per_nm']:.3g} V/nm")
    for details in r.extras.get("maps", []):
        if details.get("lines"):
            names = ", ".join(str(line["filling"]) for line in details["lines"])
            lines.append(f"B = {details['field']:g} T: lines at nu = {names}")
    for text in r.warnings:
        lines.append(f"warning: {text}")
    return "\n".join(lines)


def _nd_maps(maps, result):
    """(n, D) map of every input map, or None when the calibration is incomplete."""
    needed = (result.top_capacitance, result.bottom_capacitance, result.top_offset,
              result.bottom_offset)
    if not np.all(np.isfinite(needed)):
        return None
    return [to_density_displacement(m, result) for m in maps]


def _write_netcdf(path, dataset):
    with atomic_path(path) as tmp:
        dataset.to_netcdf(tmp)


def run(args):
    options = _options(args)
    if args.fields is not None and len(args.fields) != len(args.maps):
        raise InputError(f"--fields gives {len(args.fields)} fields for {len(args.maps)} maps; "
                         "give one per map")
    maps = [open_from_args(args, path) for path in args.maps]
    result = fit_gates(maps, material=args.material, field=args.fields, **options)
    result.extras["settings"] = {"material": args.material, "maps": list(args.maps),
                                 "permittivity": list(options["permittivity"]),
                                 "dielectric_thickness_m": list(options["thickness"]),
                                 "gate_limits_V": args.gate_limits, "fields_T": args.fields}
    nd_maps = _nd_maps(maps, result)
    print(summary(result))
    if nd_maps is None and args.out:
        print("note: no (n, D) map: the calibration lacks an absolute capacitance or an offset")
    # Everything is computed; only now write.
    if args.json:
        write_text_atomic(args.json, dumps(result))
        print(f"wrote {args.json}")
    if args.out:
        out = Path(args.out)
        written = {}
        if nd_maps is not None:
            names = ["nd_map.nc"] if len(nd_maps) == 1 else [f"nd_map_{k + 1}.nc" for k in range(len(nd_maps))]
            for name, nd in zip(names, nd_maps):
                _write_netcdf(out / name, nd)
                written[name] = out / name
        from ..report import write_gate_outputs

        principal = None
        if nd_maps is not None:
            principal = nd_maps[result.extras.get("neutrality_curve", {}).get("map", 0)]
        written.update(write_gate_outputs(out, maps, result, principal))
    print("")
    print("\n".join(f"caution: {c}" for c in CAUTIONS))
    if args.out:
        # last, so that the paths are what the user sees when the command ends
        print(f"wrote {len(written)} files to {out}")
        if "report.html" in written:
            print(f"report: {written['report.html']}")
        for name in sorted(n for n in written if n.endswith(".nc")):
            print(f"(n, D) map (netCDF): {written[name]}")
    return 0
