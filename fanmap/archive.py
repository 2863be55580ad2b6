"""Analyse an archive of maps in parallel, resumably, into one results table.

The unit of work is one map: :func:`analyse_one` reads the file, runs the
analyses its settings ask for, writes that map's own outputs and returns one
small *row* (a dict of numbers and text).  :func:`run_batch` sends paths (never
data) to dask workers, keeps a bounded number of maps in flight, records every
row as its own small JSON file the moment it arrives, and at the end assembles
the table (CSV and netCDF, one row per map, in archive order) and the summary.

Crash safety comes from the records: each is written atomically and named by
the map's content hash (sha256 of the file bytes) and the settings hash, so a
run killed at any moment and restarted with ``resume=True`` skips exactly the
maps that already have a record and produces the same table.

Output folder layout::

    OUT/results.csv, OUT/results.nc     one row per map
    OUT/summary.png, OUT/summary.pdf    lever arm and V0 per device over time
    OUT/maps/<name>/                    per-map result.json, figures, report
    OUT/records/<key>.json              one record per analysed map (for resume)
"""

import contextlib
import dataclasses
import datetime as _dt
import glob
import hashlib
import importlib
import itertools
import json
import math
import os
import re
import sys
import threading
import time
import traceback
import warnings
from pathlib import Path

import numpy as np

from . import __version__
from ._atomic import atomic_path, write_text_atomic
from ._schema import BOTTOM_GATE, FAN, FIELD, GATE, GATES, MAP_KIND, TOP_GATE
from .errors import InputError

__all__ = [
    "MAP_SUFFIXES", "TABLE_COLUMNS", "MapJob", "BatchOutcome",
    "find_map_files", "find_maps", "file_sha256", "settings_sha256", "map_settings",
    "jobs_for_paths", "analyse_one", "run_batch", "write_results_table", "read_results_table",
    "write_summary_figure",
]

#: File suffixes that the readers understand; folders are searched for these.
MAP_SUFFIXES = (".nc", ".h5", ".csv", ".tsv", ".txt", ".dat", ".npz")

#: Columns of the results table: name -> (units, long name).  Text columns have units None.
TABLE_COLUMNS = {
    "map": (None, "map name (also its folder under maps/)"),
    "path": (None, "map file"),
    "device": (None, "device"),
    "cooldown": (None, "cooldown"),
    "acquired": (None, "acquisition time (UTC, ISO 8601)"),
    "acquired_from": (None, "where the acquisition time came from"),
    "map_kind": (None, "fan or gates"),
    "status": (None, "ok or failed"),
    "error": (None, "why the map failed"),
    "warnings": (None, "analysis warnings, separated by ' | '"),
    "content_sha256": (None, "sha256 of the file bytes"),
    "settings_sha256": (None, "sha256 of the analysis settings and tool version"),
    "tool_version": (None, "fanmap version"),
    "material": (None, "material preset used"),
    "scale_from": (None, "what fixed the absolute density scale"),
    "density_per_volt": ("m-2 V-1", "lever arm alpha = dn/dVg"),
    "density_per_volt_stderr": ("m-2 V-1", "standard error of the lever arm"),
    "density_per_volt_bootstrap_stderr": ("m-2 V-1", "bootstrap standard error of the lever arm"),
    "zero_density_voltage": ("V", "gate voltage of zero density V0"),
    "zero_density_voltage_stderr": ("V", "standard error of V0"),
    "zero_density_voltage_bootstrap_stderr": ("V", "bootstrap standard error of V0"),
    "capacitance_per_area": ("F m-2", "gate capacitance per area"),
    "capacitance_per_area_stderr": ("F m-2", "standard error of the capacitance per area"),
    "density_offset": ("m-2", "density offset"),
    "degeneracy": ("1", "Landau-level degeneracy g (NaN: not determined)"),
    "berry_phase": ("pi", "Berry phase in units of pi (NaN: not determined)"),
    "states": ("1", "number of fitted fan lines"),
    "twist_angle_deg": ("degree", "moire twist angle"),
    "twist_angle_deg_stderr": ("degree", "standard error of the twist angle"),
    "cell_density": ("m-2", "moire cell density n0"),
    "cell_density_stderr": ("m-2", "standard error of n0"),
    "hall_density_per_volt": ("m-2 V-1", "lever arm from the low-field Hall slope"),
    "hall_density_per_volt_stderr": ("m-2 V-1", "standard error of the Hall lever arm"),
    "oscillation_density_per_volt": ("m-2 V-1", "lever arm from the oscillation period"),
    "oscillation_density_per_volt_stderr": ("m-2 V-1", "standard error of the oscillation lever arm"),
    "index_plot_intercept": ("1", "Landau index-plot intercept (Berry phase / 2 pi)"),
    "index_plot_intercept_stderr": ("1", "standard error of the index-plot intercept"),
    "top_capacitance": ("F m-2", "top-gate capacitance per area"),
    "top_capacitance_stderr": ("F m-2", "standard error of the top-gate capacitance"),
    "bottom_capacitance": ("F m-2", "bottom-gate capacitance per area"),
    "bottom_capacitance_stderr": ("F m-2", "standard error of the bottom-gate capacitance"),
    "capacitance_ratio": ("1", "top / bottom capacitance ratio"),
    "capacitance_ratio_stderr": ("1", "standard error of the capacitance ratio"),
    "top_offset": ("V", "top-gate offset voltage"),
    "top_offset_stderr": ("V", "standard error of the top-gate offset"),
    "bottom_offset": ("V", "bottom-gate offset voltage"),
    "bottom_offset_stderr": ("V", "standard error of the bottom-gate offset"),
    "elapsed": ("s", "analysis time of this map"),
}
_TEXT_COLUMNS = tuple(name for name, (units, _) in TABLE_COLUMNS.items() if units is None)
#: Columns that describe one particular run rather than the result (differ between runs).
RUN_COLUMNS = ("elapsed",)
#: Dataset attributes that may hold the acquisition time, in order of preference.
_TIME_ATTRS = ("start_time", "acquisition_time", "time_coverage_start", "date_created", "date", "created")


