"""Archive runs: dask cluster, bad files, kill and resume, an external scheduler, the table.

The maps are small simulated fans (fanmap.simulate), each with its own lever arm, so a row
that landed on the wrong map would show.  Bad files are mixed in as they turn up in real
archives: random bytes, an empty file, a truncated netCDF, a text file that is no map.
"""

import csv
import hashlib
import json
import math
import os
import signal
import subprocess
import sys
import time

import numpy as np
import psutil
import pytest

from fanmap import archive, cli
from fanmap.archive import RUN_COLUMNS, TABLE_COLUMNS, read_results_table
from fanmap.physics import lever_arm_from_dielectric
from fanmap.simulate import simulate_fan, simulate_gate_map, write_map

#: Lever arms of the archive's fans: 285 nm SiO2 (eps_r 3.9, common practice) times a
#: per-map factor; each map also has its own V0 (0.1 V apart, far more than the fit's
#: error), so a row that landed on the wrong map would show.
BASE_ALPHA = float(lever_arm_from_dielectric(285e-9, 3.9))
FACTORS = tuple(round(0.98 + 0.02 * k, 2) for k in range(10))


def make_fans(folder, count, start=0):
    """``count`` small monolayer fans under ``folder``/devX/, each with its own lever arm."""
    paths = []
    for k in range(start, start + count):
        fan = simulate_fan("graphene-monolayer", gate=np.linspace(-40, 40, 201),
                           field=np.linspace(2.0, 12.0, 60), density_per_volt=BASE_ALPHA * FACTORS[k],
                           zero_density_voltage=0.5 + 0.1 * k, seed=k)
        path = folder / f"dev{k % 2}" / f"fan_{k:02d}.nc"
        path.parent.mkdir(parents=True, exist_ok=True)
        write_map(fan, path)
        paths.append(path)
    return paths


