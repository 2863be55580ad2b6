"""The ``fanmap`` accessor on xarray datasets: ``fan_map.fanmap.fit()``.

Importing :mod:`fanmap` registers it.  Other analyses add their own methods here.

Examples
--------
>>> import xarray as xr, fanmap.accessor
>>> hasattr(xr.Dataset().fanmap, "fit")
True
"""

import xarray as xr

__all__ = ["FanmapAccessor"]


@xr.register_dataset_accessor("fanmap")
class FanmapAccessor:
    """Analyses of a labelled map, reached as ``dataset.fanmap``."""

    def __init__(self, dataset):
        self._ds = dataset

    def fit(self, **options):
        """Fit the Landau fan of this map; see :func:`fanmap.fanfit.fit_fan` for the options."""
        from .fanfit import fit_fan

        return fit_fan(self._ds, **options)

    def gates(self, *others, **options):
        """Calibrate both gates of this gate map (jointly with ``others``); see
        :func:`fanmap.gatemap.fit_gates` for the options."""
        from .gatemap import fit_gates

        return fit_gates([self._ds, *others], **options)

    def check(self, fan_result=None, **options):
        """Hall, oscillation and index-plot cross-checks of this fan map (and ``fan_result``);
        see :func:`fanmap.crosscheck.run_crosschecks` for the options."""
        from .crosscheck import run_crosschecks

        return run_crosschecks(self._ds, fan_result, **options)
