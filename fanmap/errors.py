"""The project's own error types.

Every problem with a user's input is raised as a :class:`FanmapError` (or a
subclass), whose message says what is wrong and what to do about it.  The
command line turns these into a one-line message and a non-zero exit code.
"""

__all__ = ["FanmapError", "InputError", "NoFanError", "WorkflowError"]


class FanmapError(Exception):
    """Base class of every error the project raises on purpose."""


class InputError(FanmapError, ValueError):
    """A file or array cannot be read or makes no physical sense."""


class NoFanError(FanmapError):
    """A map was read correctly but holds no usable fan (or gate-map ridges)."""


class WorkflowError(FanmapError, ValueError):
    """A workflow file is malformed; the message names the line."""
