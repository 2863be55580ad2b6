"""Write the demo archive the example workflows in this folder analyse.

The scenario is invented: the Kestrel Row low-temperature lab keeps every map
of three devices, sorted by device and cooldown:

* KR-12, hBN-encapsulated monolayer graphene on 285 nm SiO2 (back gate), measured
  in cooldowns CD3 and CD4; its zero-density voltage moved between them.  One
  CD4 map was cut short when the acquisition crashed (a truncated file).
* KR-H3, a GaAs-type 2DEG Hall bar with a surface gate.
* KR-19, Bernal bilayer graphene with a 30 nm hBN top gate and the 285 nm SiO2
  back gate: dual-gate maps at 0 T and 9 T, and a back-gate fan exported by the
  lab's acquisition program as CSV (lock-in voltages in uV at 10 nA, field in kG,
  gate in mV).

All maps are simulated (``fanmap.simulate``); they are demo data, not measurements.

Usage::

    python workflows/make_demo_archive.py            # small maps, quick to analyse
    python workflows/make_demo_archive.py --full     # 500 x 250 maps, as measured
    fanmap batch workflows/kestrel-row-fans.toml
    fanmap batch workflows/kestrel-row-dual-gate.toml
"""

import argparse
from pathlib import Path

import numpy as np

from fanmap.physics import ELEMENTARY_CHARGE, parallel_plate_capacitance
from fanmap.simulate import simulate_fan, simulate_gate_map, write_map

HERE = Path(__file__).resolve().parent

#: Dielectrics of the scenario (thickness m, relative permittivity); SiO2 3.9 and hBN 3.4
#: are the usual handbook values (common practice).
SIO2 = (285e-9, 3.9)
HBN_TOP = (30e-9, 3.4)

#: Grid sizes (gate points, field rows) for the two archive sizes.
SIZES = {"small": (201, 60), "full": (500, 250)}


def _lever_arm(dielectric):
    return float(parallel_plate_capacitance(*dielectric)) / ELEMENTARY_CHARGE


def _fan(material, gate_span, field_span, size, alpha, v0, seed, start_time, grid=None, **options):
    n_gate, n_field = grid or SIZES[size]
    fan = simulate_fan(material, gate=np.linspace(*gate_span, n_gate),
                       field=np.linspace(*field_span, n_field), density_per_volt=alpha,
                       zero_density_voltage=v0, seed=seed, **options)
    fan.attrs["start_time"] = start_time
    return fan


def _write_lab_csv(fan, path, current=10e-9):
    """The acquisition program's long CSV: one line per point, lock-in voltages in uV."""
    field = np.repeat(fan["field"].values, fan.sizes["gate"])
    gate = np.tile(fan["gate"].values, fan.sizes["field"])
    rxx, rxy = fan["rxx"].values.ravel(), fan["rxy"].values.ravel()
    table = np.column_stack([field * 10.0, gate * 1e3, rxx * current * 1e6, rxy * current * 1e6])
    path.parent.mkdir(parents=True, exist_ok=True)
    np.savetxt(path, table, delimiter=",", fmt="%.7g", comments="",
               header="B (kG),Vbg (mV),Vxx (uV),Vxy (uV)")


def make_demo_archive(folder=HERE / "demo-archive", size="small"):
    """Write the archive into ``folder``; return the paths written (sorted)."""
    folder = Path(folder)
    alpha_sio2 = _lever_arm(SIO2)
    written = []

    def put(fan, relative):
        path = folder / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        write_map(fan, path)
        written.append(path)
        return path

    # KR-12: V0 drifts slowly within a cooldown and jumps between cooldowns.
    for cooldown, v0s, day in (("CD3", (0.60, 0.68), "2026-02-1"), ("CD4", (1.90,), "2026-03-0")):
        for k, v0 in enumerate(v0s):
            fan = _fan("graphene-monolayer", (-40, 40), (2.0, 12.0), size, alpha_sio2, v0,
                       seed=100 + 10 * k + len(written), start_time=f"{day}{k + 2}T14:30:00Z")
            put(fan, f"KR-12/{cooldown}/fan_{day}{k + 2}.nc")
    crashed = put(_fan("graphene-monolayer", (-40, 40), (2.0, 12.0), size, alpha_sio2, 1.95, seed=7,
                       start_time="2026-03-05T09:10:00Z"), "KR-12/CD4/fan_2026-03-05_crashed.nc")
    data = crashed.read_bytes()
    crashed.write_bytes(data[: len(data) // 2])

    # KR-H3: a depletion-mode 2DEG at 1.5 K (spin splitting and fractions not resolved);
    # the fan origin lies below the gate window.
    put(_fan("2deg", (-0.6, 0.3), (0.5, 8.0), size, 6.0e15, -0.75, seed=300, temperature=1.5,
             broken_symmetry={}, fractional={}, start_time="2026-02-23T11:00:00Z"),
        "KR-H3/fan_2026-02-23.nc")

    # KR-19: dual-gate maps at zero field and at 9 T, and a back-gate fan exported as CSV.
    n_gate, _ = SIZES[size]
    for field, seed, hour in ((0.0, 500, 16), (9.0, 502, 19)):
        gates = simulate_gate_map("graphene-bilayer", top_gate=np.linspace(-6, 6, n_gate // 2 + 1),
                                  bottom_gate=np.linspace(-60, 60, n_gate // 2 + 1), field=field,
                                  hall=field != 0.0,
                                  top_capacitance=float(parallel_plate_capacitance(*HBN_TOP)),
                                  bottom_capacitance=float(parallel_plate_capacitance(*SIO2)),
                                  top_offset=0.08, bottom_offset=-1.5, seed=seed)
        gates.attrs["start_time"] = f"2026-03-10T{hour}:00:00Z"
        put(gates, f"KR-19/gates_2026-03-10_{field:.0f}T.nc")
    # (the bilayer's fourfold levels need a finer grid than the small size to be resolved)
    back_fan = _fan("graphene-bilayer", (-40, 40), (1.0, 12.0), size, alpha_sio2, -1.5, seed=501,
                    start_time="2026-03-11T10:00:00Z", grid=(251, 80) if size == "small" else None)
    csv_path = folder / "KR-19/backgate_fan_2026-03-11.csv"
    _write_lab_csv(back_fan, csv_path)
    written.append(csv_path)
    return sorted(written)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", nargs="?", type=Path, default=HERE / "demo-archive")
    parser.add_argument("--full", action="store_true", help="500 x 250 maps instead of small ones")
    args = parser.parse_args(argv)
    for path in make_demo_archive(args.folder, "full" if args.full else "small"):
        print(path)


if __name__ == "__main__":
    main()
