"""Straight-line fits with honest uncertainties, for the cross-checks.

By default the covariance is scaled by the reduced chi-square of the fit
(the "Birge ratio" convention, as :func:`scipy.optimize.curve_fit` does with
``absolute_sigma=False``): the quoted standard errors then reflect the actual
scatter of the points.  With ``absolute_sigma=True`` the per-point errors are
taken as absolute and the covariance is only ever scaled *up* (when the
scatter exceeds them), never down.
"""

from dataclasses import dataclass

import numpy as np

__all__ = ["LineFit", "fit_line", "fit_line_clipped", "fit_v_shape"]


@dataclass(frozen=True)
class LineFit:
    """y = intercept + slope * x, with standard errors and their covariance."""

    slope: float
    intercept: float
    slope_stderr: float
    intercept_stderr: float
    covariance: float        # cov(slope, intercept)
    reduced_chi2: float
    points: int

    @property
    def root(self):
        """x where the line crosses y = 0."""
        return -self.intercept / self.slope

    @property
    def root_stderr(self):
        """Standard error of :attr:`root`, by first-order propagation with the covariance."""
        a, b = self.intercept, self.slope
        # root = -a / b:  d/da = -1/b,  d/db = a/b^2
        da, db = -1.0 / b, a / b**2
        var = (da**2 * self.intercept_stderr**2 + db**2 * self.slope_stderr**2
               + 2 * da * db * self.covariance)
        return float(np.sqrt(max(var, 0.0)))


def fit_line(x, y, sigma=None, *, absolute_sigma=False):
    """Weighted least-squares straight line.

    Parameters
    ----------
    x, y : array_like
        Points; non-finite ones are ignored.
    sigma : array_like, optional
        Per-point errors (weights 1/sigma^2).  Unless ``absolute_sigma``,
        the result is scaled by the residual scatter, so only their ratios matter.
    absolute_sigma : bool
        Treat ``sigma`` as absolute standard errors (scale up only).

    Returns
    -------
    LineFit
        Standard errors are NaN when fewer than three points remain.

    Examples
    --------
    >>> f = fit_line([0, 1, 2, 3], [1.0, 3.1, 4.9, 7.0])
    >>> round(f.slope, 2), round(f.intercept, 2)
    (1.98, 1.03)
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    w = np.ones_like(x) if sigma is None else 1.0 / np.asarray(sigma, dtype=float) ** 2
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(w) & (w > 0)
    x, y, w = x[ok], y[ok], w[ok]
    if x.size < 2 or np.ptp(x) == 0:
        nan = float("nan")
        return LineFit(nan, nan, nan, nan, nan, nan, int(x.size))
    design = np.column_stack([np.ones_like(x), x])
    normal = design.T @ (design * w[:, None])
    cov = np.linalg.inv(normal)
    intercept, slope = cov @ (design.T @ (w * y))
    resid = y - intercept - slope * x
    dof = x.size - 2
    chi2 = float(np.sum(w * resid**2) / dof) if dof > 0 else float("nan")
    if absolute_sigma:
        cov = cov * (max(chi2, 1.0) if np.isfinite(chi2) else 1.0)
    else:
        cov = cov * chi2
    return LineFit(float(slope), float(intercept), float(np.sqrt(cov[1, 1])),
                   float(np.sqrt(cov[0, 0])), float(cov[0, 1]), chi2, int(x.size))


def fit_line_clipped(x, y, sigma=None, *, clip=4.0, max_rounds=5, absolute_sigma=False):
    """:func:`fit_line` with repeated rejection of points beyond ``clip`` robust sigmas.

    Returns ``(LineFit, kept)`` where ``kept`` is a boolean mask over the input.
    The robust sigma is 1.4826 times the median absolute normalised residual.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    s = np.ones_like(x) if sigma is None else np.asarray(sigma, dtype=float)
    kept = np.isfinite(x) & np.isfinite(y) & np.isfinite(s) & (s > 0)
    fit = fit_line(x[kept], y[kept], s[kept], absolute_sigma=absolute_sigma)
    for _ in range(max_rounds):
        if not np.isfinite(fit.slope) or kept.sum() < 5:
            break
        z = (y - fit.intercept - fit.slope * x) / s
        spread = 1.4826 * np.median(np.abs(z[kept]))
        if not spread > 0:
            break
        new = kept & (np.abs(z) <= clip * spread)
        if new.sum() == kept.sum() or new.sum() < 3:
            break
        kept = new
        fit = fit_line(x[kept], y[kept], s[kept], absolute_sigma=absolute_sigma)
    return fit, kept


def fit_v_shape(x, y, sigma=None, *, absolute_sigma=False):
    """Fit |y| = |slope| |x - root| with one straight line through a sign change.

    Used for densities known only in magnitude (from an oscillation frequency):
    points on either side of the root get opposite signs.  Every split of the
    sorted points into a lower and an upper branch is tried (including "all on
    one side") and the split with the smallest residual, whose fitted root is
    consistent with it, wins.  The returned line describes the *signed*
    quantity, positive above the root when the upper branch is the larger one.

    Returns ``(LineFit, signs)``, ``signs`` being the +-1 branch of each point
    (0 for ignored points).

    Examples
    --------
    >>> x = np.linspace(-2, 3, 11)
    >>> f, s = fit_v_shape(x, 2.0 * np.abs(x - 0.5))
    >>> round(f.slope, 6), round(f.root, 6)
    (2.0, 0.5)
    """
    x = np.asarray(x, dtype=float)
    y = np.abs(np.asarray(y, dtype=float))
    s = np.ones_like(x) if sigma is None else np.asarray(sigma, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(s) & (s > 0)
    order = np.flatnonzero(ok)[np.argsort(x[ok])]
    best = None
    for split in range(order.size + 1):
        signs = np.zeros_like(x)
        signs[order[:split]] = -1.0
        signs[order[split:]] = 1.0
        fit = fit_line(x[ok], (signs * y)[ok], s[ok], absolute_sigma=absolute_sigma)
        if not np.isfinite(fit.slope) or fit.slope <= 0:
            continue
        root = fit.root
        lower = x[order[split - 1]] if split > 0 else -np.inf
        upper = x[order[split]] if split < order.size else np.inf
        if not lower <= root <= upper:
            continue
        sse = np.sum(((signs * y - fit.intercept - fit.slope * x) / s)[ok] ** 2)
        if best is None or sse < best[0]:
            best = (sse, fit, signs)
    if best is None:
        nan = float("nan")
        return LineFit(nan, nan, nan, nan, nan, nan, int(ok.sum())), np.zeros_like(x)
    return best[1], best[2]