# --- finding maps ---------------------------------------------------------------

def find_map_files(folder, exclude=()):
    """Every readable map file under ``folder`` (recursively), sorted.

    Hidden files and folders (names starting with ".") and anything inside the
    folders in ``exclude`` are skipped.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> root = pathlib.Path(tempfile.mkdtemp())
    >>> for name in ("a/fan1.nc", "a/notes.md", "b/sweep.csv", ".cache/x.nc"):
    ...     (root / name).parent.mkdir(parents=True, exist_ok=True)
    ...     _ = (root / name).write_text("")
    >>> [p.relative_to(root).as_posix() for p in find_map_files(root)]
    ['a/fan1.nc', 'b/sweep.csv']
    """
    folder = Path(folder)
    excluded = [Path(e).resolve() for e in exclude]
    found = []
    for path in folder.rglob("*"):
        if any(part.startswith(".") for part in path.relative_to(folder).parts):
            continue
        if path.suffix.lower() not in MAP_SUFFIXES or not path.is_file():
            continue
        if any(path.resolve().is_relative_to(e) for e in excluded):
            continue
        found.append(path)
    return sorted(found)


def find_maps(source, exclude=()):
    """Resolve a folder, a glob or a single file into ``(root, sorted map paths)``.

    ``root`` is the folder the map names are made relative to.  Raises
    :class:`~fanmap.errors.InputError` when nothing readable is found.
    """
    source_text = str(source)
    source = Path(source).expanduser()
    if source.is_dir():
        root, maps = source, find_map_files(source, exclude)
    elif source.is_file():
        root, maps = source.parent, [source]
    elif glob.has_magic(source_text):
        excluded = [Path(e).resolve() for e in exclude]
        maps = sorted(Path(p) for p in glob.glob(source_text, recursive=True)
                      if Path(p).is_file() and Path(p).suffix.lower() in MAP_SUFFIXES
                      and not any(Path(p).resolve().is_relative_to(e) for e in excluded))
        root = Path(os.path.commonpath([str(p.parent) for p in maps])) if maps else Path(".")
    else:
        raise InputError(f"{source_text} is neither a folder, a file nor a glob that matches files; "
                         f"give an archive folder, a quoted glob such as 'data/**/*.nc', or a "
                         f"workflow .toml file")
    if not maps:
        raise InputError(f"no readable map file found in {source_text} (looked for "
                         f"{', '.join(MAP_SUFFIXES)}); check the path")
    return root, maps


# --- hashing --------------------------------------------------------------------

def file_sha256(path, chunk_size=1 << 20):
    """Hex sha256 of the bytes of ``path``, read in chunks (memory does not grow with file size).

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "x.txt"
    >>> _ = path.write_bytes(b"abc")
    >>> file_sha256(path)[:16]   # FIPS 180-2 test vector for "abc"
    'ba7816bf8f01cfea'
    """
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk_size), b""):
            digest.update(block)
    return digest.hexdigest()


def settings_sha256(settings):
    """Hex sha256 of the analysis part of ``settings`` and the fanmap version.

    Labels (device, cooldown) and output choices do not change any number, so
    they are left out: relabelling an archive does not force a re-analysis.
    """
    canonical = json.dumps({"analysis": settings["analysis"], "version": __version__},
                           sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode()).hexdigest()


# --- settings and jobs -----------------------------------------------------------

_DIELECTRICS = ("dielectric", "top_dielectric", "bottom_dielectric")
_RANGES = ("gate_range", "field_range", "gate_limits", "top_gate_limits", "bottom_gate_limits")


