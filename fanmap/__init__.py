"""fanmap: calibrate gated quantum Hall devices from Landau fans and gate maps."""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("fanmap")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"

from .errors import FanmapError, InputError, NoFanError, WorkflowError  # noqa: E402
from .materials import MATERIAL_NAMES, get_material, main_sequence  # noqa: E402
from .results import FanResult, GateResult, State  # noqa: E402
from . import accessor  # noqa: E402,F401  (registers the dataset.fanmap accessor)

__all__ = [
    "__version__", "FanmapError", "InputError", "NoFanError", "WorkflowError",
    "MATERIAL_NAMES", "get_material", "main_sequence", "FanResult", "GateResult", "State",
]
