"""``fanmap check MAP``: independent cross-checks of the fan calibration."""

import argparse
import json

from .._atomic import write_text_atomic
from .._cautions import CAUTIONS
from ..crosscheck import run_crosschecks
from ..errors import FanmapError, InputError
from ..materials import MATERIAL_NAMES
from ..results import to_jsonable
from ._options import add_reading_options, open_from_args
from ._format import value_with_error

_CM2 = 1e-4  # m^2 per cm^2


def _pair(text):
    try:
        lo, hi = (float(v) for v in text.split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected LOW:HIGH in tesla, got {text!r}") from None
    if not (0 <= lo < hi):
        raise argparse.ArgumentTypeError(f"expected 0 <= LOW < HIGH in tesla, got {text!r}")
    return lo, hi


def register(subparsers):
    parser = subparsers.add_parser(
        "check", help="cross-check the lever arm: Hall density, oscillation frequency, index plot",
        description="Measure the lever arm and zero-density voltage independently from the "
                    "low-field Hall slope and from the Shubnikov-de Haas frequency, draw Landau "
                    "index plots, and compare them with the fan fit (flagging differences above "
                    "three standard errors). Further maps at other temperatures give the "
                    "effective mass and the Dingle temperature.")
    parser.add_argument("map", metavar="MAP", help="fan map file (netCDF, text or npz)")
    parser.add_argument("series", metavar="MAP_AT_OTHER_T", nargs="*",
                        help="maps of the same device at other temperatures (effective mass)")
    parser.add_argument("--material", choices=MATERIAL_NAMES, default="auto",
                        help="material preset (degeneracy and expected index-plot intercept)")
    parser.add_argument("--degeneracy", type=int, help="level degeneracy g for n = g e B_F / h")
    parser.add_argument("--json", metavar="FILE", help="write the cross-checks as JSON")
    parser.add_argument("--no-fit", action="store_true", help="skip the fan fit")
    parser.add_argument("--hall-window", metavar="LOW:HIGH", type=_pair,
                        help="field window of the Hall slope in T (default: automatic)")
    parser.add_argument("--oscillation-range", metavar="LOW:HIGH", type=_pair,
                        help="field range of the oscillation analysis in T")
    parser.add_argument("--geometry-factor", metavar="W/L", type=float,
                        help="Hall bar width / probe distance, rho_xx = R_xx W/L (mobility)")
    parser.add_argument("--index-gate", metavar="V", type=float, action="append",
                        help="gate voltage of an index plot (repeatable; default: automatic)")
    parser.add_argument("--temperatures", metavar="K,K,...",
                        help="temperatures of MAP and MAP_AT_OTHER_T in K "
                             "(default: their 'temperature' attributes)")
    add_reading_options(parser)
    parser.set_defaults(run=run)
    return parser


def _shown(value, err, unit, scale=1.0):
    return value_with_error(value, err, unit, scale, digits=5, missing="not measured")


def summary(checks):
    """Human-readable comparison table of a :func:`run_crosschecks` result."""
    lines = [f"{'method':12} {'lever arm alpha (cm^-2 V^-1)':>32} {'zero-density V0 (V)':>24}"]
    for row in checks["comparison"]:
        lines.append(f"{row['method']:12} "
                     f"{_shown(row['density_per_volt'], row['density_per_volt_stderr'], '', _CM2):>32} "
                     f"{_shown(row['zero_density_voltage'], row['zero_density_voltage_stderr'], ''):>24}")
    lines.append("")
    if checks["comparison_pairs"]:
        verdict = "agree" if checks["agree"] else "DISAGREE"
        lines.append(f"methods {verdict} within {checks['threshold_sigma']:g} standard errors")
        lines.extend(f"  {d}" for d in checks["disagreements"])
    g = checks.get("oscillation_degeneracy")
    if g:
        lines.append(f"oscillation density with g = {g} (from {checks['oscillation_degeneracy_from']})")
    lines.append(f"index-plot intercept gamma  "
                 f"{_shown(checks['index_plot_intercept'], checks['index_plot_intercept_stderr'], '')}"
                 f"  (1/2: Berry phase pi; 0: 0 or 2 pi)")
    lines.append(f"mobility (median)           {_shown(checks['mobility'], None, 'cm^2 V^-1 s^-1', 1e4)}")
    mass = checks.get("effective_mass")
    if mass:
        lines.append(f"effective mass              "
                     f"{_shown(mass['effective_mass'], mass['effective_mass_stderr'], 'm_e')}")
        lines.append(f"Dingle temperature          "
                     f"{_shown(mass['dingle_temperature'], mass['dingle_temperature_stderr'], 'K')}")
        lines.append(f"quantum lifetime            "
                     f"{_shown(mass['quantum_lifetime'], mass['quantum_lifetime_stderr'], 'ps', 1e12)}")
    if checks["warnings"]:
        lines.append("")
        lines.extend(f"warning: {w}" for w in checks["warnings"])
    return "\n".join(lines)


def run(args):
    fan_map = open_from_args(args)
    series = [open_from_args(args, path) for path in args.series]
    temperatures = None
    if args.temperatures:
        try:
            temperatures = [float(t) for t in args.temperatures.split(",")]
        except ValueError:
            raise InputError(f"--temperatures: expected comma-separated kelvins, "
                             f"got {args.temperatures!r}") from None
    result, notes = None, []
    if not args.no_fit:
        from ..fanfit import fit_fan

        try:
            result = fit_fan(fan_map, material=args.material)
        except FanmapError as exc:
            notes.append(f"fan fit not available for the comparison: {exc}")
    checks = run_crosschecks(
        fan_map, result, degeneracy=args.degeneracy, material=args.material,
        hall_field_window=args.hall_window, geometry_factor=args.geometry_factor,
        oscillation_field_range=args.oscillation_range, index_gates=args.index_gate,
        temperature_series=series or None, temperatures=temperatures)
    checks["warnings"] = notes + checks["warnings"]
    if args.json:
        write_text_atomic(args.json, json.dumps(to_jsonable(checks), indent=2, allow_nan=False) + "\n")
    print(summary(checks))
    print("")
    print(CAUTIONS[0])
    return 0
