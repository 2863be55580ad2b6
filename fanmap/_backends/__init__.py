"""File-format readers.  Each returns a *raw* dataset (names and units as written) and notes.

:mod:`fanmap.reading` then recognises the axes and signals and builds the
labelled map.
"""

from pathlib import Path

from ..errors import InputError
from .netcdf import looks_like_netcdf, read_netcdf
from .npz import read_npz
from .text import read_text

FORMATS = ("netcdf", "text", "npz")
_SUFFIXES = {
    ".nc": "netcdf", ".nc4": "netcdf", ".cdf": "netcdf", ".netcdf": "netcdf", ".h5": "netcdf",
    ".hdf5": "netcdf", ".he5": "netcdf", ".h5nc": "netcdf",
    ".npz": "npz",
    ".csv": "text", ".tsv": "text", ".txt": "text", ".dat": "text", ".tab": "text", ".asc": "text",
}


def guess_format(path):
    """Format name from the suffix, else from the first bytes."""
    path = Path(path)
    fmt = _SUFFIXES.get(path.suffix.lower())
    if fmt:
        return fmt
    if looks_like_netcdf(path):
        return "netcdf"
    try:
        with open(path, "rb") as fh:
            if fh.read(4) == b"PK\x03\x04":
                return "npz"
    except OSError:
        pass
    return "text"


def read_raw(path, *, format=None, lazy=None):
    """Read ``path`` with the reader for its format; returns ``(raw_dataset, notes, format)``."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if path.is_dir():
        raise InputError(f"{path}: is a directory, not a map file")
    fmt = format or guess_format(path)
    if fmt not in FORMATS:
        raise InputError(f"unknown format {fmt!r}; choose one of {', '.join(FORMATS)}")
    if fmt == "netcdf":
        ds, notes = read_netcdf(path, lazy=lazy)
    elif fmt == "npz":
        ds, notes = read_npz(path)
    else:
        ds, notes = read_text(path)
    return ds, notes, fmt
