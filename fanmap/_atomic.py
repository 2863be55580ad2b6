"""Write outputs atomically: a temporary file beside the target, then a rename.

A reader (or a resumed batch run) therefore sees either the old file or the
complete new one, never a half-written file.
"""

import contextlib
import os
import tempfile
from pathlib import Path

__all__ = ["atomic_path", "write_text_atomic", "write_bytes_atomic"]


@contextlib.contextmanager
def atomic_path(target, suffix=None):
    """Yield a temporary path next to ``target``; rename it onto ``target`` on success.

    On an exception the temporary file is removed and ``target`` is untouched.
    ``suffix`` defaults to the target's own suffix, since some writers
    (matplotlib, netCDF) choose the format from it.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        prefix=f".{target.name}.", suffix=suffix if suffix is not None else target.suffix,
        dir=target.parent,
    )
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        # mkstemp creates files readable by the owner only; give the usual umask permissions.
        os.chmod(tmp, 0o666 & ~_current_umask())
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _current_umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_bytes_atomic(target, data):
    """Write ``data`` (bytes) to ``target`` atomically."""
    with atomic_path(target) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())


def write_text_atomic(target, text, encoding="utf-8"):
    """Write ``text`` to ``target`` atomically."""
    write_bytes_atomic(target, text.encode(encoding))
