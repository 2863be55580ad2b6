"""``fanmap simulate``: write a simulated fan or dual-gate map (with its ground truth) to netCDF."""

from pathlib import Path

import numpy as np

from .. import _schema as S
from .._atomic import atomic_path
from ..errors import InputError
from ..simulate import MEV, PRESETS, simulate_fan, simulate_gate_map, write_map

HELP = "write a simulated Landau fan or dual-gate map with known answers (synthetic data)"


def register(subparsers):
    parser = subparsers.add_parser(
        "simulate", help=HELP,
        description=HELP + ". Units on the command line: V, T, K, meV, m^2/Vs; the file is SI.",
        epilog="Example: fanmap simulate --material graphene-monolayer --out fan.nc "
               "--png fan.png. Regenerate the shipped samples: fanmap simulate --samples sample_maps")
    parser.add_argument("--material", choices=tuple(PRESETS), help="material preset")
    parser.add_argument("--out", type=Path, metavar="FILE.nc", help="netCDF file to write")
    parser.add_argument("--samples", type=Path, metavar="DIR",
                        help="write the shipped sample maps and their README into DIR")
    parser.add_argument("--png", type=Path, metavar="FILE.png",
                        help="also save a picture of R_xx (log colour scale)")
    parser.add_argument("--gate-map", action="store_true",
                        help="simulate a dual-gate map at fixed --field instead of a fan")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    grid = parser.add_argument_group("axes")
    grid.add_argument("--gate", type=float, nargs=3, metavar=("FIRST", "LAST", "POINTS"),
                      help="fan: gate sweep in V (default: the preset's)")
    grid.add_argument("--fields", type=float, nargs=3, metavar=("FIRST", "LAST", "ROWS"),
                      help="fan: field rows in T (default: the preset's)")
    grid.add_argument("--top-gate", type=float, nargs=3, metavar=("FIRST", "LAST", "POINTS"))
    grid.add_argument("--bottom-gate", type=float, nargs=3, metavar=("FIRST", "LAST", "POINTS"))
    grid.add_argument("--field", type=float, default=0.0, help="gate map: field in T (default 0)")
    dev = parser.add_argument_group("device")
    dev.add_argument("--lever-arm", type=float, metavar="M-2/V",
                     help="density per volt alpha in m^-2 V^-1")
    dev.add_argument("--zero-density-voltage", type=float, metavar="V", help="V0 in V")
    dev.add_argument("--temperature", type=float, metavar="K")
    dev.add_argument("--broadening", type=float, metavar="MEV", help="level width at 1 T, meV")
    dev.add_argument("--mobility", type=float, metavar="M2/VS")
    dev.add_argument("--twist-angle", type=float, metavar="DEG", help="moire twist angle")
    dev.add_argument("--no-hall", action="store_true", help="R_xx only")
    dev.add_argument("--no-broken-symmetry", action="store_true",
                     help="no broken-symmetry integer states")
    dev.add_argument("--no-fractional", action="store_true", help="2deg: no fractional states")
    dev.add_argument("--no-correlated-states", action="store_true",
                     help="moire: no gaps or satellite fans at s = +-2")
    dev.add_argument("--quantum-capacitance", action="store_true",
                     help="monolayer: include the Dirac quantum-capacitance term")
    dev.add_argument("--contact-resistance", type=float, default=0.0, metavar="OHM",
                     help="gate map: gate-dependent contact resistance at |n| = 1e12 cm^-2")
    art = parser.add_argument_group("measurement artefacts")
    art.add_argument("--noise", type=float, default=0.002, help="relative white noise")
    art.add_argument("--noise-floor", type=float, default=0.5, metavar="OHM")
    art.add_argument("--correlated-noise", type=float, default=0.0,
                     help="relative noise correlated along a sweep")
    art.add_argument("--drift", type=float, default=0.0, metavar="V",
                     help="V0 change from first to last row")
    art.add_argument("--hysteresis", type=float, default=0.0, metavar="V",
                     help="V0 shift of down sweeps (rows alternate up/down)")
    art.add_argument("--contact-mixing", type=float, default=0.0,
                     help="fraction of R_xy added to R_xx")
    art.add_argument("--spikes", type=int, default=0, help="number of spike pixels")
    art.add_argument("--nan-gaps", type=int, default=0, help="number of short NaN runs")
    art.add_argument("--interrupted", type=float, metavar="FRACTION",
                     help="completed fraction of the last sweep (rest NaN)")
    art.add_argument("--irregular-field", type=float, default=0.0, metavar="JITTER",
                     help="relative jitter of the field steps")
    art.add_argument("--zero-field-row", action="store_true", help="prepend a B = 0 row")
    art.add_argument("--field-sign", choices=("+", "-", "both"), default="+")
    parser.set_defaults(run=run)


