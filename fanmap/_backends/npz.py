"""NumPy ``.npz`` archives of named arrays, with units from a JSON sidecar or a ``units`` array.

Units can come from (first match wins):

* a JSON sidecar ``NAME.json`` or ``NAME.npz.json`` beside the file:
  ``{"units": {"B": "T", "Vg": "mV"}, "long_names": {...}, "dims": {"R": ["B", "Vg"]},
  "attrs": {"excitation_current": "10 nA"}}``; a flat ``{"B": "T", ...}`` also works;
* an array ``units`` of ``"name=unit"`` (or ``"name: unit"``) strings, a
  ``(n, 2)`` array of names and units, or a plain list of units in the order
  the other arrays were saved;
* scalar string arrays ``<name>_units``.

Two-dimensional arrays are matched to the one-dimensional axis arrays by
length (``dims`` in the sidecar settles square maps); if every array is 1-D
and of one length the archive is read as long format along ``point``.
"""

import json
import zipfile
from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError


def _sidecar(path):
    path = Path(path)
    for candidate in (path.with_suffix(".json"), path.with_name(path.name + ".json")):
        if candidate.is_file():
            try:
                meta = json.loads(candidate.read_text(encoding="utf-8"))
            except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
                raise InputError(f"{candidate}: the units sidecar is not valid JSON ({exc})") from None
            if not isinstance(meta, dict):
                raise InputError(f"{candidate}: the units sidecar must be a JSON object")
            return candidate, meta
    return None, {}


def _units_from_array(arr, names, path):
    arr = np.asarray(arr)
    if arr.dtype.kind not in "US":
        raise InputError(f"{path}: the 'units' array must hold strings, not {arr.dtype}")
    if arr.ndim == 2 and arr.shape[1] == 2:
        return {str(n): str(u) for n, u in arr}
    flat = [str(u) for u in arr.ravel()]
    if flat and all(("=" in u or ":" in u) for u in flat):
        out = {}
        for entry in flat:
            name, _, unit = entry.partition("=") if "=" in entry else entry.partition(":")
            out[name.strip()] = unit.strip()
        return out
    if len(flat) == len(names):
        return dict(zip(names, flat))
    raise InputError(f"{path}: the 'units' array has {len(flat)} entries for {len(names)} arrays "
                     f"({', '.join(names)}); write it as 'name=unit' strings")


def read_npz(path):
    """Read an ``.npz`` archive into a raw dataset; returns ``(dataset, notes)``."""
    try:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {name: np.asarray(archive[name]) for name in archive.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError, RuntimeError) as exc:
        raise InputError(f"{path}: not a readable .npz archive (corrupt or truncated?): "
                         f"{type(exc).__name__}: {str(exc)[:120]}") from None
    except Exception as exc:  # noqa: BLE001 - zip/zlib failures have many types
        raise InputError(f"{path}: not a readable .npz archive: {type(exc).__name__}: "
                         f"{str(exc)[:120]}") from None
    notes = []
    sidecar, meta = _sidecar(path)
    units = meta.get("units", None)
    if units is None and meta and all(isinstance(v, str) for v in meta.values()):
        units = dict(meta)
    units = dict(units or {})
    long_names = dict(meta.get("long_names", {}) or {})
    dims_hint = dict(meta.get("dims", {}) or {})
    attrs = dict(meta.get("attrs", {}) or {})
    if sidecar is not None:
        notes.append(f"units from sidecar {sidecar.name}")

    data = {}
    for name, arr in arrays.items():
        if name.endswith("_units") and arr.dtype.kind in "US" and arr.ndim == 0:
            units.setdefault(name[: -len("_units")], str(arr))
        elif arr.dtype.kind in "US" and name != "units":
            if arr.ndim == 0:
                attrs.setdefault(name, str(arr))
        elif name != "units":
            if arr.dtype.kind not in "biuf":
                raise InputError(f"{path}: array {name!r} has dtype {arr.dtype}; numeric arrays expected")
            data[name] = arr.astype(float)
    if "units" in arrays and not sidecar:
        units.update(_units_from_array(arrays["units"], list(data), path))
        notes.append("units from the 'units' array")
    if not data:
        raise InputError(f"{path}: the archive holds no numeric arrays")

    ds = xr.Dataset(attrs={k: v for k, v in attrs.items() if isinstance(v, (str, int, float))})
    scalars = {n: a for n, a in data.items() if a.ndim == 0}
    vectors = {n: a for n, a in data.items() if a.ndim == 1}
    grids = {n: a for n, a in data.items() if a.ndim >= 2}
    for name, arr in scalars.items():
        ds[name] = ((), arr)
    if grids:
        for name, arr in grids.items():
            dims = dims_hint.get(name)
            if dims is not None:
                if len(dims) != arr.ndim:
                    raise InputError(f"{path}: sidecar dims for {name!r} has {len(dims)} names for a "
                                     f"{arr.ndim}-D array")
                ds[name] = (tuple(dims), arr)
                continue
            dims = []
            for axis, size in enumerate(arr.shape):
                matches = [n for n, v in vectors.items() if v.size == size and n not in dims]
                if not matches:
                    dims.append(f"axis{axis}_{name}")
                else:
                    dims.append(matches[0])
                    if len(matches) > 1:
                        notes.append(f"axis {axis} of {name!r} could be any of {', '.join(matches)}; "
                                     f"took {matches[0]!r} (set 'dims' in a JSON sidecar to choose)")
            ds[name] = (tuple(dims), arr)
        for name, arr in vectors.items():
            if name in ds.dims:
                ds = ds.assign_coords({name: (name, arr)})
            else:
                ds[name] = (f"length_{arr.size}_{name}", arr)
    else:
        sizes = {a.size for a in vectors.values()}
        if len(sizes) != 1:
            raise InputError(f"{path}: the 1-D arrays have different lengths "
                             f"({', '.join(f'{n}: {a.size}' for n, a in vectors.items())}); "
                             "a long-format archive needs one value of each per point")
        for name, arr in vectors.items():
            ds[name] = ("point", arr)
    for name in ds.variables:
        if name in units:
            ds[name].attrs["units"] = str(units[name])
        if name in long_names:
            ds[name].attrs["long_name"] = str(long_names[name])
    return ds, notes
