"""Throughput and memory of the batch machinery over an archive of simulated fans.

Writes an archive of simulated 500 x 250 monolayer fans (each its own lever arm and
V0), then analyses it

1. serially in one process: ``analyse_one`` in a plain loop (no records, no table,
   no dask): the analysis time itself;
2. with ``run_batch`` and a local dask cluster of 1 worker, then of 2 workers
   (records, table, summary figure and index included);
3. with 2 workers again over the first half of the archive, to show that peak
   memory does not grow with the number of maps;
4. in two plain worker processes (no dask, no records, no table): the most that
   two cores of this machine give, against which the 2-worker speed-up is judged.

Each run is a separate process.  Its peak memory is the sum over its whole process
tree (the batch with the dask scheduler, and every worker) of each process's own peak
resident set (the kernel's high-water mark, read every 0.5 s), which is never less
than the tree's largest simultaneous total; its CPU time is the kernel's user +
system time of the run and of the children it waited for.  Wall-clock rates depend
on what else the machine runs, so every run is repeated in rounds (``--rounds``,
default 3), the runs taking turns, and each figure is from the run with the median
wall time; CPU time per map hardly depends on other load, so the overhead is given
both ways, and the median analysis time of one map inside the workers (the table's
``elapsed`` column) shows whether the analysis itself ran slower there.  The per-map
analysis is the fan fit (cross-checks and per-map figures off, so that the machinery
and not the figure writer is measured); the same settings go to every run.

Targets: batch overhead per map under 15 % of the serial analysis time; at least
1.7 times the 1-worker rate with 2 workers on 2 cores; peak memory independent
of the archive size.

Usage::

    python benchmarks/throughput.py                 # 200 maps, 3 rounds (about 10 minutes on 2 cores)
    python benchmarks/throughput.py --maps 20 --rounds 1   # a quick look
"""

import argparse
import json
import multiprocessing
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import psutil

SHAPE = (250, 500)        # field rows, gate points
ALPHA_SIO2 = 7.57e14      # m^-2 V^-1, 285 nm SiO2 (eps_r 3.9, common practice)


def _settings():
    from fanmap.archive import map_settings
    return map_settings(material="graphene-monolayer", figures=False,
                        analyses={"fan": True, "gates": False, "crosschecks": False})


def _write_one(args):
    from fanmap.simulate import simulate_fan, write_map

    index, folder = args
    rng = np.random.default_rng(index)
    fan = simulate_fan("graphene-monolayer", gate=np.linspace(-40, 40, SHAPE[1]),
                       field=np.linspace(1.5, 14.0, SHAPE[0]),
                       density_per_volt=ALPHA_SIO2 * rng.uniform(0.9, 1.1),
                       zero_density_voltage=rng.uniform(-2.0, 5.0), seed=index)
    path = Path(folder) / f"device{index % 4}" / f"fan_{index:04d}.nc"
    path.parent.mkdir(parents=True, exist_ok=True)
    write_map(fan, path)
    return path


def make_archive(folder, count, processes=2):
    folder.mkdir(parents=True, exist_ok=True)
    with ProcessPoolExecutor(processes) as pool:
        return sorted(pool.map(_write_one, [(i, folder) for i in range(count)]))


# --- one measured run (in its own process) ---------------------------------------------

def _phase(kind, archive, out, count):
    from fanmap import archive as batch

    root, maps = batch.find_maps(archive)
    maps = maps[:count]
    start = time.perf_counter()
    outputs = 0.0
    if kind == "serial":
        rows = [batch.analyse_one(path, _settings()) for path in maps]
    elif kind == "plain2":
        # Two fresh processes and nothing else: what two cores of this machine give at best.
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(2, mp_context=context) as pool:
            rows = list(pool.map(batch.analyse_one, maps, [_settings()] * len(maps)))
    else:
        outcome = batch.run_batch(batch.jobs_for_paths(maps, root, _settings()), out, workers=int(kind),
                                  stream=None)
        rows = batch.read_results_table(Path(out) / "results.csv")
        outputs = outcome.timings["outputs"]
    seconds = time.perf_counter() - start
    # CPU time of this process and of every child it has waited for (the dask workers).
    cpu = sum(u.ru_utime + u.ru_stime for u in (resource.getrusage(resource.RUSAGE_SELF),
                                                 resource.getrusage(resource.RUSAGE_CHILDREN)))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"seconds": seconds, "maps": len(maps), "outputs_s": outputs, "cpu_s": cpu,
                      "peak_rss": peak,
                      "failed": sum(row["status"] != "ok" for row in rows),
                      "analysis_s": float(sum(row["elapsed"] for row in rows)),
                      "median_map_s": float(np.median([row["elapsed"] for row in rows]))}))


