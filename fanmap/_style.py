"""The figures' visual scheme: colour maps, state line styles and text sizes.

One place so that every figure draws a state kind the same way.  Kinds differ
by line style *and* marker as well as colour, so that the figures stay
readable when printed in greyscale; fitted lines are light with a dark halo so
they show on every part of a colour map.  Colour maps are matplotlib's own
perceptually uniform ones.
"""

import matplotlib.patheffects as _effects

__all__ = [
    "MAP_COLORMAP", "TRANSFORMED_COLORMAP", "GATE_COLORMAP", "KIND_STYLES", "kind_style",
    "halo", "ZERO_DENSITY_MARKER", "RIDGE_POINT_STYLE", "FIGURE_DPI", "FONT_SIZE",
    "SERIES_STYLES", "rc_params",
]

#: Colour map of measured resistance (fan maps).
MAP_COLORMAP = "cividis"
#: Colour map of a map redrawn in filling factor or density (same quantity, same map).
TRANSFORMED_COLORMAP = "cividis"
#: Colour map of dual-gate maps and (n, D) maps.
GATE_COLORMAP = "magma"

FIGURE_DPI = 150
FONT_SIZE = 9

# Light cores on a dark halo; the line style and marker carry the kind in greyscale.
KIND_STYLES = {
    "integer": {"color": "#f4f1e8", "linestyle": "-", "linewidth": 1.3, "marker": "o",
                "label": "integer"},
    "broken-symmetry": {"color": "#ffc94a", "linestyle": (0, (5, 2)), "linewidth": 1.2,
                        "marker": "s", "label": "broken symmetry"},
    "fractional": {"color": "#8fe3f0", "linestyle": (0, (1.2, 1.6)), "linewidth": 1.5,
                   "marker": "^", "label": "fractional"},
    "satellite": {"color": "#f7a1c4", "linestyle": (0, (6, 2, 1.5, 2)), "linewidth": 1.2,
                  "marker": "D", "label": "satellite"},
}
_UNKNOWN_KIND = {"color": "#d9d9d9", "linestyle": (0, (3, 3)), "linewidth": 1.0, "marker": "x",
                 "label": "other"}

#: Zero-density point (V0 at B = 0).
ZERO_DENSITY_MARKER = {"marker": "*", "markersize": 13, "markerfacecolor": "#ffffff",
                       "markeredgecolor": "#1a1a1a", "markeredgewidth": 1.0, "linestyle": "none"}
#: Ridge points drawn on raw maps (small, dark-edged, light-filled).
RIDGE_POINT_STYLE = {"marker": ".", "markersize": 2.5, "color": "#ffffff", "alpha": 0.6,
                     "linestyle": "none"}
#: Data series on white backgrounds (residuals, index plot, batch summary): dark to mid
#: grey-levels with distinct markers, so that neighbours differ in greyscale too.
SERIES_STYLES = (
    {"color": "#1b1b3a", "marker": "o"},
    {"color": "#b3541e", "marker": "s"},
    {"color": "#2f7d6d", "marker": "^"},
    {"color": "#7a3b8f", "marker": "D"},
    {"color": "#5c5c5c", "marker": "v"},
)


def kind_style(kind):
    """Line properties (dict) for a state of ``kind``.

    Examples
    --------
    >>> kind_style("fractional")["marker"]
    '^'
    >>> kind_style("something else")["label"]
    'other'
    """
    return KIND_STYLES.get(kind, _UNKNOWN_KIND)


def halo(width=2.6, color="#141414"):
    """Path effects drawing a dark outline under a light line or text."""
    return [_effects.Stroke(linewidth=width, foreground=color), _effects.Normal()]


def rc_params():
    """matplotlib settings every figure is drawn with."""
    return {
        "font.size": FONT_SIZE,
        "axes.titlesize": FONT_SIZE + 1,
        "axes.labelsize": FONT_SIZE,
        "xtick.labelsize": FONT_SIZE - 1,
        "ytick.labelsize": FONT_SIZE - 1,
        "legend.fontsize": FONT_SIZE - 1,
        "axes.linewidth": 0.8,
        "xtick.direction": "out",
        "ytick.direction": "out",
        "savefig.dpi": FIGURE_DPI,
        "figure.dpi": FIGURE_DPI,
        "pdf.fonttype": 42,
        "svg.fonttype": "none",
        "axes.unicode_minus": True,
    }