def map_settings(*, material="auto", reading=None, analyses=None, device=None, cooldown=None,
                 figures=True, **options):
    """The settings dict :func:`analyse_one` takes (all SI).

    Parameters
    ----------
    material : str
        Material preset name (``fanmap.materials.MATERIAL_NAMES``).
    reading : dict, optional
        Keyword arguments for ``fanmap.reading.open_map`` (channels, units, ...).
    analyses : dict, optional
        ``{"fan": bool, "gates": bool, "crosschecks": bool}``; all on by default.
    device, cooldown : str, optional
        Labels for the table and the summary.
    figures : bool
        Write per-map figures and report page (result JSON is always written).
    **options
        ``dielectric`` (fan maps), ``top_dielectric``, ``bottom_dielectric`` (gate maps):
        ``{"thickness": m, "permittivity": relative}`` priors.
        ``gate_range`` (V) and ``field_range`` (T): ``(low, high)``, analyse only this
        part of a fan map.  ``gate_limits`` (fan maps), ``top_gate_limits``,
        ``bottom_gate_limits`` (gate maps): the device's allowed sweep (V); maps that go
        beyond are flagged and gate maps get the dielectric-field check.

    Examples
    --------
    >>> s = map_settings(material="2deg", gate_range=(-1, 0.5))
    >>> s["analysis"]["gate_range"], s["analysis"]["analyses"]["fan"]
    ([-1.0, 0.5], True)
    """
    unknown = set(options) - set(_DIELECTRICS) - set(_RANGES)
    if unknown:
        raise TypeError(f"map_settings() got unknown settings {sorted(unknown)}")
    chosen = {"fan": True, "gates": True, "crosschecks": True}
    chosen.update(analyses or {})
    analysis = {"material": material, "reading": dict(reading or {}), "analyses": chosen}
    for name in _DIELECTRICS:
        value = options.get(name)
        analysis[name] = {"thickness": float(value["thickness"]),
                          "permittivity": float(value["permittivity"])} if value else None
    for name in _RANGES:
        value = options.get(name)
        analysis[name] = [float(v) for v in value] if value is not None else None
    return {
        "analysis": analysis,
        "labels": {"device": device, "cooldown": cooldown},
        "outputs": {"figures": bool(figures), "map_dir": None},
    }


@dataclasses.dataclass
class MapJob:
    """One map of a batch: its file, its name (folder under ``maps/``) and its settings."""

    path: Path
    name: str
    settings: dict


def _map_name(path, root):
    rel = os.path.relpath(Path(path).resolve(), Path(root).resolve())
    rel = rel.replace("..", "up").replace(os.sep, "__").replace("/", "__")
    return re.sub(r"[^A-Za-z0-9._+-]", "_", rel)


def jobs_for_paths(paths, root, settings):
    """One :class:`MapJob` per path, named after the path relative to ``root``."""
    return [MapJob(Path(p), _map_name(p, root), settings) for p in paths]


# --- the per-map task -------------------------------------------------------------

def _empty_row():
    return {name: ("" if name in _TEXT_COLUMNS else math.nan) for name in TABLE_COLUMNS}


def _number(value):
    if value is None:
        return math.nan
    try:
        value = float(value)
    except (TypeError, ValueError):
        return math.nan
    return value


def _acquisition_time(ds, path):
    for name in _TIME_ATTRS:
        value = ds.attrs.get(name) if ds is not None else None
        if value is not None and str(value).strip():
            return str(value), f"file attribute {name!r}"
    stamp = _dt.datetime.fromtimestamp(os.stat(path).st_mtime, tz=_dt.timezone.utc)
    return stamp.isoformat(timespec="seconds"), "file modification time"


def _crop(ds, dim, limits, what):
    values = ds[dim].values
    keep = (values >= limits[0]) & (values <= limits[1])
    if keep.sum() < 2:
        raise InputError(
            f"{what} [{limits[0]:g}, {limits[1]:g}] leaves fewer than two points of {dim!r} "
            f"(the map spans {np.nanmin(values):g} to {np.nanmax(values):g}); widen it")
    return ds.isel({dim: np.flatnonzero(keep)})


def _beyond_limits(ds, dim, limits, name):
    """A warning when the map's ``dim`` axis goes beyond the device's allowed sweep."""
    if limits is None or dim not in ds.coords:
        return []
    low, high = float(np.nanmin(ds[dim].values)), float(np.nanmax(ds[dim].values))
    if low >= limits[0] and high <= limits[1]:
        return []
    return [f"the map's {dim.replace('_', ' ')} axis spans {low:g} to {high:g} V, beyond the device's "
            f"{name} [{limits[0]:g}, {limits[1]:g}] V; check the measurement log (fanmap sets no "
            f"limit: your lab's rules and its safety officer do)"]


def _fan_columns(result, checks):
    row = {name: _number(getattr(result, name, None)) for name in (
        "density_per_volt", "density_per_volt_stderr", "density_per_volt_bootstrap_stderr",
        "zero_density_voltage", "zero_density_voltage_stderr", "zero_density_voltage_bootstrap_stderr",
        "capacitance_per_area", "capacitance_per_area_stderr", "density_offset",
        "degeneracy", "berry_phase")}
    row["states"] = float(len(result.states))
    row["scale_from"] = result.scale_from or ""
    row["material"] = result.material or ""
    lattice = result.superlattice or {}
    for name in ("twist_angle_deg", "cell_density"):
        row[name] = _number(lattice.get(name))
        row[f"{name}_stderr"] = _number(lattice.get(f"{name}_stderr"))
    for name in ("hall_density_per_volt", "oscillation_density_per_volt", "index_plot_intercept"):
        row[name] = _number((checks or {}).get(name))
        row[f"{name}_stderr"] = _number((checks or {}).get(f"{name}_stderr"))
    return row


def _gate_columns(result):
    row = {name: _number(getattr(result, name)) for name in (
        "top_capacitance", "top_capacitance_stderr", "bottom_capacitance", "bottom_capacitance_stderr",
        "capacitance_ratio", "capacitance_ratio_stderr", "top_offset", "top_offset_stderr",
        "bottom_offset", "bottom_offset_stderr", "degeneracy")}
    row["scale_from"] = result.scale_from or ""
    row["material"] = result.material or ""
    return row


