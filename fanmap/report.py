"""Write the outputs of an analysis: figures (PNG and PDF), result JSON and an HTML report.

The report is one self-contained HTML file: figures are embedded as PNG data
URIs (the PDFs sit beside it and are linked relatively), there are no scripts
and no external resources, so it reads the same offline, from a shared drive
or attached to an e-mail.  Everything is rendered in memory first and written
only when all of it succeeded, each file atomically (:mod:`fanmap._atomic`),
so a failure never leaves a half-written output.
"""

import base64
import datetime as _dt
import html
import io
import math
import os
import platform
import re
from pathlib import Path

import numpy as np

from . import __version__
from . import _schema as S
from . import figures as F
from ._atomic import write_bytes_atomic, write_text_atomic
from ._cautions import CAUTIONS
from .errors import InputError
from .physics import ELEMENTARY_CHARGE
from .results import dumps, to_jsonable

__all__ = ["write_fan_outputs", "write_gate_outputs", "write_batch_report",
           "render_fan_report", "fan_warnings", "REPORT_NAME", "RESULT_NAME", "INDEX_NAME"]

REPORT_NAME = "report.html"
RESULT_NAME = "result.json"
INDEX_NAME = "index.html"

# Placeholder in every map page that write_batch_report fills with a link back to the index.
_INDEX_LINK = re.compile(r"<!--batch-index-->.*?<!--/batch-index-->", re.S)
_INDEX_EMPTY = "<!--batch-index--><!--/batch-index-->"


# --- figures in memory ----------------------------------------------------------

def _render(fig):
    """PNG and PDF bytes of a figure."""
    out = {}
    for fmt in ("png", "pdf"):
        buffer = io.BytesIO()
        fig.savefig(buffer, format=fmt, metadata={"Creator": f"fanmap {__version__}"}
                    if fmt == "pdf" else None)
        out[fmt] = buffer.getvalue()
    return out


class _Figure:
    def __init__(self, stem, title, caption, fig):
        self.stem, self.title, self.caption = stem, title, caption
        self.data = _render(fig)

    @classmethod
    def on_disk(cls, png_path, title, caption):
        """A figure already written (PNG, with its PDF beside it): shown, not drawn again."""
        figure = cls.__new__(cls)
        figure.stem, figure.title, figure.caption = png_path.stem, title, caption
        figure.data = {"png": png_path.read_bytes()}
        return figure


def _gate_step(fan_map):
    gate = np.asarray(fan_map[S.GATE].values, dtype=float)
    return float(np.median(np.abs(np.diff(np.sort(gate))))) if gate.size > 1 else None


def _fan_figures(fan_map, result, notes):
    caption = ("The measured map with every fitted line (solid where fitted, thin where "
               "extrapolated to B = 0), each labelled with its filling factor (fractions p/q, "
               "satellites (t, s)); the star is the zero-density point.")
    qc = (result.extras or {}).get("quantum_capacitance")
    if isinstance(qc, dict) and qc.get("significant"):
        caption += (" Lines are each state's straight fit; the fit's quantum-capacitance model, "
                    "which bends them near neutrality, is listed under Further analyses.")
    figures = [_Figure("fan", "Fitted fan", caption, F.plot_fan(fan_map, result))]
    calibrated = (math.isfinite(result.density_per_volt) and result.density_per_volt > 0
                  and math.isfinite(result.zero_density_voltage))
    if calibrated:
        figures.append(_Figure(
            "filling", "Map against filling factor",
            "The map redrawn against ν = n h/(eB) with the fitted calibration: states of the "
            "fan are vertical lines if the calibration is right.",
            F.plot_filling_map(fan_map, result)))
        figures.append(_Figure(
            "density", "Map against density",
            "The map redrawn against the carrier density n = α (V_g − V0).",
            F.plot_density_map(fan_map, result)))
        if S.RXY in fan_map.data_vars:
            figures.append(_Figure(
                "hall", "Hall plateaus against the fitted filling factor",
                "Hall filling R_K/R_xy at a few fields against ν from the fit: with the right "
                "scale the plateaus cross the diagonal at the fitted fillings.",
                F.plot_hall_fillings(fan_map, result)))
    else:
        notes.append("no calibration: the filling-factor and density maps are not drawn")
    if result.ridge_points is not None and result.states:
        figures.append(_Figure(
            "residuals", "Residuals of the fitted lines",
            "Gate-voltage residual of each ridge point from its fitted line, versus field. "
            "A trend means a bent line or a drifting V0.",
            F.plot_residuals(result, gate_step=_gate_step(fan_map))))
    else:
        notes.append("the result carries no ridge points: the residual figure is not drawn")
    if F.index_plot_data(result.crosschecks):
        figures.append(_Figure(
            "index_plot", "Landau index plot",
            "Landau index of the oscillation minima versus 1/B; the intercept is the Berry-phase "
            "offset (½ for Berry phase π, 0 for 0 or 2π).",
            F.plot_index_plot(result)))
    return figures


