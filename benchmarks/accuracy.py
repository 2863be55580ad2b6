"""Accuracy benchmark: every case module in ``CASE_MODULES`` on simulated maps with known truth.

Each case module (a file ``benchmarks/_cases_*.py``) has ``run(out=sys.stdout)``, which
simulates its maps, fits them, prints one row per map and a summary, and returns the rows.
Add a module with a one-line edit of ``CASE_MODULES``.

Run (one core, as the targets are stated)::

    OMP_NUM_THREADS=1 python benchmarks/accuracy.py            # every module
    OMP_NUM_THREADS=1 python benchmarks/accuracy.py _cases_fan # only the named ones
"""

import importlib
import pathlib
import sys
import time

CASE_MODULES = [
    "_cases_fan",            # main fan fit: alpha, V0, degeneracy, Berry phase, fractions
    "_cases_superlattice",   # moire satellites, twist angle
    "_cases_gates",          # dual-gate maps: C_t, C_b, ratio, offsets
]


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    sys.path.insert(0, str(pathlib.Path(__file__).parent))
    names = argv or CASE_MODULES
    results = {}
    for name in names:
        module = importlib.import_module(name)
        print(f"== {name}: {module.__doc__.strip().splitlines()[0]}")
        start = time.perf_counter()
        results[name] = module.run()
        print(f"({time.perf_counter() - start:.0f} s)\n")
    return results


if __name__ == "__main__":
    main()