def _axis(spec):
    if spec is None:
        return None
    first, last, points = spec
    if points < 2 or points != int(points):
        raise InputError("the third number of an axis option is a point count (integer >= 2)")
    return np.linspace(first, last, int(points))


def run(args):
    if args.samples is not None:
        from .._samples import write_samples
        for path in write_samples(args.samples):
            print(f"wrote {path} ({path.stat().st_size / 1e6:.2f} MB)")
        return 0
    if args.material is None or (args.out is None and args.png is None):
        raise InputError("give --material and --out FILE.nc and/or --png FILE.png "
                         "(or --samples DIR); see fanmap simulate -h")
    common = dict(seed=args.seed, temperature=args.temperature, mobility=args.mobility,
                  broadening=None if args.broadening is None else args.broadening * MEV,
                  noise=args.noise, noise_floor=args.noise_floor,
                  correlated_noise=args.correlated_noise, spikes=args.spikes,
                  nan_gaps=args.nan_gaps, interrupted=args.interrupted,
                  broken_symmetry={} if args.no_broken_symmetry else None)
    if args.gate_map:
        ds = simulate_gate_map(args.material, top_gate=_axis(args.top_gate),
                               bottom_gate=_axis(args.bottom_gate), field=args.field,
                               hall=not args.no_hall,
                               contact_resistance=args.contact_resistance, **common)
    else:
        ds = simulate_fan(args.material, gate=_axis(args.gate), field=_axis(args.fields),
                          density_per_volt=args.lever_arm,
                          zero_density_voltage=args.zero_density_voltage,
                          hall=not args.no_hall, twist_angle_deg=args.twist_angle,
                          fractional=False if args.no_fractional else None,
                          correlated_states=not args.no_correlated_states,
                          quantum_capacitance=args.quantum_capacitance, drift=args.drift,
                          hysteresis=args.hysteresis, contact_mixing=args.contact_mixing,
                          irregular_field=args.irregular_field,
                          zero_field_row=args.zero_field_row,
                          field_sign={"+": 1, "-": -1, "both": "both"}[args.field_sign],
                          **common)
    if args.out is not None:
        write_map(ds, args.out)
        print(f"wrote {args.out}: {ds.attrs['title']}, " + " x ".join(
            f"{n} {d}" for d, n in ds.sizes.items()))
    if args.png is not None:
        render_png(ds, args.png)
        print(f"wrote {args.png}")
    return 0


def render_png(ds, path):
    """Save a picture of R_xx on a log colour scale (perceptually uniform colormap)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm

    rxx = ds[S.RXX].values
    positive = rxx[np.isfinite(rxx) & (rxx > 0)]
    if positive.size == 0:
        raise InputError("the map has no positive R_xx to draw on a log scale")
    norm = LogNorm(np.percentile(positive, 1), np.percentile(positive, 99.8))
    if ds.attrs.get(S.MAP_KIND) == S.GATES:
        x, y, xlabel, ylabel = ds[S.TOP_GATE], ds[S.BOTTOM_GATE], "top gate (V)", "bottom gate (V)"
    else:
        order = np.argsort(ds[S.FIELD].values, kind="stable")
        ds = ds.isel({S.FIELD: order})
        rxx = ds[S.RXX].values
        x, y, xlabel, ylabel = ds[S.GATE], ds[S.FIELD], "gate voltage (V)", "magnetic field (T)"
    fig, ax = plt.subplots(figsize=(7, 5), layout="constrained")
    # noise can push near-zero minima below zero: draw them at the bottom of the scale
    mesh = ax.pcolormesh(x, y, np.clip(rxx, norm.vmin, None), norm=norm, cmap="magma",
                         shading="nearest", rasterized=True)
    fig.colorbar(mesh, ax=ax, label=r"$R_{xx}$ ($\Omega$)")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(ds.attrs.get("title", "simulated map") + " — synthetic")
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=150)
    plt.close(fig)
