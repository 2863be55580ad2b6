"""Text formatting shared by the sub-commands' summaries."""

import numpy as np


def value_with_error(value, err, unit, scale=1.0, digits=4, missing="undetermined"):
    """``"7.563e+10 ± 7.3e+06 cm^-2 V^-1"``; ``missing`` when the value is not finite.

    Examples
    --------
    >>> value_with_error(4.598, 0.0012, "V")
    '4.598 ± 0.0012 V'
    >>> value_with_error(float("nan"), None, "V", missing="not measured")
    'not measured'
    """
    if value is None or not np.isfinite(value):
        return missing
    text = f"{value * scale:.{digits}g}"
    if err is not None and np.isfinite(err):
        text += f" ± {err * scale:.2g}"
    return f"{text} {unit}"