# --- warnings derived from the data and the fit ---------------------------------

def _line_stats(field, resid, weight):
    """Weighted rms residual and the quadratic bow (with its significance) of one line."""
    w = np.where(np.isfinite(weight) & (weight > 0), weight, 0.0)
    if w.sum() == 0:
        w = np.ones_like(resid)
    rms = float(np.sqrt(np.average(resid**2, weights=w)))
    b = np.abs(field)
    if resid.size < 6 or np.ptp(b) == 0:
        return rms, 0.0, 0.0
    centre = (b - b.mean()) / np.ptp(b)
    design = np.stack([np.ones_like(centre), centre, centre**2], axis=1)
    sw = np.sqrt(w)
    coeff, *_ = np.linalg.lstsq(design * sw[:, None], resid * sw, rcond=None)
    sigma2 = float(np.sum(w * (resid - design @ coeff) ** 2) / max(resid.size - 3, 1))
    try:
        err = math.sqrt(max(sigma2 * np.linalg.inv((design * w[:, None]).T @ design)[2, 2], 0.0))
    except np.linalg.LinAlgError:
        return rms, 0.0, 0.0
    # A parabola c t^2 on t in [-1/2, 1/2] departs from its chord by c/4 (the sagitta).
    return rms, abs(coeff[2]) / 4, abs(coeff[2]) / err if err > 0 else 0.0


def fan_warnings(fan_map, result):
    """Warnings the report adds to the fitter's own: missing data, poor fits, bent lines.

    A line counts as poorly fitted when its weighted rms residual exceeds two
    gate steps or six times the median rms of all lines; as bent when a
    quadratic term in field is significant at five standard errors and bows
    the line by more than twice the median rms (and a tenth of a gate step).

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> from fanmap.results import FanResult
    >>> ds = xr.Dataset({"rxx": (("field", "gate"), np.full((3, 4), np.nan))},
    ...                 coords={"field": [1.0, 2, 3], "gate": [0.0, 1, 2, 3]})
    >>> fan_warnings(ds, FanResult(1e15, 0, 0, 0, 0, 0, 4, 1, ""))[0]
    'missing data: 100% of the R_xx map is NaN (12 of 12 points)'
    """
    found = []
    if S.RXX in fan_map.data_vars:
        values = np.asarray(fan_map[S.RXX].values, dtype=float)
        missing = int(np.count_nonzero(~np.isfinite(values)))
        if missing and missing >= 0.005 * values.size:
            found.append(f"missing data: {100 * missing / values.size:.0f}% of the R_xx map is "
                         f"NaN ({missing} of {values.size} points)")
    step = _gate_step(fan_map) if S.GATE in fan_map.coords else None
    if result.ridge_points is None or not step:
        return found
    stats = [(state, _line_stats(*r)) for state, r in zip(result.states, F.state_residuals(result))
             if r[1].size >= 4]
    if not stats:
        return found
    typical = float(np.median([rms for _, (rms, _, _) in stats]))
    for state, (rms, bow, significance) in stats:
        label = F.state_label(state)
        if rms > 2 * step or (len(stats) >= 3 and rms > 6 * typical):
            found.append(f"poor fit: line ν = {label} scatters {rms * 1e3:.3g} mV rms about its fit "
                         f"({rms / typical:.0f} times the typical line's {typical * 1e3:.2g} mV; "
                         f"gate step {step * 1e3:.3g} mV)")
        if significance > 5 and bow > max(2 * typical, 0.1 * step):
            found.append(f"bent line: ν = {label} departs from a straight line by about "
                         f"{bow * 1e3:.2g} mV over {state.field_min:.3g}–{state.field_max:.3g} T "
                         f"({significance:.0f} σ); a drifting V0, quantum capacitance or a "
                         "neighbouring peak can cause this: see the residuals figure")
    return found


# --- HTML building blocks ------------------------------------------------------

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 1.5rem auto;
       max-width: 62rem; padding: 0 1rem; color: #1c1c1c; line-height: 1.45; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; } h2 { font-size: 1.2rem; margin-top: 2rem;
     border-bottom: 1px solid #ccc; padding-bottom: 0.2rem; }