def _analyse_fan(ds, analysis, map_dir, figures):
    from .fanfit import fit_fan

    options = analysis["analyses"]
    if not options["fan"]:
        raise InputError("not analysed: this is a fan map and the fan analysis is switched off")
    flagged = _beyond_limits(ds, GATE, analysis["gate_limits"], "gate_limits")
    if analysis["gate_range"] is not None:
        ds = _crop(ds, GATE, analysis["gate_range"], "gate_range")
    if analysis["field_range"] is not None:
        ds = _crop(ds, FIELD, analysis["field_range"], "field_range")
    prior = analysis["dielectric"]
    result = fit_fan(ds, material=analysis["material"],
                     dielectric=(prior["thickness"], prior["permittivity"]) if prior else None)
    result.warnings.extend(flagged)
    checks = None
    if options["crosschecks"]:
        from .crosscheck import run_crosschecks
        checks = run_crosschecks(ds, result)
        if result.crosschecks is None:
            result.crosschecks = checks
    if map_dir is not None:
        _write_map_outputs(map_dir, result, figures, lambda: _fan_report(map_dir, ds, result))
    return _fan_columns(result, checks), result.warnings


def _fan_report(map_dir, ds, result):
    from .report import write_fan_outputs
    write_fan_outputs(map_dir, ds, result)


def _analyse_gates(ds, analysis, map_dir, figures):
    from .gatemap import HBN_PERMITTIVITY, fit_gates, to_density_displacement

    if not analysis["analyses"]["gates"]:
        raise InputError("not analysed: this is a gate map and the gate analysis is switched off")
    priors = [analysis["top_dielectric"], analysis["bottom_dielectric"]]
    limits = [analysis["top_gate_limits"], analysis["bottom_gate_limits"]]
    flagged = (_beyond_limits(ds, TOP_GATE, limits[0], "top_gate_limits")
               + _beyond_limits(ds, BOTTOM_GATE, limits[1], "bottom_gate_limits"))
    result = fit_gates(
        [ds], material=analysis["material"],
        thickness=tuple(p["thickness"] if p else None for p in priors),
        permittivity=tuple(p["permittivity"] if p else HBN_PERMITTIVITY for p in priors),
        gate_limits=tuple(limits) if all(limits) else None)
    result.warnings.extend(flagged)

    def report():
        from .report import write_gate_outputs
        calibrated = all(math.isfinite(_number(getattr(result, name))) for name in (
            "top_capacitance", "bottom_capacitance", "top_offset", "bottom_offset"))
        # The (n, D) map needs absolute capacitances; a zero-field map alone gives their ratio.
        write_gate_outputs(map_dir, [ds], result, to_density_displacement(ds, result) if calibrated else None)

    if map_dir is not None:
        _write_map_outputs(map_dir, result, figures, report)
    return _gate_columns(result), result.warnings


def _write_map_outputs(map_dir, result, figures, report):
    """Figures, report page and result JSON.

    A figure that cannot be drawn does not undo a good fit: the map keeps its
    numbers, gets a warning, and its result JSON is written alone.
    """
    from .report import RESULT_NAME
    from .results import dumps

    if figures:
        try:
            report()       # writes result.json too
            return
        except Exception as exc:
            result.warnings.append(f"figures and report page not written: {_describe_error(exc)}")
    write_text_atomic(Path(map_dir) / RESULT_NAME, dumps(result))


def analyse_one(path, settings):
    """Analyse one map file and return its row of the results table.

    Never raises for a bad map: any error (unreadable or empty file, no fan,
    a failed fit) gives a row with ``status = "failed"`` and the error text.
    The map's own outputs (``result.json``; figures and report page when
    ``settings["outputs"]["figures"]``) go to ``settings["outputs"]["map_dir"]``
    when that is set.

    Parameters
    ----------
    path : str or Path
        The map file; the caller sends the path, the worker reads the file.
    settings : dict
        As made by :func:`map_settings`.

    Returns
    -------
    dict
        One value per column of :data:`TABLE_COLUMNS` (NaN / "" where not applicable).
    """
    from .reading import open_map

    start = time.perf_counter()
    path = Path(path)
    analysis, outputs, labels = settings["analysis"], settings["outputs"], settings["labels"]
    row = _empty_row()
    row.update(path=str(path), device=labels.get("device") or "", cooldown=labels.get("cooldown") or "",
               settings_sha256=settings_sha256(settings), tool_version=__version__,
               material=analysis["material"], status="failed")
    ds = None
    try:
        row["content_sha256"] = file_sha256(path)
        ds = open_map(path, **analysis["reading"])
        kind = ds.attrs.get(MAP_KIND, "")
        row["map_kind"] = kind
        map_dir = outputs.get("map_dir")
        if kind == FAN:
            columns, warnings = _analyse_fan(ds, analysis, map_dir, outputs["figures"])
        elif kind == GATES:
            columns, warnings = _analyse_gates(ds, analysis, map_dir, outputs["figures"])
        else:
            raise InputError(f"{path}: map kind {kind!r} is neither {FAN!r} nor {GATES!r}")
        row.update(columns)
        row["warnings"] = " | ".join(str(w) for w in warnings)
        row["status"] = "ok"
    except Exception as exc:  # one bad map must never stop the batch
        row["error"] = _describe_error(exc)
    with contextlib.suppress(OSError):
        row["acquired"], row["acquired_from"] = _acquisition_time(ds, path)
    row["elapsed"] = time.perf_counter() - start
    return row