def _peak_rss(pid):
    """The process's peak resident set so far (VmHWM, bytes), or None once it has gone."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def _sample(process, peaks):
    """Update ``peaks`` (pid -> peak RSS) for every process of the tree."""
    for proc in [process] + process.children(recursive=True):
        peak = _peak_rss(proc.pid)
        if peak is not None:
            peaks[proc.pid] = max(peaks.get(proc.pid, 0), peak)


def measure(kind, archive, out, count):
    """Run one phase in a fresh process; return its result with the tree's peak memory.

    Peak memory is the sum of each process's own peak (the kernel's high-water mark,
    read every 0.5 s): at least the tree's largest simultaneous total, never less.
    Sampling is sparse so that the harness itself takes next to no CPU from the run;
    CPU time comes from the kernel's accounting of the run and its children.
    """
    shutil.rmtree(out, ignore_errors=True)
    command = [sys.executable, __file__, "_phase", kind, str(archive), str(out), str(count)]
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, text=True,
                            env=dict(os.environ, OMP_NUM_THREADS="1"))
    watched, peaks = psutil.Process(proc.pid), {}
    while proc.poll() is None:
        try:
            _sample(watched, peaks)
        except psutil.Error:
            pass
        time.sleep(0.5)
    stdout, _ = proc.communicate()
    if proc.returncode != 0:
        raise SystemExit(f"{kind} run failed (exit {proc.returncode})")
    result = json.loads(stdout.strip().splitlines()[-1])
    peaks[proc.pid] = max(peaks.get(proc.pid, 0), result.pop("peak_rss"))
    result.update(peak_mib=sum(peaks.values()) / 2**20, rate=result["maps"] / result["seconds"],
                  cpu_per_map=result.pop("cpu_s") / result["maps"])
    return result


def _median_run(results):
    """The run whose wall time is the median of the rounds (other load only ever slows a run)."""
    ordered = sorted(results, key=lambda r: r["seconds"])
    return ordered[(len(ordered) - 1) // 2]


def main(argv=None):
    parser = argparse.ArgumentParser(description="throughput and memory of fanmap batch")
    parser.add_argument("--maps", type=int, default=200, help="maps in the archive (default 200)")
    parser.add_argument("--workdir", type=Path, help="where the archive goes (default: a temporary folder)")
    parser.add_argument("--rounds", type=int, default=3, help="rounds of every run (default 3)")
    parser.add_argument("--keep", action="store_true", help="keep the archive and outputs")
    args = parser.parse_args(argv)
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="fanmap-throughput-"))
    archive = workdir / "archive"
    try:
        started = time.perf_counter()
        if len(list(archive.rglob("*.nc"))) != args.maps:      # reuse a kept archive of this size
            shutil.rmtree(archive, ignore_errors=True)
            make_archive(archive, args.maps)
        size = sum(p.stat().st_size for p in archive.rglob("*.nc")) / 2**20
        print(f"archive: {args.maps} simulated {SHAPE[0]} x {SHAPE[1]} fans, {size:.0f} MiB, "
              f"written in {time.perf_counter() - started:.0f} s; cores available: "
              f"{len(os.sched_getaffinity(0))}; load average before the runs: "
              f"{os.getloadavg()[0]:.1f}")
        half = max(1, args.maps // 2)
        phases = {"serial, one process": ("serial", args.maps), "batch, 1 worker": ("1", args.maps),
                  "batch, 2 workers": ("2", args.maps), f"batch, 2 workers, {half} maps": ("2", half),
                  "2 plain processes, no dask": ("plain2", args.maps)}
        # Rounds of every run in turn, so that a slow spell of the machine hits all of them
        # alike; each figure below is the run with the median wall time of its rounds.
        rounds = {name: [] for name in phases}
        for round_number in range(args.rounds):
            for name, (kind, count) in phases.items():
                rounds[name].append(measure(kind, archive, workdir / "out", count))
            print(f"round {round_number + 1}: " + ", ".join(
                f"{name} {rounds[name][-1]['seconds']:.1f} s" for name in phases), flush=True)
        runs = {name: _median_run(results) for name, results in rounds.items()}
        print(f"\n{'run (median of ' + str(args.rounds) + ' rounds)':30s} {'maps':>5s} {'failed':>6s} "
              f"{'wall s':>7s} {'maps/s':>7s} {'CPU s/map':>9s} {'median map s':>12s} {'peak MiB':>9s}")
        for name, r in runs.items():
            print(f"{name:30s} {r['maps']:5d} {r['failed']:6d} {r['seconds']:7.1f} {r['rate']:7.3f} "
                  f"{r['cpu_per_map']:9.3f} {r['median_map_s']:12.3f} {r['peak_mib']:9.0f}")
        # Ratios within each round (the runs of a round ran minutes apart, not tens of minutes).
        paired = {
            "overhead": [(o["seconds"] - s["seconds"]) / s["seconds"]
                         for s, o in zip(rounds["serial, one process"], rounds["batch, 1 worker"])],
            "speed-up": [o["seconds"] / t["seconds"]
                         for o, t in zip(rounds["batch, 1 worker"], rounds["batch, 2 workers"])],
            "ceiling": [s["seconds"] / c["seconds"]
                        for s, c in zip(rounds["serial, one process"], rounds["2 plain processes, no dask"])]}
        print("\nper round: 1-worker overhead " + ", ".join(f"{v * 100:+.1f} %" for v in paired["overhead"])
              + "; 2-over-1 speed-up " + ", ".join(f"{v:.2f}x" for v in paired["speed-up"])
              + "; 2 plain processes over serial " + ", ".join(f"{v:.2f}x" for v in paired["ceiling"]))
        print(f"medians of the per-round ratios: overhead {np.median(paired['overhead']) * 100:+.1f} % "
              f"(target < 15 %), speed-up {np.median(paired['speed-up']):.2f}x (target >= 1.7x), "
              f"machine ceiling {np.median(paired['ceiling']):.2f}x")
        serial, one, two = (runs["serial, one process"], runs["batch, 1 worker"], runs["batch, 2 workers"])
        half_run = runs[f"batch, 2 workers, {half} maps"]
        overhead = (one["seconds"] - serial["seconds"]) / serial["seconds"]
        print(f"\nserial analysis time per map:            {serial['seconds'] / serial['maps']:.3f} s")
        print(f"batch overhead per map (1 worker), wall:  {overhead * 100:+.1f} % of it "
              f"(target < 15 %; includes cluster start, records, table, summary)")
        # What the machinery itself costs: wall time not spent analysing a map or writing the
        # end-of-run outputs (cluster start and stop, dispatch, results coming back, records).
        machinery = (one["seconds"] - one["outputs_s"] - one["analysis_s"]) / one["maps"]
        print(f"  machinery alone (wall - outputs - the maps' own analysis time): {machinery:.4f} s per map "
              f"= {machinery / (serial['seconds'] / serial['maps']) * 100:.1f} % of the serial analysis time")
        cpu_overhead = (one["cpu_per_map"] - serial["cpu_per_map"]) / serial["cpu_per_map"]
        bare = (one["seconds"] - one["outputs_s"] - serial["seconds"]) / serial["seconds"]
        print(f"  without the end-of-run table/summary/index ({one['outputs_s']:.1f} s, once per run): "
              f"{bare * 100:+.1f} %")
        print(f"batch overhead per map (1 worker), CPU:   {cpu_overhead * 100:+.1f} % "
              f"(CPU time of the whole process tree; independent of other load)")
        print(f"analysis of one map inside a worker:      median {one['median_map_s']:.3f} s vs "
              f"{serial['median_map_s']:.3f} s serially")
        print(f"speed-up, 2 workers over 1 worker:        {two['rate'] / one['rate']:.2f}x (target >= 1.7x)")
        parallel = two["analysis_s"] / (two["seconds"] - two["outputs_s"])
        print(f"  maps analysed at once on average (2 workers): {parallel:.2f} "
              f"(sum of per-map times / wall time of the analysis phase)")
        print(f"speed-up, 2 workers over serial:          {two['rate'] / serial['rate']:.2f}x")
        plain = runs["2 plain processes, no dask"]
        print(f"2 plain processes over serial:            {plain['rate'] / serial['rate']:.2f}x "
              f"(no dask, no records: the most two cores of this machine gave; median map "
              f"{plain['median_map_s']:.3f} s)")
        print(f"peak memory, {two['maps']} vs {half_run['maps']} maps (2 workers): "
              f"{two['peak_mib']:.0f} vs {half_run['peak_mib']:.0f} MiB "
              f"(ratio {two['peak_mib'] / half_run['peak_mib']:.2f}; independent of size means ~1)")
        print(f"load average after the runs: {os.getloadavg()[0]:.1f} (other work on the machine "
              f"slows every run alike only if it is steady)")
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "_phase":
        _phase(sys.argv[2], Path(sys.argv[3]), Path(sys.argv[4]), int(sys.argv[5]))
    else:
        main()
