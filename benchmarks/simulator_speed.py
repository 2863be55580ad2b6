"""Time the map simulator: a 500 (gate) x 250 (field) fan of each material, on one core.

Run with ``OMP_NUM_THREADS=1 python benchmarks/simulator_speed.py``; prints the best of
``--repeat`` runs per material, as wall time and as CPU time of this process (the latter
is what counts on a busy machine); the goal is well under a second per map.
"""

import argparse
import time

import numpy as np

from fanmap.simulate import PRESETS, simulate_fan, simulate_gate_map


def best_time(function, repeat):
    """Best (wall, CPU) seconds of ``repeat`` calls."""
    wall, cpu = [], []
    for _ in range(repeat):
        start, start_cpu = time.perf_counter(), time.process_time()
        function()
        wall.append(time.perf_counter() - start)
        cpu.append(time.process_time() - start_cpu)
    return min(wall), min(cpu)


def main():
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    simulate_fan("2deg", gate=np.linspace(-0.5, 0.2, 10), field=[1.0])  # imports, warm-up
    for material, preset in PRESETS.items():
        gate = np.linspace(*preset["gate"][:2], 500)
        field = np.linspace(preset["field_max"] / 250, preset["field_max"], 250)
        wall, cpu = best_time(lambda: simulate_fan(material, gate=gate, field=field),
                              args.repeat)
        print(f"fan 500 x 250  {material:28s} wall {wall:6.3f} s  cpu {cpu:6.3f} s")
    wall, cpu = best_time(lambda: simulate_gate_map(top_gate=np.linspace(-8, 8, 201),
                                                    bottom_gate=np.linspace(-80, 80, 161),
                                                    field=6.0), args.repeat)
    print(f"gate map 201 x 161, 6 T, graphene-bilayer  wall {wall:6.3f} s  cpu {cpu:6.3f} s")


if __name__ == "__main__":
    main()