def make_bad_files(folder):
    folder.mkdir(parents=True, exist_ok=True)
    bad = {
        "random.nc": np.random.default_rng(1).bytes(4096),
        "empty.csv": b"",
        "notes.txt": b"cooldown 4: fridge at base, magnet ramped to 12 T\nall fine\n",
    }
    for name, data in bad.items():
        (folder / name).write_bytes(data)
    whole = folder / "truncated.nc"
    write_map(simulate_fan("graphene-monolayer", gate=np.linspace(-40, 40, 201),
                           field=np.linspace(2.0, 12.0, 60), seed=99), whole)
    data = whole.read_bytes()
    whole.write_bytes(data[: len(data) // 3])      # an acquisition that died mid-write
    return sorted(folder / name for name in [*bad, "truncated.nc"])


def truth(path, name="density_per_volt"):
    import xarray as xr
    with xr.open_dataset(path) as ds:
        return float(ds.attrs[f"truth_{name}"])


def settings(**options):
    return archive.map_settings(material="graphene-monolayer", figures=False,
                                analyses={"crosschecks": False}, **options)


def records(out):
    """Finished per-map records (not the temporary file of one being written)."""
    return [p for p in (out / "records").glob("*.json") if not p.name.startswith(".")]


def leftovers(out):
    """Temporary files of unfinished writes (the batch's lock file is not one)."""
    return [p for p in out.rglob(".*") if p.name != ".lock"]


def rows_by_path(rows):
    return {row["path"]: row for row in rows}


def comparable(row, also=()):
    return {k: v for k, v in row.items() if k not in RUN_COLUMNS + tuple(also)}


def same(a, b):
    return a == b or (isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b))


@pytest.mark.slow
def test_local_cluster_analyses_every_good_map_and_reports_every_bad_one(tmp_path):
    good = make_fans(tmp_path / "archive", 6)
    gate_map = tmp_path / "archive" / "dev0" / "gates_0T.nc"
    write_map(simulate_gate_map("graphene-bilayer", top_gate=np.linspace(-6, 6, 61),
                                bottom_gate=np.linspace(-60, 60, 61), seed=3), gate_map)
    bad = make_bad_files(tmp_path / "archive" / "junk")
    root, maps = archive.find_maps(tmp_path / "archive")
    assert set(maps) == set(good) | set(bad) | {gate_map}

    out = tmp_path / "out"
    outcome = archive.run_batch(archive.jobs_for_paths(maps, root, settings()), out, workers=2,
                                max_in_flight=3, stream=None)
    assert outcome.maps == len(maps) == outcome.analysed
    rows = read_results_table(out / "results.csv")
    assert [r["path"] for r in rows] == [str(p) for p in maps]            # one row per map, in order
    by_path = rows_by_path(rows)
    for path in good:
        row = by_path[str(path)]
        assert row["status"] == "ok", row["error"]
        # Each row holds its own map's lever arm and V0 (the simulator's truth), not a neighbour's.
        assert row["density_per_volt"] == pytest.approx(truth(path), rel=0.03)
        assert row["zero_density_voltage"] == pytest.approx(truth(path, "zero_density_voltage"), abs=0.03)
        # Content hash: sha256 of the file bytes (FIPS 180-4, via hashlib).
        assert row["content_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
        assert json.loads((out / "maps" / row["map"] / "result.json").read_text())["density_per_volt"] == \
            pytest.approx(row["density_per_volt"], rel=1e-12)
    assert by_path[str(gate_map)]["status"] == "ok"
    assert by_path[str(gate_map)]["map_kind"] == "gates"
    assert math.isfinite(by_path[str(gate_map)]["capacitance_ratio"])
    for path in bad:
        row = by_path[str(path)]
        assert row["status"] == "failed" and row["error"], path
        assert math.isnan(row["density_per_volt"])
    assert outcome.failed == len(bad)
    # The same numbers come back from the netCDF table, and the same as a serial run gives.
    nc_rows = read_results_table(out / "results.nc")
    for row, nc_row in zip(rows, nc_rows):
        assert all(same(row[k], nc_row[k]) for k in TABLE_COLUMNS)
    serial = archive.analyse_one(good[2], settings())
    assert comparable(dict(serial, map=by_path[str(good[2])]["map"])) == comparable(by_path[str(good[2])])
    assert len(records(out)) == len(maps)
    assert (out / "summary.png").stat().st_size > 0 and (out / "index.html").is_file()
    # The index shows that summary figure; it does not draw a second one.
    assert 'href="summary.pdf"' in (out / "index.html").read_text(encoding="utf-8")
    assert not (out / "batch_summary.png").exists()
    assert not leftovers(out)                                       # no temporary files left


def _run_cli(args, **popen):
    return subprocess.Popen([sys.executable, "-m", "fanmap", "batch", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True, **popen)


def _kill_group(proc):
    """SIGKILL the batch and every process it started (its session), as a crash would."""
    family = [proc.pid] + [c.pid for c in psutil.Process(proc.pid).children(recursive=True)]
    os.killpg(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=30)
    gone, alive = psutil.wait_procs([psutil.Process(p) for p in family if psutil.pid_exists(p)],
                                    timeout=10)
    assert not alive
    return family


@pytest.mark.slow
def test_killed_run_resumes_to_the_same_table_row_by_row(tmp_path):
    maps = make_fans(tmp_path / "archive", 8) + make_bad_files(tmp_path / "archive" / "junk")
    out = tmp_path / "out"
    command = [tmp_path / "archive", "--workers", "2", "--out", out, "--no-figures", "--no-summary",
               "--material", "graphene-monolayer", "--analyses", "fan", "--in-flight", "2"]
    proc = _run_cli(command)
    deadline = time.monotonic() + 90
    while len(records(out)) < 3:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the batch produced no records"
        time.sleep(0.02)
    family = _kill_group(proc)
    assert len(family) >= 3                                  # the batch and its two workers
    done_before = len(records(out))
    assert done_before < len(maps), "the run finished before it was killed"
    assert not (out / "results.csv").exists()

    resumed = _run_cli(command + ["--resume"])
    stdout, stderr = resumed.communicate(timeout=180)
    assert resumed.returncode == 0, stderr
    assert f"{done_before} from earlier runs)" in stderr.splitlines()[-2], stderr

    # An uninterrupted run (in this process, no dask) of the same archive and settings.
    root, found = archive.find_maps(tmp_path / "archive")
    archive.run_batch(
        archive.jobs_for_paths(found, root, archive.map_settings(
            material="graphene-monolayer", figures=False, analyses={"gates": False, "crosschecks": False})),
        tmp_path / "reference", workers=0, summary=False, stream=None)
    junk = [row for row in read_results_table(tmp_path / "reference" / "results.csv") if "junk" in row["path"]]
    assert len(junk) == 4 and all(row["status"] == "failed" for row in junk)
    with open(out / "results.csv", newline="") as a, \
            open(tmp_path / "reference" / "results.csv", newline="") as b:
        resumed_rows, reference_rows = list(csv.DictReader(a)), list(csv.DictReader(b))
    assert len(resumed_rows) == len(reference_rows) == len(maps)
    assert sorted(r["path"] for r in resumed_rows) == sorted(str(p) for p in maps)
    for got, want in zip(resumed_rows, reference_rows):    # the text of every number is identical
        # The netCDF library words the same corrupt file differently from one process to the
        # next (its error code depends on what it opened before); the reason itself must agree.
        assert got["error"].split(": ")[:2] == want["error"].split(": ")[:2]
        assert comparable(got, also=("error",)) == comparable(want, also=("error",))
    assert len(records(out)) == len(maps)
    assert not leftovers(out)        # the temporary file of a write the kill cut short is gone


def test_resume_reanalyses_changed_files_and_retries_failures_on_request(tmp_path):
    maps = make_fans(tmp_path / "a", 2)
    (tmp_path / "a" / "empty.nc").write_bytes(b"")
    root, found = archive.find_maps(tmp_path / "a")
    jobs = archive.jobs_for_paths(found, root, settings())
    first = archive.run_batch(jobs, tmp_path / "out", workers=0, summary=False, stream=None)
    assert (first.analysed, first.failed) == (3, 1)
    again = archive.run_batch(jobs, tmp_path / "out", workers=0, resume=True, summary=False, stream=None)
    assert (again.analysed, again.resumed) == (0, 3)
    # A map whose bytes changed is analysed again; the others are not.
    write_map(simulate_fan("graphene-monolayer", gate=np.linspace(-40, 40, 201),
                           field=np.linspace(2, 12, 60), density_per_volt=BASE_ALPHA * 1.1, seed=9),
              maps[0])
    changed = archive.run_batch(jobs, tmp_path / "out", workers=0, resume=True, summary=False, stream=None)
    assert (changed.analysed, changed.resumed) == (1, 2)
    row = rows_by_path(read_results_table(tmp_path / "out" / "results.csv"))[str(maps[0])]
    assert row["density_per_volt"] == pytest.approx(BASE_ALPHA * 1.1, rel=0.03)
    # Other settings are other results; failures are kept unless a retry is asked for.
    other = archive.jobs_for_paths(found, root, settings(gate_range=(-35, 35)))
    assert archive.run_batch(other, tmp_path / "out", workers=0, resume=True, summary=False,
                             stream=None).analysed == 3
    retried = archive.run_batch(jobs, tmp_path / "out", workers=0, resume=True, retry_failed=True,
                                summary=False, stream=None)
    assert (retried.analysed, retried.resumed) == (1, 2)


@pytest.fixture
def loopback_cluster(tmp_path):
    """A dask scheduler and one worker, started as separate processes on 127.0.0.1."""
    scheduler_file = tmp_path / "scheduler.json"
    started = [subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
         "--no-dashboard", "--scheduler-file", str(scheduler_file)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)]
    try:
        deadline = time.monotonic() + 60
        while not scheduler_file.exists() or not scheduler_file.read_text().strip():
            assert time.monotonic() < deadline and started[0].poll() is None, "no scheduler"
            time.sleep(0.1)
        address = json.loads(scheduler_file.read_text())["address"]
        started.append(subprocess.Popen(
            [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nworkers", "1",
             "--nthreads", "1", "--no-dashboard", "--host", "127.0.0.1"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
            env=dict(os.environ, OMP_NUM_THREADS="1")))
        from distributed import Client
        with Client(address, timeout="30s") as client:
            client.wait_for_workers(1, timeout=60)
        yield address
    finally:
        for proc in started:
            with_children = [proc.pid] + [c.pid for c in psutil.Process(proc.pid).children(recursive=True)] \
                if psutil.pid_exists(proc.pid) else []
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=15)
            psutil.wait_procs([psutil.Process(p) for p in with_children if psutil.pid_exists(p)],
                              timeout=10)


@pytest.mark.slow
def test_scheduler_address_runs_the_batch_on_that_cluster(tmp_path, loopback_cluster):
    maps = make_fans(tmp_path / "archive", 3)
    (tmp_path / "archive" / "empty.h5").write_bytes(b"")
    out = tmp_path / "out"
    code = cli.main(["batch", str(tmp_path / "archive"), "--scheduler", loopback_cluster, "--out", str(out),
                     "--no-figures", "--no-summary", "--material", "graphene-monolayer", "--analyses", "fan"])
    assert code == 0
    rows = rows_by_path(read_results_table(out / "results.nc"))
    assert len(rows) == 4
    for path in maps:
        assert rows[str(path)]["status"] == "ok"
        assert rows[str(path)]["zero_density_voltage"] == pytest.approx(truth(path, "zero_density_voltage"),
                                                                        abs=0.03)
    assert rows[str(tmp_path / "archive" / "empty.h5")]["status"] == "failed"


def test_discovery_names_hashes_and_progress(tmp_path):
    for name in ("a/x.nc", "a/b/y.csv", "a/.hidden/z.nc", "a/out/results.nc", "a/readme.md"):
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_bytes(b"x")
    root, maps = archive.find_maps(tmp_path / "a", exclude=[tmp_path / "a" / "out"])
    assert [p.relative_to(root).as_posix() for p in maps] == ["b/y.csv", "x.nc"]
    root, maps = archive.find_maps(str(tmp_path / "a" / "**" / "*.csv"))
    assert [p.name for p in maps] == ["y.csv"]
    names = [job.name for job in archive.jobs_for_paths(
        [tmp_path / "a/x.nc", tmp_path / "a/b/y.csv"], tmp_path, settings())]
    assert names == ["a__x.nc", "a__b__y.csv"]
    with pytest.raises(archive.InputError, match="no readable map file"):
        archive.find_maps(tmp_path / "a" / "b" / "nothing-*.nc")
    # Labels and output choices do not change the settings hash; analysis settings do.
    base = archive.settings_sha256(settings())
    assert archive.settings_sha256(settings()) == base
    assert archive.settings_sha256(archive.map_settings(
        material="graphene-monolayer", figures=True, analyses={"crosschecks": False},
        device="KR-12", cooldown="CD4")) == base
    assert archive.settings_sha256(settings(gate_range=(-10, 10))) != base
    progress = archive._Progress(10, stream=None)
    progress.start -= 4.0
    for status in ("ok", "ok", "failed", "ok"):
        progress.count({"status": status})
    assert progress.line() == "maps: 4/10 done (1 failed), 6 remaining, 1.00 maps/s, ETA 6s"


def test_command_line_errors_exit_non_zero(tmp_path, capsys):
    assert cli.main(["batch", str(tmp_path / "missing")]) == 2
    assert "neither a folder" in capsys.readouterr().err
    (tmp_path / "w.toml").write_text('[[devices]]\nname = "A"\nmaps = ["*.nc"]\n')
    assert cli.main(["batch", str(tmp_path / "w.toml"), "--material", "2deg"]) == 2
    assert "put analysis settings in the file" in capsys.readouterr().err
    assert cli.main(["batch", str(tmp_path / "w.toml")]) == 2
    assert "line 3: maps entry '*.nc' matches no readable map file" in capsys.readouterr().err
    assert cli.main(["batch", str(tmp_path), "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"]) == 2
    assert cli.main(["batch", str(tmp_path), "--retry-failed"]) == 2


def _worker_state(dask_worker):
    import dask
    return (dask.config.get("distributed.worker.profile.enabled"), "profile" in dask_worker.periodic_callbacks,
            os.environ.get("MALLOC_TRIM_THRESHOLD_"), dask_worker.periodic_callbacks["tick"].callback_time)


def test_local_workers_run_without_profiler_or_malloc_trimming():
    # Each slowed the fan fits (measured: profiler 15-40 %, malloc trimming 2x, a 20 ms
    # event-loop watchdog taking the interpreter lock); see _dask_client.
    with archive._dask_client(1, None) as client:
        states = list(client.run(_worker_state).values())
    assert states == [(False, False, None, 1000)]