def _describe_error(exc):
    from .errors import FanmapError

    text = str(exc).strip() or "no message"
    if isinstance(exc, FanmapError):
        return text
    # Not one of our deliberate errors: keep the type and where it came from, for a bug report.
    frame = traceback.extract_tb(exc.__traceback__)[-1] if exc.__traceback__ else None
    where = f" (at {Path(frame.filename).name}:{frame.lineno})" if frame else ""
    return f"{type(exc).__name__}: {text}{where}"


# --- records (one small JSON file per analysed map) -------------------------------

def _record_key(content_sha, settings_sha):
    return f"{content_sha[:24]}-{settings_sha[:16]}"


def _record_path(out_dir, key):
    return Path(out_dir) / "records" / f"{key}.json"


def _write_record(out_dir, key, row, retry=False):
    record = {"row": row, "retry": retry}
    write_text_atomic(_record_path(out_dir, key), json.dumps(record, allow_nan=True, sort_keys=True) + "\n")


def _read_record(out_dir, key):
    path = _record_path(out_dir, key)
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        return None
    except (OSError, ValueError):  # cannot happen with atomic writes, but never trust a disk
        return None


# --- progress ---------------------------------------------------------------------

class _Progress:
    """One line of progress on a terminal (rewritten in place), periodic lines otherwise."""

    def __init__(self, total, stream, interval=None):
        self.total, self.stream = total, stream
        self.done = self.failed = self.resumed = 0
        self.start = time.perf_counter()
        self.tty = bool(getattr(stream, "isatty", lambda: False)())
        self.interval = interval if interval is not None else (0.5 if self.tty else 10.0)
        self.last = -math.inf

    def count(self, row, resumed=False):
        if resumed:
            self.resumed += 1
        else:
            self.done += 1
        if row["status"] != "ok":
            self.failed += 1
        self.show()

    def line(self):
        finished = self.done + self.resumed
        remaining = self.total - finished
        elapsed = time.perf_counter() - self.start
        rate = self.done / elapsed if elapsed > 0 else 0.0
        eta = _duration(remaining / rate) if rate > 0 else "?"
        resumed = f", {self.resumed} from earlier runs" if self.resumed else ""
        return (f"maps: {finished}/{self.total} done ({self.failed} failed{resumed}), "
                f"{remaining} remaining, {rate:.2f} maps/s, ETA {eta}")

    def show(self, final=False):
        now = time.perf_counter()
        if self.stream is None or (not final and now - self.last < self.interval):
            return
        self.last = now
        if self.tty:
            end = "\n" if final else ""
            self.stream.write(f"\r\x1b[K{self.line()}{end}")
        else:
            self.stream.write(self.line() + "\n")
        self.stream.flush()

    def say(self, text):
        if self.stream is not None:
            self.stream.write(("\r\x1b[K" if self.tty else "") + text + "\n")
            self.stream.flush()


def _duration(seconds):
    seconds = int(round(seconds))
    hours, rest = divmod(seconds, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}h{minutes:02d}m" if hours else (f"{minutes}m{secs:02d}s" if minutes else f"{secs}s")


# --- running a batch --------------------------------------------------------------

@dataclasses.dataclass
class BatchOutcome:
    """What :func:`run_batch` did and wrote."""

    out_dir: Path
    maps: int
    analysed: int
    resumed: int
    failed: int
    outputs: dict
    elapsed: float
    #: seconds spent on "analysis" (cluster start and every map) and "outputs" (table, summary)
    timings: dict = dataclasses.field(default_factory=dict)


