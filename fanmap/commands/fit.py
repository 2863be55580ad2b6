"""``fanmap fit MAP``: calibrate the gate from a Landau fan and name its states."""

from pathlib import Path

from .._atomic import write_text_atomic
from .._cautions import CAUTIONS
from ..fanfit import fit_fan
from ..materials import MATERIAL_NAMES
from ..results import dumps
from ._options import add_reading_options, dielectric_prior, open_from_args
from ._format import value_with_error

_CM2 = 1e-4  # m^2 per cm^2


def register(subparsers):
    parser = subparsers.add_parser(
        "fit", help="fit a Landau fan: lever arm, zero-density voltage, states",
        description="Find the R_xx minima of a fan map, fit every line through the common "
                    "origin and report the lever arm, the zero-density voltage, the degeneracy, "
                    "the Berry phase and the name of every state, with uncertainties.")
    parser.add_argument("map", metavar="MAP", help="fan map file (netCDF, text or npz)")
    parser.add_argument("--material", choices=MATERIAL_NAMES, default="auto",
                        help="material preset (fixes the degeneracy when the map cannot)")
    parser.add_argument("--json", metavar="FILE", help="write the result as JSON")
    parser.add_argument("--out", metavar="DIR", help="write figures, result.json and report.html")
    parser.add_argument("--dielectric-thickness", metavar="NM", type=float,
                        help="gate dielectric thickness in nm (prior on the lever arm)")
    parser.add_argument("--permittivity", metavar="EPS", type=float,
                        help="relative permittivity of the gate dielectric")
    parser.add_argument("--bootstrap", metavar="N", type=int, default=200,
                        help="bootstrap resamples over ridge traces (default 200, 0: none)")
    parser.add_argument("--check", action="store_true",
                        help="also run the Hall, oscillation and index-plot cross-checks "
                             "(as `fanmap check`) and store them in the result")
    add_reading_options(parser)
    parser.set_defaults(run=run)
    return parser


def _superlattice_lines(result):
    """Summary lines of the superlattice: twist angle, n_s, wavelength (or what was seen)."""
    sl = result.superlattice
    if sl is None:
        if result.material in ("auto", "moire-graphene") and \
                result.extras.get("settings", {}).get("superlattice_search", True):
            return ["superlattice         none seen (no satellite fans off the main origin)"]
        return []
    lines = []
    if result.material == "auto":
        lines.append(f"superlattice         seen: {sl.get('satellite_count', 0)} satellite line(s) "
                     f"at band fillings s = {', '.join(str(s) for s in sl.get('band_fillings', []))}")
    if sl.get("twist_angle_deg") is not None:
        lines.append(f"twist angle          {value_with_error(sl['twist_angle_deg'], sl['twist_angle_deg_stderr'], 'deg')}")
    lines.append(f"full filling n_s     {value_with_error(sl['density'], sl['density_stderr'], 'cm^-2', _CM2)}"
                 f"   ({sl.get('flavours', 4)} per moire cell)")
    lines.append(f"moire wavelength     {value_with_error(sl['wavelength'], sl['wavelength_stderr'], 'nm', 1e9)}")
    return lines


def summary(result):
    """Short human-readable summary of a :class:`~fanmap.results.FanResult`."""
    lines = []
    a, ae, ab = (result.density_per_volt, result.density_per_volt_stderr,
                 result.density_per_volt_bootstrap_stderr)
    lines.append(f"lever arm alpha      {value_with_error(a, ae, 'cm^-2 V^-1', _CM2)}"
                 f"   ({value_with_error(a, ae, 'm^-2 V^-1')}; fit ± {result.density_per_volt_covariance_stderr:.2g}, "
                 f"bootstrap ± {ab:.2g}, systematic ± {result.density_per_volt_systematic:.2g})")
    lines.append(f"capacitance C/A      {value_with_error(result.capacitance_per_area, result.capacitance_per_area_stderr, 'F m^-2')}")
    lines.append(f"zero-density V0      {value_with_error(result.zero_density_voltage, result.zero_density_voltage_stderr, 'V')}"
                 f"   (fit ± {result.zero_density_voltage_covariance_stderr:.2g}, "
                 f"bootstrap ± {result.zero_density_voltage_bootstrap_stderr:.2g}, "
                 f"systematic ± {result.zero_density_voltage_systematic:.2g})")
    lines.append(f"degeneracy           {result.degeneracy if result.degeneracy is not None else 'undetermined'}")
    berry = {0: "0", 1: "pi", 2: "2 pi"}.get(result.berry_phase, "undetermined")
    lines.append(f"Berry phase          {berry}")
    lines.append(f"scale from           {result.scale_from}")
    for cand in result.scale_candidates:
        lines.append(f"  candidate g = {cand['degeneracy']}: alpha = "
                     f"{cand['density_per_volt'] * _CM2:.4g} cm^-2 V^-1")
    for key in ("zero_density_voltage_drift", "hysteresis_shift"):
        if key in result.extras:
            lines.append(f"{key.replace('_', ' '):20s} {value_with_error(result.extras[key], result.extras[key + '_stderr'], 'V')}")
    lines.extend(_superlattice_lines(result))
    lines.append("")
    lines.append(f"{'filling':>8} {'s':>4} {'kind':16} {'slope V/T':>11} {'points':>6} "
                 f"{'onset T':>8} {'B range T':>13}")
    for st in result.states:
        s = "" if st.band_filling is None else f"{st.band_filling:+g}"
        lines.append(f"{st.filling:>8} {s:>4} {st.kind:16} {st.slope:11.5g} {st.points:6d} "
                     f"{st.onset_field:8.3g} {st.field_min:6.3g}-{st.field_max:<6.3g}")
    if result.warnings:
        lines.append("")
        lines.extend(f"warning: {w}" for w in result.warnings)
    return "\n".join(lines)


def run(args):
    dielectric = dielectric_prior(args)
    fan_map = open_from_args(args)
    result = fit_fan(fan_map, material=args.material, dielectric=dielectric,
                     bootstrap=args.bootstrap)
    result.extras["settings"]["reading_options"] = {
        key: value for key, value in vars(args).items()
        if key not in ("map", "json", "out", "run", "command", "material", "bootstrap",
                       "dielectric_thickness", "permittivity", "check")
        and value not in (None, [], False) and not callable(value)}
    if args.check:
        from ..crosscheck import run_crosschecks

        result.crosschecks = run_crosschecks(fan_map, result, material=args.material)
    if args.out:
        from ..report import write_fan_outputs

        write_fan_outputs(Path(args.out), fan_map, result)
    if args.json:
        write_text_atomic(args.json, dumps(result))
    print(summary(result))
    if result.crosschecks is not None:
        from .check import summary as check_summary

        print("")
        print(check_summary(result.crosschecks))
    print("")
    print(CAUTIONS[0])
    if args.out:
        print(f"report: {Path(args.out) / 'report.html'} (open it in a browser)")
    return 0