table { border-collapse: collapse; margin: 0.6rem 0; font-size: 0.92rem; }
th, td { border: 1px solid #d0d0d0; padding: 0.25rem 0.55rem; text-align: left; vertical-align: top; }
th { background: #f1f1ee; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: 0.9rem; color: #444; }
.meta { color: #555; font-size: 0.9rem; } .warn { background: #fff6df; border-left: 4px solid #c98a00;
        padding: 0.4rem 0.8rem; } .caution { background: #f3f3f3; border-left: 4px solid #555;
        padding: 0.4rem 0.8rem; } .ok { color: #2f6b2f; }
nav.batch { margin: 0.4rem 0; } div.table { overflow-x: auto; max-width: 100%; }
td { max-width: 28rem; overflow-wrap: break-word; } code { background: #f4f4f4; padding: 0 0.2rem; }
@media print { figure { break-inside: avoid; } }
"""


def _esc(value):
    return html.escape(str(value), quote=True)


def _finite(value):
    try:
        return value is not None and math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def _num(value, digits=4):
    """A number as text with ``digits`` significant digits; an en dash when missing."""
    if not _finite(value):
        return "–"
    value = float(value)
    if value == 0:
        return "0"
    text = f"{value:.{digits}g}"
    if "e" in text:
        mantissa, exponent = text.split("e")
        text = f"{mantissa} × 10<sup>{int(exponent)}</sup>"
    return text.replace("-", "−")


def _table(header, rows, numeric=()):
    """HTML table; cells are already-escaped HTML; ``numeric`` column indices align right."""
    head = "".join(f"<th>{h}</th>" for h in header)
    body = []
    for row in rows:
        cells = "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
                        for i, c in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    return (f'<div class="table"><table>\n<thead><tr>{head}</tr></thead>\n<tbody>\n'
            + "\n".join(body) + "\n</tbody>\n</table></div>")


def _page(title, body):
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<meta name=\"generator\" content=\"fanmap {_esc(__version__)}\">\n"
        f"<title>{_esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f"{body}\n</body>\n</html>\n")


def _figure_html(figure):
    data = base64.b64encode(figure.data["png"]).decode("ascii")
    return (f'<figure id="fig-{figure.stem}">\n<img src="data:image/png;base64,{data}" '
            f'alt="{_esc(figure.title)}">\n<figcaption><b>{_esc(figure.title)}.</b> '
            f'{_esc(figure.caption)} Files: <a href="{figure.stem}.pdf">{figure.stem}.pdf</a>, '
            f'<a href="{figure.stem}.png">{figure.stem}.png</a>.</figcaption>\n</figure>')


def _cautions_html():
    items = "".join(f"<li>{_esc(c)}</li>" for c in CAUTIONS)
    return f'<h2 id="cautions">Cautions</h2>\n<div class="caution"><ul>{items}</ul></div>'


def _warnings_html(warnings):
    if not warnings:
        return ('<h2 id="warnings">Warnings</h2>\n<p class="ok">None: no ambiguity, poor fit, bent '
                'line or missing data was detected.</p>')
    items = "".join(f"<li>{_esc(w)}</li>" for w in warnings)
    return f'<h2 id="warnings">Warnings</h2>\n<div class="warn"><ul>{items}</ul></div>'


def _value_rows(mapping, skip=()):
    """Table rows (name, value, ± stderr) of the scalar entries of a dict with ``*_stderr`` keys."""
    rows = []
    for key, value in mapping.items():
        if key.endswith("_stderr") or key in skip:
            continue
        if isinstance(value, (bool, np.bool_)) or value is None or isinstance(value, str):
            rows.append((_esc(key), _esc(value), ""))
        elif isinstance(value, (int, float, np.integer, np.floating)):
            err = mapping.get(f"{key}_stderr")
            rows.append((_esc(key), _num(value, 5), _num(err, 2) if _finite(err) else ""))
    return rows


def _cell(value, depth=0):
    """Compact HTML text of a JSON value for a table cell (long lists point to the JSON)."""
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_, str)):
        return _esc(value)
    if isinstance(value, (int, np.integer)):
        return _esc(int(value))
    if isinstance(value, (float, np.floating)):
        return _num(value, 5)
    if isinstance(value, dict):
        if depth:
            return "…"
        return "; ".join(f"{_esc(k)} = {_cell(v, depth + 1)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        if len(value) <= 8 and not any(isinstance(v, (dict, list, tuple)) for v in value):
            return ", ".join(_cell(v, depth + 1) for v in value)
        return f"{len(value)} entries (in {RESULT_NAME})"
    return _esc(value)


def _list_of_dicts_table(items):
    keys = list(dict.fromkeys(k for item in items for k in item))
    return _table([_esc(k) for k in keys], [[_cell(item.get(k)) for k in keys] for item in items])


def _dict_section(title, anchor, data, intro=""):
    """A section for an optional analysis dict: scalars as a table, lists of dicts as tables."""
    if not data:
        return ""
    data = to_jsonable(data)
    parts = [f'<h2 id="{anchor}">{_esc(title)}</h2>']
    if intro:
        parts.append(f"<p>{intro}</p>")
    rows = _value_rows(data)
    if rows:
        parts.append(_table(["quantity", "value", "± standard error"], rows, numeric=(1, 2)))
    for key, value in data.items():
        if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            parts.append(f"<h3>{_esc(key)}</h3>")
            parts.append(_list_of_dicts_table(value))
        elif isinstance(value, dict) and key != "index_plot":
            inner = _value_rows(value)
            if inner:
                parts.append(f"<h3>{_esc(key)}</h3>")
                parts.append(_table(["quantity", "value", "± standard error"], inner,
                                    numeric=(1, 2)))
    return "\n".join(parts)


# --- the fan report ---------------------------------------------------------------

def _berry_text(berry):
    return {0: "0", 1: "π", 2: "2π"}.get(berry, "undetermined") if berry is not None else \
        "undetermined"


def _calibration_rows(result):
    """Rows of value, total error and its parts (fit covariance, bootstrap, systematic)."""
    alpha, alpha_err = result.density_per_volt, result.density_per_volt_stderr
    alpha_parts = (result.density_per_volt_covariance_stderr,
                   result.density_per_volt_bootstrap_stderr, result.density_per_volt_systematic)
    cap, cap_err = result.capacitance_per_area, result.capacitance_per_area_stderr
    if not _finite(cap_err) and _finite(alpha_err):
        cap_err = ELEMENTARY_CHARGE * alpha_err
    v0, v0_err = result.zero_density_voltage, result.zero_density_voltage_stderr
    v0_parts = (result.zero_density_voltage_covariance_stderr,
                result.zero_density_voltage_bootstrap_stderr, result.zero_density_voltage_systematic)
    offset = result.density_offset
    offset_err = None
    if _finite(alpha_err) and _finite(v0_err) and _finite(v0):
        offset_err = math.hypot(alpha_err * v0, alpha * v0_err)

    def parts(values, scale=1.0):
        return tuple(_num(v * scale, 2) for v in values)

    no_parts = ("–", "–", "–")
    return [
        ("lever arm α", _num(alpha / 1e4), _num(alpha_err / 1e4, 2), *parts(alpha_parts, 1e-4),
         "cm<sup>−2</sup> V<sup>−1</sup>"),
        ("lever arm α", _num(alpha), _num(alpha_err, 2), *parts(alpha_parts),
         "m<sup>−2</sup> V<sup>−1</sup>"),
        ("capacitance per area C = eα", _num(cap * 1e5), _num(cap_err * 1e5, 2) if _finite(cap_err)
         else "–", *no_parts, "nF cm<sup>−2</sup>"),
        ("capacitance per area C = eα", _num(cap), _num(cap_err, 2) if _finite(cap_err) else "–",
         *no_parts, "F m<sup>−2</sup>"),
        ("zero-density voltage V<sub>0</sub>", _num(v0, 5), _num(v0_err, 2), *parts(v0_parts), "V"),
        ("density offset n(V<sub>g</sub> = 0)", _num(offset / 1e4), _num(offset_err / 1e4, 2)
         if offset_err is not None else "–", *no_parts, "cm<sup>−2</sup>"),
        ("density offset n(V<sub>g</sub> = 0)", _num(offset), _num(offset_err, 2)
         if offset_err is not None else "–", *no_parts, "m<sup>−2</sup>"),
        ("degeneracy g", _esc(result.degeneracy if result.degeneracy is not None
                              else "undetermined"), "", "", "", "", ""),
        ("Berry phase", _esc(_berry_text(result.berry_phase)), "", "", "", "", ""),
        ("material", _esc(result.material), "", "", "", "", ""),
    ]


def _states_rows(result):
    residuals = F.state_residuals(result)
    rows = []
    for state, (field, resid, weight) in zip(result.states, residuals):
        rms = float(np.sqrt(np.mean(resid**2))) * 1e3 if resid.size else float("nan")
        extra = []
        if state.band_filling is not None:
            extra.append(f"s = {int(state.band_filling)}")
        if state.distance_to_fraction_sigma is not None:
            extra.append(f"{_num(state.distance_to_fraction_sigma, 2)} σ from {state.filling}")
        rows.append((
            _esc(F.state_label(state)), _esc(state.kind),
            _num(state.filling_value, 5) + (f" ± {_num(state.filling_stderr, 2)}"
                                            if _finite(state.filling_stderr) else ""),
            _num(state.slope, 5), _num(state.intercept, 5),
            f"{_num(state.field_min, 3)}–{_num(state.field_max, 3)}",
            _num(state.onset_field, 3), _esc(state.points), _num(rms, 2),
            _esc("; ".join(extra))))
    return rows


def _truth_rows(fan_map, result):
    attrs = fan_map.attrs
    pairs = (("lever arm α (m<sup>−2</sup> V<sup>−1</sup>)", "truth_density_per_volt",
              result.density_per_volt, result.density_per_volt_stderr),
             ("V<sub>0</sub> (V)", "truth_zero_density_voltage", result.zero_density_voltage,
              result.zero_density_voltage_stderr),
             ("degeneracy", "truth_degeneracy", result.degeneracy, None),
             ("Berry phase (π)", "truth_berry_phase", result.berry_phase, None))
    rows = []
    for name, key, fitted, err in pairs:
        if key not in attrs:
            continue
        truth = attrs[key]
        dev = ""
        if _finite(truth) and _finite(fitted) and _finite(err) and float(err) > 0:
            dev = _num((float(fitted) - float(truth)) / float(err), 2) + " σ"
        rows.append((name, _num(truth, 5) if _finite(truth) else _esc(truth),
                     _num(fitted, 5) if _finite(fitted) else _esc(fitted), dev))
    return rows


def _map_rows(fan_map):
    rows = []
    for name in (S.FIELD, S.GATE):
        if name in fan_map.coords:
            c = np.asarray(fan_map[name].values, dtype=float)
            rows.append((_esc(name), f"{_num(c.min(), 4)} … {_num(c.max(), 4)} "
                         f"{_esc(fan_map[name].attrs.get('units', ''))}, {c.size} values"))
    for key, value in fan_map.attrs.items():
        if str(key).startswith(S.TRUTH_PREFIX):
            continue
        text = str(value)
        rows.append((_esc(key), _esc(text if len(text) < 600 else text[:600] + " …")))
    return rows


def render_fan_report(fan_map, result, figures, warnings, notes=()):
    """HTML text of the report of one fan fit (figures already rendered)."""
    source = result.source or fan_map.attrs.get("source") or "fan map"
    name = Path(str(source)).name
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    body = [f"<h1>Fan fit: {_esc(name)}</h1>",
            f'<p class="meta">source <code>{_esc(source)}</code> · written {when} by fanmap '
            f"{_esc(result.version or __version__)}</p>",
            f'<nav class="batch">{_INDEX_EMPTY}</nav>',
            '<p>Contents: <a href="#calibration">calibration</a> · <a href="#figures">figures</a> · '
            '<a href="#states">states</a> · <a href="#warnings">warnings</a> · '
            '<a href="#settings">settings</a> · <a href="#cautions">cautions</a> · '
            f'<a href="{RESULT_NAME}">{RESULT_NAME}</a></p>',
            '<h2 id="calibration">Calibration</h2>',
            _table(["quantity", "value", "± standard error", "of which: fit", "bootstrap",
                    "systematic", "units"],
                   _calibration_rows(result), numeric=(1, 2, 3, 4, 5)),
            "<p>The standard error combines the larger of the fit covariance and the bootstrap "
            "over ridge traces with a systematic part measured on the map (disagreement of "
            "independent halves of the data).</p>",
            f"<p><b>Where the scale came from:</b> {_esc(result.scale_from or 'not stated')}</p>"]
    if len(result.scale_candidates) > 1:
        body.append("<p>The data allow more than one absolute scale; the candidates were:</p>")
        body.append(_list_of_dicts_table(to_jsonable(result.scale_candidates)))
    truth = _truth_rows(fan_map, result)
    if truth:
        body.append("<h3>Simulated map: ground truth</h3>")
        body.append(_table(["quantity", "truth", "fitted", "fitted − truth"], truth,
                           numeric=(1, 2, 3)))
    all_warnings = list(result.warnings) + list(warnings)
    body.append(_warnings_html(all_warnings))
    body.append('<h2 id="figures">Figures</h2>')
    body.extend(_figure_html(f) for f in figures)
    if notes:
        body.append("<p class=\"meta\">" + "<br>".join(_esc(n) for n in notes) + "</p>")
    body.append('<h2 id="states">States</h2>')
    if result.states:
        body.append(_table(
            ["state", "kind", "ν from slope", "slope (V/T)", "intercept (V)", "field range (T)",
             "onset (T)", "points", "rms residual (mV)", "notes"],
            _states_rows(result), numeric=(2, 3, 4, 6, 7, 8)))
    else:
        body.append("<p>No fitted state.</p>")
    body.append(_dict_section("Superlattice", "superlattice", result.superlattice,
                              "Moiré analysis of the satellite fans (SI units)."))
    body.append(_dict_section("Cross-checks", "crosschecks", result.crosschecks,
                              "Independent estimates of the calibration (SI units)."))
    body.append(_dict_section("Further analyses", "extras",
                              {k: v for k, v in (result.extras or {}).items() if k != "settings"}))
    body.append('<h2 id="settings">Settings and input</h2>')
    settings = (result.extras or {}).get("settings")
    if settings:
        body.append(_table(["setting", "value"],
                           [(_esc(k), _esc(v)) for k, v in to_jsonable(settings).items()]))
    body.append(_table(["map", "value"], _map_rows(fan_map)))
    body.append(f'<p class="meta">fanmap {_esc(result.version or __version__)} · Python '
                f"{_esc(platform.python_version())} · NumPy {_esc(np.__version__)}</p>")
    body.append(_cautions_html())
    return _page(f"fanmap: fan fit of {name}", "\n".join(body))


def _check_fan_map(fan_map):
    if not hasattr(fan_map, "data_vars"):
        raise InputError(f"expected a fan map (xarray.Dataset), got {type(fan_map).__name__}")
    if S.FIELD not in fan_map.dims or S.GATE not in fan_map.dims:
        raise InputError(f"the map has dimensions {tuple(fan_map.dims)}; a fan map needs "
                         f"({S.FIELD!r}, {S.GATE!r}); open it with fanmap.reading.open_map")


def _write_all(out_dir, figures, texts):
    """Write every file; the report last, so that it only exists once its figures do."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    for figure in figures:
        for fmt, data in figure.data.items():
            path = out_dir / f"{figure.stem}.{fmt}"
            write_bytes_atomic(path, data)
            written[path.name] = path
    for name, text in texts:
        path = out_dir / name
        write_text_atomic(path, text)
        written[name] = path
    return written


def write_fan_outputs(out_dir, fan_map, result):
    """Write the figures, ``result.json`` and ``report.html`` of a fan fit into ``out_dir``.

    Everything is rendered first; files are written only when all rendering
    succeeded, each atomically, with the report last.

    Parameters
    ----------
    out_dir : str or Path
        Output directory (created if needed).
    fan_map : xarray.Dataset
        The fan map that was fitted.
    result : FanResult
        The fit.

    Returns
    -------
    dict
        File name -> path of every file written: ``fan.png``/``fan.pdf`` (fitted fan),
        ``filling.*`` and ``density.*`` (redrawn maps), ``hall.*`` (when the map has
        R_xy), ``residuals.*`` (when the result has ridge points), ``index_plot.*``
        (when cross-checks ran), ``result.json``, ``report.html``.
    """
    _check_fan_map(fan_map)
    notes = []
    figures = _fan_figures(fan_map, result, notes)
    warnings = fan_warnings(fan_map, result)
    report = render_fan_report(fan_map, result, figures, warnings, notes)
    return _write_all(out_dir, figures, [(RESULT_NAME, dumps(result)), (REPORT_NAME, report)])


# --- gate maps ------------------------------------------------------------------

def _gate_rows(result):
    def row(name, key, units, scale=1.0, digits=5):
        value, err = getattr(result, key), getattr(result, f"{key}_stderr", None)
        return (name, _num(value * scale if _finite(value) else value, digits),
                _num(err * scale, 2) if _finite(err) else "–", units)
    return [
        row("top-gate capacitance C<sub>t</sub>", "top_capacitance", "nF cm<sup>−2</sup>", 1e5),
        row("top-gate lever arm C<sub>t</sub>/e", "top_capacitance", "cm<sup>−2</sup> V<sup>−1</sup>",
            1e-4 / ELEMENTARY_CHARGE),
        row("bottom-gate capacitance C<sub>b</sub>", "bottom_capacitance", "nF cm<sup>−2</sup>", 1e5),
        row("bottom-gate lever arm C<sub>b</sub>/e", "bottom_capacitance",
            "cm<sup>−2</sup> V<sup>−1</sup>", 1e-4 / ELEMENTARY_CHARGE),
        row("capacitance ratio C<sub>t</sub>/C<sub>b</sub>", "capacitance_ratio", ""),
        row("top-gate offset V<sub>t0</sub>", "top_offset", "V"),
        row("bottom-gate offset V<sub>b0</sub>", "bottom_offset", "V"),
        ("degeneracy g", _esc(result.degeneracy if result.degeneracy is not None
                              else "undetermined"), "", ""),
        ("material", _esc(result.material), "", ""),
    ]


def write_gate_outputs(out_dir, gate_maps, result, nd_map):
    """Write the figures, ``result.json`` and ``report.html`` of a dual-gate fit.

    Parameters
    ----------
    out_dir : str or Path
        Output directory (created if needed).
    gate_maps : xarray.Dataset or sequence of them
        The gate maps that were fitted (dims ``bottom_gate``, ``top_gate``).
    result : GateResult
        The fit.
    nd_map : xarray.DataArray or xarray.Dataset or None
        The map on (density, displacement) coordinates.

    Returns
    -------
    dict
        File name -> path: ``gate_map.*``, ``nd_map.*``, ``result.json``, ``report.html``.
    """
    maps = [gate_maps] if hasattr(gate_maps, "data_vars") else list(gate_maps)
    figures = [_Figure("gate_map", "Dual-gate map",
                       "The measured map(s) with the ridges found and the fitted neutrality "
                       "(n = 0) and zero-displacement (D = 0) lines.",
                       F.plot_gate_maps(maps, result))]
    if nd_map is not None:
        figures.append(_Figure("nd_map", "Map on density and displacement",
                               "The map transformed to carrier density and displacement field "
                               "with the fitted capacitances.", F.plot_nd_map(nd_map, result)))
    sources = [str(m.attrs.get("source", "")) for m in maps if m.attrs.get("source")]
    name = ", ".join(Path(src).name for src in sources) or (
        Path(result.source).name if result.source else "gate map")
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    body = [f"<h1>Gate-map fit: {_esc(name)}</h1>",
            f'<p class="meta">{len(maps)} map(s) · written {when} by fanmap '
            f"{_esc(result.version or __version__)}</p>",
            f'<nav class="batch">{_INDEX_EMPTY}</nav>',
            '<h2 id="calibration">Calibration</h2>',
            _table(["quantity", "value", "± standard error", "units"], _gate_rows(result),
                   numeric=(1, 2)),
            f"<p><b>Where the scale came from:</b> {_esc(result.scale_from or 'not stated')}</p>",
            f"<p><b>Displacement convention:</b> {_esc(result.displacement_convention)}</p>",
            _warnings_html(list(result.warnings)),
            '<h2 id="figures">Figures</h2>']
    body.extend(_figure_html(f) for f in figures)
    body.append(_dict_section("Further analyses", "extras",
                              {k: v for k, v in (result.extras or {}).items()
                               if k not in ("ridge_points", "settings")}))
    body.append('<h2 id="settings">Settings and input</h2>')
    settings = (result.extras or {}).get("settings")
    if settings:
        body.append(_table(["setting", "value"],
                           [(_esc(k), _esc(v)) for k, v in to_jsonable(settings).items()]))
    body.append(_table(["map", "source", "field (T)"],
                       [(str(k + 1), _esc(m.attrs.get("source", "")),
                         _num(float(m[S.FIELD]) if S.FIELD in m.coords and m[S.FIELD].size == 1
                              else float("nan"), 3)) for k, m in enumerate(maps)]))
    body.append(_cautions_html())
    report = _page(f"fanmap: gate-map fit of {name}", "\n".join(body))
    return _write_all(out_dir, figures, [(RESULT_NAME, dumps(result)), (REPORT_NAME, report)])


# --- batch index ------------------------------------------------------------------

def _rows_of(table):
    """A list of row dicts from a list of dicts or a dict of equal-length columns."""
    if isinstance(table, dict):
        columns = {k: list(v) for k, v in table.items()}
        lengths = {len(v) for v in columns.values()}
        if len(lengths) > 1:
            raise InputError("the batch table's columns have different lengths")
        count = lengths.pop() if lengths else 0
        return [{k: v[i] for k, v in columns.items()} for i in range(count)]
    rows = [dict(r) for r in table]
    return rows


def _page_for(row, k, pages):
    if pages is None:
        return None
    if isinstance(pages, dict):
        for key in ("name", "map", "source", "id"):
            if row.get(key) in pages:
                return Path(pages[row[key]])
        return Path(pages[k]) if k in pages else None
    pages = list(pages)
    return Path(pages[k]) if k < len(pages) and pages[k] is not None else None


def _relative(target, start_dir):
    return Path(os.path.relpath(Path(target).resolve(), Path(start_dir).resolve())).as_posix()


# Columns of the batch index (others stay in the results table): identity first, then results.
_INDEX_FIRST = ("device", "cooldown", "map", "name", "source", "acquired", "map_kind", "status")
_INDEX_OTHER = ("material", "degeneracy", "berry_phase", "states", "scale_from",
                "twist_angle_deg", "top_capacitance", "bottom_capacitance", "warnings")


def write_batch_report(out_dir, table, pages, *, title=None, summary=None):
    """Write ``index.html`` for a batch: the summary figure, the table and links to each map's page.

    Each linked map page gets a link back to the index (filled into the
    placeholder every report carries).

    Parameters
    ----------
    out_dir : str or Path
        Where ``index.html`` and ``batch_summary.png``/``.pdf`` go.
    table : list of dict or dict of lists
        One row per map: ``device``, ``cooldown``, ``name`` or ``source``,
        ``density_per_volt`` (m^-2 V^-1), ``zero_density_voltage`` (V), their
        ``*_stderr``, and optionally ``map``, ``acquired``, ``map_kind``,
        ``status``, ``error``, ``warnings`` and a few result columns (material,
        degeneracy, Berry phase, states, twist angle, gate capacitances), as
        in :data:`fanmap.archive.TABLE_COLUMNS`.
    pages : list or dict or None
        Each row's report page (path), aligned with the rows, or keyed by the
        row's ``name``/``map``/``source``.
    title : str, optional
        Heading of the page (e.g. the workflow's name); default "Batch".
    summary : str or Path, optional
        A summary figure already written into ``out_dir`` (PNG, with a PDF of the
        same name beside it), shown instead of drawing the per-map overview
        ``batch_summary.png``/``.pdf``.

    Returns
    -------
    Path
        The index page.
    """
    rows = _rows_of(table)
    if not rows:
        raise InputError("the batch table is empty; nothing to write an index for")
    out_dir = Path(out_dir)
    if summary is not None:
        summary = Path(summary)
        if summary.parent.resolve() != out_dir.resolve() or not summary.is_file():
            raise InputError(f"the summary figure {summary} is not a file in {out_dir}; write it "
                             "there first or leave summary out to draw the overview")
        figure = _Figure.on_disk(summary, "Batch summary",
                                 "Lever arm and zero-density voltage per device against acquisition "
                                 "time, one series per cooldown (± one standard error); maps without "
                                 "a fit are listed in the table.")
    else:
        figure = _Figure("batch_summary", "Batch summary",
                         "Lever arm and zero-density voltage per device and cooldown (± one standard "
                         "error); rows without a fit failed, see the table.",
                         F.plot_batch_summary(rows))
    index_path = out_dir / INDEX_NAME
    shown = [k for k in _INDEX_FIRST if any(k in r for r in rows)]
    other = [k for k in _INDEX_OTHER if any(k in r for r in rows)]
    header = [_esc(k) for k in shown] + ["α (cm<sup>−2</sup> V<sup>−1</sup>)", "± α",
                                         "V<sub>0</sub> (V)", "± V<sub>0</sub>"] + \
        [_esc(k) for k in other] + ["report", "error"]
    html_rows, back_links = [], []
    for k, row in enumerate(rows):
        page = _page_for(row, k, pages)
        alpha, alpha_err = row.get("density_per_volt"), row.get("density_per_volt_stderr")
        link = ""
        if page is not None:
            link = f'<a href="{_esc(_relative(page, out_dir))}">report</a>'
            back_links.append(page)
        html_rows.append(
            [_esc(row.get(key, "")) for key in shown]
            + [_num(float(alpha) / 1e4) if _finite(alpha) else "–",
               _num(float(alpha_err) / 1e4, 2) if _finite(alpha_err) else "–",
               _num(row.get("zero_density_voltage"), 5),
               _num(row.get("zero_density_voltage_stderr"), 2)]
            + [_num(row[key], 5) if isinstance(row.get(key), (float, np.floating))
               else _esc(row.get(key, "")) for key in other]
            + [link, _esc(row.get("error") or "")])
    numeric = tuple(range(len(shown), len(shown) + 4))
    failed = sum(1 for r in rows if not _finite(r.get("density_per_volt")))
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    heading = title or "Batch"
    body = [f"<h1>{_esc(heading)}: {len(rows)} map(s)</h1>",
            f'<p class="meta">written {when} by fanmap {_esc(__version__)} · '
            f"{len(rows) - failed} fitted, {failed} without a fit</p>",
            '<h2 id="summary">Summary</h2>', _figure_html(figure),
            '<h2 id="maps">Maps</h2>', _table(header, html_rows, numeric=numeric),
            _cautions_html()]
    index_html = _page(f"fanmap: {heading}", "\n".join(body))
    # Back links are prepared in memory too, so nothing is written if a page is unreadable.
    updated = []
    for page in back_links:
        try:
            text = page.read_text(encoding="utf-8")
        except OSError as exc:
            raise InputError(f"cannot read the map report {page}: {exc}; pass the paths "
                             "write_fan_outputs returned") from exc
        link = (f'<!--batch-index--><a href="{_esc(_relative(index_path, page.parent))}">'
                "← batch index</a><!--/batch-index-->")
        if _INDEX_LINK.search(text):
            updated.append((page, _INDEX_LINK.sub(lambda _m: link, text, count=1)))
    _write_all(out_dir, [] if summary is not None else [figure], [])
    for page, text in updated:
        write_text_atomic(page, text)
    write_text_atomic(index_path, index_html)
    return index_path