def default_workers():
    """Number of worker processes for a local cluster: the cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


@contextlib.contextmanager
def _dask_client(workers, scheduler):
    import logging

    import dask
    from distributed import Client, LocalCluster

    if scheduler:
        try:
            client = Client(scheduler, timeout="20s", set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot connect to the dask scheduler at {scheduler}: {exc}; "
                             f"check the address (tcp://HOST:PORT) and that the scheduler runs") from None
        try:
            try:
                client.wait_for_workers(1, timeout=60)
            except TimeoutError:
                raise InputError(f"the dask scheduler at {scheduler} has had no worker for 60 s; "
                                 f"start workers (dask worker {scheduler}) and run again") from None
            yield client
        finally:
            client.close()
        return
    # dask sets MALLOC_TRIM_THRESHOLD_=65536 in its workers, which turns off glibc's adaptive
    # mmap threshold: every large numpy array is then mapped and unmapped afresh.  Ten
    # 500 x 250 fan fits took 4.0 s with it and 2.0 s without (one process, measured).
    # Each worker holds one map at a time, so memory stays bounded without it.
    # The worker's statistical profiler samples the running task's stack every 10 ms,
    # holding the interpreter lock; it made each fan fit 15-40 % slower (measured).  The
    # event-loop watchdog (20 ms) and the load and memory monitors (0.5 s, 0.1 s) woke a
    # worker's event loop ~1800 times a second, each time taking the interpreter lock from
    # the fit; at 1-2 s they wake it ~40 times (measured), and a worker still holds only
    # one map at a time.
    with warnings.catch_warnings(), dask.config.set(
            {"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
             "distributed.worker.profile.enabled": False,
             "distributed.admin.tick.interval": "1s",
             "distributed.admin.system-monitor.interval": "2s",
             "distributed.worker.memory.monitor-interval": "2s"}):
        # "port 8787 is in use, using another": the address actually used is printed anyway.
        warnings.filterwarnings("ignore", message="Port .* is already in use")
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               dashboard_address=":8787", silence_logs=logging.ERROR)
    # Not the client's own context manager: that must be left in the thread that entered
    # it, and the run closes the cluster in the background while it writes the table.
    try:
        client = Client(cluster, set_as_default=False)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


def _dashboard(client, local):
    """The dashboard address, or None when no dashboard is served (it needs bokeh)."""
    import importlib.util

    if local and importlib.util.find_spec("bokeh") is None:
        return None
    return client.dashboard_link if "dashboard" in client.scheduler_info().get("services", {}) else None


def run_batch(jobs, out_dir, *, workers=None, scheduler=None, resume=False, retry_failed=False,
              max_in_flight=None, summary=True, title="fanmap batch", stream=sys.stderr):
    """Analyse every job, record each row, then write the table and the summary.

    Parameters
    ----------
    jobs : list of MapJob
    out_dir : Path
        Output folder (see the module docstring for its layout).
    workers : int, optional
        Worker processes of the local dask cluster (default: the cores available);
        0 runs every map in this process, one after the other, without dask.
    scheduler : str, optional
        Address of a running dask scheduler (``tcp://host:8786``); its workers must
        see the map files and ``out_dir`` under the same paths, and run fastest with
        ``DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED=False`` in their environment
        (local workers have dask's statistical profiler turned off).
    resume : bool
        Skip maps whose content hash and settings already have a record in ``out_dir``.
    retry_failed : bool
        With ``resume``, analyse failed maps again instead of keeping their failure.
    max_in_flight : int, optional
        Maps submitted but not yet returned (default: twice the worker threads);
        this bounds memory however large the archive.
    summary : bool
        Write the summary figure.
    stream : file, optional
        Where progress goes (None: silent).

    Returns
    -------
    BatchOutcome
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    with _exclusive(out_dir):
        _remove_unfinished_writes(out_dir)
        return _run_batch(jobs, out_dir, workers, scheduler, resume, retry_failed, max_in_flight,
                          summary, title, stream)


@contextlib.contextmanager
def _exclusive(out_dir):
    """Hold a lock on ``out_dir`` for the run; the system drops it when the process dies."""
    import fcntl

    with open(out_dir / ".lock", "a+") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise InputError(f"another fanmap batch is writing to {out_dir}; wait for it to finish "
                             f"or choose another --out") from None
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def _remove_unfinished_writes(out_dir):
    """Delete the temporary files of writes a killed run left behind (never complete outputs)."""
    patterns = ["records/.*", "maps/*/.*"] + [f".{name}.*" for name in (
        "results.csv", "results.nc", "summary.png", "summary.pdf", "index.html",
        "batch_summary.png", "batch_summary.pdf")]
    for pattern in patterns:
        for path in out_dir.glob(pattern):
            if path.is_file():
                path.unlink(missing_ok=True)


def _run_batch(jobs, out_dir, workers, scheduler, resume, retry_failed, max_in_flight, summary, title,
               stream):
    started = time.perf_counter()
    progress = _Progress(len(jobs), stream)
    keys = {}            # job index -> record key, for assembling the table

    def todo():
        for index, job in enumerate(jobs):
            if resume:
                try:
                    key = _record_key(file_sha256(job.path), settings_sha256(job.settings))
                except OSError:      # gone or unreadable now: analyse_one reports it in the row
                    key = None
                record = _read_record(out_dir, key) if key else None
                if record is not None and not record["retry"] and (
                        record["row"]["status"] == "ok" or not retry_failed):
                    keys[index] = key
                    progress.count(record["row"], resumed=True)
                    continue
            # Absolute paths: workers of an external scheduler may run in another folder.
            map_dir = str((out_dir / "maps" / job.name).resolve())
            settings = dict(job.settings, outputs=dict(job.settings["outputs"], map_dir=map_dir))
            yield index, job, settings

    def finish(index, row, retry=False):
        key = _record_key(row["content_sha256"] or hashlib.sha256(row["path"].encode()).hexdigest(),
                          row["settings_sha256"])
        _write_record(out_dir, key, row, retry=retry)
        keys[index] = key
        progress.count(row)

    work = todo()
    first = next(work, None)          # start no cluster when every map is already done
    work = itertools.chain([first], work) if first is not None else iter(())
    with contextlib.ExitStack() as cluster:
        warmed = None
        if workers == 0 and not scheduler:
            for index, job, settings in work:
                finish(index, analyse_one(job.path, settings))
        elif first is not None:
            client = cluster.enter_context(_dask_client(workers or default_workers(), scheduler))
            if summary:   # this process is idle while the workers run
                warmed = _in_background(lambda: importlib.import_module(".report", __package__))
            link = _dashboard(client, local=not scheduler)
            threads = sum(client.nthreads().values()) or 1
            progress.say(f"dask: {len(client.nthreads())} workers, {threads} threads"
                         + (f"; dashboard {link}" if link else
                            "; no dashboard (install it with: pip install 'fanmap[dashboard]')"))
            _run_distributed(client, work, finish, max_in_flight or 2 * threads)
        progress.show(final=True)
        analysed_at = time.perf_counter()
        # Every row is recorded: the cluster shuts down (most of a second) while the
        # table and summary are written.
        closed = _in_background(cluster.pop_all().close)
        try:
            if warmed is not None:
                warmed()
            rows = _assemble(jobs, keys, out_dir)
            written = write_results_table(rows, out_dir)
            if summary:
                written.update(write_summary_figure(rows, out_dir / "summary.png", title=title))
                try:
                    written["index"] = _write_index(rows, out_dir, written["summary_png"])
                except Exception as exc:  # the table and summary are written; say what is missing
                    progress.say(f"warning: the HTML index was not written ({_describe_error(exc)}); "
                                 f"the results table and summary figure are complete")
        finally:
            closed()
    finished = time.perf_counter()
    return BatchOutcome(out_dir=out_dir, maps=len(jobs), analysed=progress.done, resumed=progress.resumed,
                        failed=sum(r["status"] != "ok" for r in rows), outputs=written,
                        elapsed=finished - started,
                        timings={"analysis": analysed_at - started, "outputs": finished - analysed_at})


def _in_background(function):
    """Run ``function`` in a thread; return a callable that waits for it and raises its error."""
    failure = []

    def run():
        try:
            function()
        except BaseException as exc:  # handed to whoever waits
            failure.append(exc)

    thread = threading.Thread(target=run, name="fanmap-background", daemon=True)
    thread.start()

    def wait():
        thread.join()
        if failure:
            raise failure[0]
    return wait


def _run_distributed(client, todo, finish, max_in_flight):
    import uuid

    from distributed import as_completed

    run = uuid.uuid4().hex[:8]

    pending = {}
    running = as_completed(loop=client.loop)

    def submit_next():
        for index, job, settings in todo:
            future = client.submit(analyse_one, str(Path(job.path).resolve()), settings,
                                   key=f"fanmap-{run}-{index}-{job.name[:40]}", retries=0)
            pending[future.key] = (index, job, settings)
            running.add(future)
            return True
        return False

    while len(pending) < max_in_flight and submit_next():
        pass
    for future in running:
        index, job, settings = pending.pop(future.key)
        try:
            row, retry = future.result(), False
        except Exception as exc:  # the worker died or the task was lost: not the map's fault
            row, retry = _lost_row(job, settings, exc), True
        future.release()
        finish(index, row, retry=retry)
        while len(pending) < max_in_flight and submit_next():
            pass


def _lost_row(job, settings, exc):
    row = _empty_row()
    row.update(path=str(job.path), status="failed", settings_sha256=settings_sha256(settings),
               tool_version=__version__, material=settings["analysis"]["material"],
               device=settings["labels"].get("device") or "", cooldown=settings["labels"].get("cooldown") or "",
               error=f"the dask worker analysing this map was lost ({type(exc).__name__}: {exc}); "
                     f"run again with --resume to retry it")
    with contextlib.suppress(OSError):
        row["content_sha256"] = file_sha256(job.path)
        row["acquired"], row["acquired_from"] = _acquisition_time(None, job.path)
    return row


def _assemble(jobs, keys, out_dir):
    """Table rows in archive order, each from its record, with the current path and labels."""
    rows = []
    for index, job in enumerate(jobs):
        record = _read_record(out_dir, keys[index]) if index in keys else None
        if record is None:
            raise RuntimeError(f"no record for {job.path}; the batch lost it")
        row = dict(_empty_row(), **record["row"])
        labels = job.settings["labels"]
        row.update(map=job.name, path=str(job.path), device=labels.get("device") or "",
                   cooldown=labels.get("cooldown") or "")
        rows.append(row)
    return rows


#: Columns shown in the HTML index (the full table is in results.csv / results.nc).
_INDEX_COLUMNS = ("device", "cooldown", "map", "status", "acquired", "material", "density_per_volt",
                  "density_per_volt_stderr", "zero_density_voltage", "zero_density_voltage_stderr",
                  "top_capacitance", "bottom_capacitance", "error")


def _write_index(rows, out_dir, summary):
    """The HTML index of the batch, showing the summary figure and linking each map's report page."""
    from .report import REPORT_NAME, write_batch_report

    pages = {row["map"]: out_dir / "maps" / row["map"] / REPORT_NAME for row in rows
             if row["status"] == "ok" and (out_dir / "maps" / row["map"] / REPORT_NAME).is_file()}
    return write_batch_report(out_dir, [{k: row[k] for k in _INDEX_COLUMNS} for row in rows], pages,
                              summary=summary)


# --- the table ----------------------------------------------------------------------

def _csv_text(value):
    if isinstance(value, float):
        return "" if math.isnan(value) else repr(value)
    return str(value)


def write_results_table(rows, out_dir):
    """Write ``results.csv`` and ``results.nc`` (dimension ``map``) atomically; return their paths."""
    import csv
    import io

    import xarray as xr

    out_dir = Path(out_dir)
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(TABLE_COLUMNS)
    for row in rows:
        writer.writerow([_csv_text(row[name]) for name in TABLE_COLUMNS])
    csv_path = out_dir / "results.csv"
    write_text_atomic(csv_path, buffer.getvalue())

    variables = {}
    for name, (units, long_name) in TABLE_COLUMNS.items():
        if units is None:
            values = np.array([str(row[name]) for row in rows], dtype=object)
            variables[name] = ("map", values, {"long_name": long_name})
        else:
            values = np.array([_number(row[name]) for row in rows], dtype=float)
            variables[name] = ("map", values, {"long_name": long_name, "units": units})
    table = xr.Dataset(variables, attrs={"title": "fanmap results table", "tool_version": __version__,
                                         "Conventions": "CF-1.8"})
    nc_path = out_dir / "results.nc"
    with atomic_path(nc_path) as tmp:
        table.to_netcdf(tmp, engine="netcdf4")
    return {"table_csv": csv_path, "table_netcdf": nc_path}


def read_results_table(path):
    """Read a results table written by :func:`write_results_table` (``.csv`` or ``.nc``) as row dicts."""
    import csv

    path = Path(path)
    if path.suffix == ".nc":
        import xarray as xr
        with xr.open_dataset(path, engine="netcdf4") as table:
            return [{name: (str(table[name].values[i]) if TABLE_COLUMNS[name][0] is None
                            else float(table[name].values[i])) for name in TABLE_COLUMNS}
                    for i in range(table.sizes["map"])]
    with open(path, newline="") as fh:
        return [{name: (value if TABLE_COLUMNS[name][0] is None else (float(value) if value else math.nan))
                 for name, value in row.items()} for row in csv.DictReader(fh)]


# --- the summary figure ---------------------------------------------------------------

def _parse_time(text):
    with contextlib.suppress(ValueError, TypeError):
        stamp = _dt.datetime.fromisoformat(str(text).replace("Z", "+00:00"))
        return stamp if stamp.tzinfo else stamp.replace(tzinfo=_dt.timezone.utc)
    return None


#: Devices drawn in the summary figure (all of them are in the table).
SUMMARY_DEVICES = 12


def write_summary_figure(rows, target, title="fanmap batch"):
    """Lever arm and V0 of every successful fan map against acquisition time, per device.

    One row of panels per device (each with its own scale: devices differ by
    orders of magnitude), lever arm on the left and V0 on the right, one
    marker and colour per cooldown, error bars of one standard error.
    Written as PNG and PDF (atomically).  Returns ``{"summary_png": path,
    "summary_pdf": path}``.
    """
    from matplotlib import rc_context
    from matplotlib.figure import Figure

    from . import _style

    target = Path(target)
    fans = [r for r in rows if r["status"] == "ok" and r["map_kind"] == FAN
            and math.isfinite(_number(r["density_per_volt"])) and _parse_time(r["acquired"])]
    devices = sorted({r["device"] or "(no device)" for r in fans})
    shown = devices[:SUMMARY_DEVICES] or ["(none)"]
    with rc_context(_style.rc_params()):
        figure = Figure(figsize=(8.5, 1.3 + 2.1 * len(shown)), layout="constrained")
        axes = figure.subplots(len(shown), 2, sharex=True, squeeze=False)
        cooldowns = sorted({r["cooldown"] or "" for r in fans})
        for row_axes, device in zip(axes, shown):
            _draw_device(row_axes, [r for r in fans if (r["device"] or "(no device)") == device],
                         cooldowns, device)
        failed = sum(r["status"] != "ok" for r in rows)
        more = f"; first {SUMMARY_DEVICES} of {len(devices)} devices shown" if len(devices) > len(shown) else ""
        figure.suptitle(f"{title}\n{len(fans)} fan maps with a fit, {failed} of {len(rows)} maps failed{more}")
        for ax in axes[-1]:
            ax.set_xlabel("acquisition time (UTC)")
            for label in ax.get_xticklabels():
                label.set_rotation(30)
                label.set_horizontalalignment("right")
        if not fans:
            axes[0][0].text(0.5, 0.5, "no fan map with a fit and an acquisition time", ha="center",
                            va="center", transform=axes[0][0].transAxes)
        written = {}
        for suffix in (".png", ".pdf"):
            path = target.with_suffix(suffix)
            with atomic_path(path) as tmp:
                figure.savefig(tmp)
            written[f"summary_{suffix[1:]}"] = path
    return written


def _draw_device(row_axes, device_rows, cooldowns, device):
    from . import _style

    alpha_ax, v0_ax = row_axes
    for c_index, cooldown in enumerate(cooldowns):
        points = sorted(((_parse_time(r["acquired"]), r) for r in device_rows if (r["cooldown"] or "") == cooldown),
                        key=lambda item: item[0])
        if not points:
            continue
        style = dict(_style.SERIES_STYLES[c_index % len(_style.SERIES_STYLES)], capsize=2, linestyle="-",
                     linewidth=0.8, markersize=4, label=cooldown or "(no cooldown)")
        times = [t for t, _ in points]
        # 1e14 m^-2 V^-1 is numerically 1e10 cm^-2 V^-1, the unit most lab notebooks use.
        alpha_ax.errorbar(times, [_number(r["density_per_volt"]) / 1e14 for _, r in points],
                          yerr=[_zero_nan(_number(r["density_per_volt_stderr"])) / 1e14 for _, r in points],
                          **style)
        v0_ax.errorbar(times, [_number(r["zero_density_voltage"]) for _, r in points],
                       yerr=[_zero_nan(_number(r["zero_density_voltage_stderr"])) for _, r in points],
                       **style)
    alpha_ax.set_ylabel(f"{device}\nα (10¹⁴ m⁻² V⁻¹)")
    v0_ax.set_ylabel("V₀ (V)")
    for ax in row_axes:
        ax.grid(color="#e3e3e3", linewidth=0.6)
        ax.margins(x=0.08, y=0.25)
    if device_rows:
        v0_ax.legend(title="cooldown", loc="best")


def _zero_nan(value):
    return 0.0 if not math.isfinite(value) else value
