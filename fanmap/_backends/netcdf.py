"""netCDF (classic and netCDF-4/HDF5) through the netCDF4 and h5netcdf engines.

Files larger than :data:`LAZY_BYTES` (or any file when ``lazy=True``) are
opened with dask chunks, so the map is read chunk by chunk when needed and
never held in memory twice.
"""

import os

import dask
import xarray as xr

from ..errors import InputError

#: Files above this size are opened lazily by default.
LAZY_BYTES = 256 * 2**20
#: Target size of one dask chunk: a few of them in flight per core stay far below one map.
CHUNK_BYTES = "32MiB"

_HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
_CLASSIC_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05")


def looks_like_netcdf(path):
    """True when the file starts with a netCDF classic or HDF5 signature."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError:
        return False
    return head == _HDF5_MAGIC or head[:4] in _CLASSIC_MAGIC


def _engines(head):
    if head == _HDF5_MAGIC:
        return ("h5netcdf", "netcdf4")
    if head[:4] in _CLASSIC_MAGIC:
        return ("netcdf4", "scipy")
    return ("netcdf4", "h5netcdf")


def read_netcdf(path, *, lazy=None, engine=None):
    """Open a netCDF/HDF5 file as a raw dataset.

    Returns ``(dataset, notes)``.  With ``lazy`` false the values are loaded
    and the file is closed; otherwise the dataset is dask-backed and keeps
    the file open until it is closed or garbage-collected.
    """
    try:
        size = os.path.getsize(path)
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise InputError(f"{path}: cannot read the file ({exc.strerror or exc})") from None
    if lazy is None:
        lazy = size > LAZY_BYTES
    engines = (engine,) if engine else _engines(head)
    problems = []
    for name in engines:
        try:
            with dask.config.set({"array.chunk-size": CHUNK_BYTES}):
                ds = xr.open_dataset(path, engine=name, chunks="auto" if lazy else None,
                                     decode_times=False, mask_and_scale=True, cache=False)
        except Exception as exc:  # noqa: BLE001 - any library failure means "unreadable file"
            problems.append(f"{name}: {type(exc).__name__}: {str(exc)[:120]}")
            continue
        try:
            if not lazy:
                ds = ds.load()
                ds.close()
        except Exception as exc:  # noqa: BLE001 - truncated data shows up only when read
            ds.close()
            problems.append(f"{name}: {type(exc).__name__}: {str(exc)[:120]}")
            continue
        if not ds.variables:
            ds.close()
            problems.append(f"{name}: no variables")
            continue
        notes = [f"engine {name}" + (", opened lazily (dask chunks)" if lazy else "")]
        return ds, notes
    raise InputError(f"{path}: not a readable netCDF/HDF5 file (corrupt or truncated?): "
                     + "; ".join(problems) + ". Re-export the map from the acquisition program.")
