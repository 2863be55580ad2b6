"""Outputs of an analysis: files written together or not at all, a complete self-contained report."""

import base64
import shutil
import html
import json
import re
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from scipy import constants

from _fan_data import ALPHA, V0, synthetic_fan, synthetic_result
from fanmap import _schema as S
from fanmap import report as R
from fanmap._cautions import CAUTIONS
from fanmap.errors import InputError
from fanmap.results import GateResult, dumps


def _small():
    return synthetic_fan(n_field=20, n_gate=81), synthetic_result()


def _text(page):
    """Visible text of a page, tags stripped and entities resolved."""
    return html.unescape(re.sub(r"<[^>]+>", "", page))


@pytest.fixture(scope="module")
def fan_outputs(tmp_path_factory):
    out = tmp_path_factory.mktemp("fan")
    ds, result = synthetic_fan(n_field=20, n_gate=81, nan_fraction=0.02), synthetic_result()
    return out, R.write_fan_outputs(out, ds, result), result


def test_fan_outputs_are_all_written(fan_outputs):
    out, written, result = fan_outputs
    expected = {f"{stem}.{fmt}" for stem in ("fan", "filling", "density", "residuals",
                                             "index_plot") for fmt in ("png", "pdf")}
    assert set(written) == expected | {"result.json", "report.html"}
    for name, path in written.items():
        assert path == out / name and path.stat().st_size > 0
    assert (out / "fan.pdf").read_bytes().startswith(b"%PDF")
    assert (out / "result.json").read_text() == dumps(result)
    assert json.loads((out / "result.json").read_text())["density_per_volt"] == ALPHA


def test_report_is_self_contained(fan_outputs):
    out, written, _ = fan_outputs
    page = written["report.html"].read_text(encoding="utf-8")
    # Offline: no script and nothing fetched from a network address.
    assert "<script" not in page
    assert not re.search(r"""(src|href)=["']?(https?:)?//""", page)
    images = re.findall(r'<img src="([^"]+)"', page)
    assert len(images) == 5
    for src in images:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1]).startswith(b"\x89PNG")
    # Every relative link points at a file that was written beside the report.
    for href in re.findall(r'href="([^"#][^"]*)"', page):
        assert (out / href).is_file(), href


def test_report_has_calibration_in_trade_units(fan_outputs):
    _, written, result = fan_outputs
    text = _text(written["report.html"].read_text(encoding="utf-8"))
    # 1 m^-2 = 1e-4 cm^-2: 7.2e14 m^-2 V^-1 is 7.2e10 cm^-2 V^-1.
    assert "7.2 × 1010" in text and "cm−2 V−1" in text
    assert "7.2 × 1014" in text and "m−2 V−1" in text
    # C = e alpha (CODATA e via scipy.constants), in nF cm^-2: 11.54 nF cm^-2 for 7.2e10 cm^-2 V^-1
    # (300 nm SiO2 gives about 11.5 nF cm^-2: parallel plate, eps_r = 3.9, common practice).
    capacitance_nf_cm2 = constants.e * ALPHA * 1e5
    assert f"{capacitance_nf_cm2:.4g}" in text
    assert "zero-density voltage V0" in text and "1.5" in text
    assert "Berry phase" in text and "π" in text
    assert result.scale_from in text


def test_report_lists_states_warnings_cautions_and_settings(fan_outputs):
    _, written, result = fan_outputs
    page = written["report.html"].read_text(encoding="utf-8")
    text = _text(page)
    for label in ("−14", "2", "7/3", "(1, −4)"):
        assert f"<td>{html.escape(label)}</td>" in page
    assert "state 7/3 rests on 8 points only" in text             # the fitter's warning
    assert re.search(r"missing data: \d+% of the R_xx map is NaN", text)
    for caution in CAUTIONS:
        assert caution in text
    assert "demo-device-A.nc" in text and "fanmap 0.1.0" in text
    assert 'id="crosschecks"' in page and "hall_density_per_volt" in text


def test_superlattice_section_when_present():
    ds, result = _small()
    result.superlattice = {"cell_density": 7.0e15, "cell_density_stderr": 1e14,
                           "twist_angle_deg": 1.05, "twist_angle_deg_stderr": 0.01,
                           "satellites": [{"t": 1, "s": -4}, {"t": -1, "s": 4}]}
    text = _text(R.render_fan_report(ds, result, [], []))
    assert "Superlattice" in text and "twist_angle_deg" in text and "1.05" in text
    assert "satellites" in text
    result.superlattice = None
    assert "Superlattice" not in _text(R.render_fan_report(ds, result, [], []))


def test_bent_line_and_poor_fit_are_warned(tmp_path):
    ds, result = _small()
    state = result.states[0]
    mine = result.ridge_points["state"] == 0
    b = result.ridge_points["field"][mine]
    # Bend the first line by a parabola of 0.5 V at the ends (gate step 0.75 V in this map).
    result.ridge_points["gate"][mine] = state.intercept + state.slope * b + \
        2.0 * ((b - b.mean()) / np.ptp(b)) ** 2
    warnings = R.fan_warnings(ds, result)
    assert any(w.startswith("bent line: ν = −14") for w in warnings)
    straight = R.fan_warnings(ds, synthetic_result())
    assert not any("bent" in w or "poor fit" in w for w in straight)
    result.ridge_points["gate"][mine] += np.where(np.arange(mine.sum()) % 2, 3.0, -3.0)
    assert any(w.startswith("poor fit: line ν = −14") for w in R.fan_warnings(ds, result))


def test_a_failure_writes_nothing(tmp_path, monkeypatch):
    ds, result = _small()

    def broken(*args, **kwargs):
        raise RuntimeError("report failed")

    # Figures are cheap stand-ins here; the report, rendered after every figure, fails.
    monkeypatch.setattr(R, "_render", lambda fig: {"png": b"png", "pdf": b"pdf"})
    monkeypatch.setattr(R, "render_fan_report", broken)
    (tmp_path / "report.html").write_text("previous report")
    with pytest.raises(RuntimeError, match="report failed"):
        R.write_fan_outputs(tmp_path, ds, result)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]
    assert (tmp_path / "report.html").read_text() == "previous report"


def test_wrong_map_is_a_clear_error(tmp_path):
    gate_map = xr.Dataset({"rxx": (("bottom_gate", "top_gate"), np.ones((3, 3)))})
    with pytest.raises(InputError, match="a fan map needs"):
        R.write_fan_outputs(tmp_path / "x", gate_map, synthetic_result())
    assert not (tmp_path / "x").exists()


def test_result_without_ridge_points_still_reports(tmp_path):
    ds = synthetic_fan(n_field=12, n_gate=41)
    result = synthetic_result(with_points=False, extra_states=False)
    result.crosschecks = None
    written = R.write_fan_outputs(tmp_path, ds, result)
    assert "residuals.png" not in written
    assert "no ridge points" in written["report.html"].read_text(encoding="utf-8")


def _gate_outputs(tmp_path):
    top, bottom = np.linspace(-3, 3, 31), np.linspace(-5, 5, 41)
    gmap = xr.Dataset(
        {S.RXX: ((S.BOTTOM_GATE, S.TOP_GATE), 100 + np.abs(top[None, :] + 1.5 * bottom[:, None]),
                 {"units": "ohm"})},
        coords={S.TOP_GATE: (S.TOP_GATE, top, {"units": "V"}),
                S.BOTTOM_GATE: (S.BOTTOM_GATE, bottom, {"units": "V"}), S.FIELD: 0.0},
        attrs={S.MAP_KIND: S.GATES, "source": "demo-dual-gate.nc"})
    nd = xr.DataArray(np.ones((5, 7)), dims=("displacement", "density"), name="rxx",
                      coords={"density": ("density", np.linspace(-1e16, 1e16, 7), {"units": "m-2"}),
                              "displacement": ("displacement", np.linspace(-1e-3, 1e-3, 5),
                                               {"units": "C m-2"})})
    result = GateResult(1.2e-3, 1e-5, 0.8e-3, 1e-5, 1.5, 0.01, 0.0, 0.01, 0.0, 0.01, 4,
                        "neutrality ridge slope", "D = (Ct Vt - Cb Vb)/2, D > 0 top gate positive",
                        warnings=["only one map: the capacitances rest on the ridge slope"])
    return R.write_gate_outputs(tmp_path, [gmap], result, nd), result


def test_gate_outputs(tmp_path):
    written, result = _gate_outputs(tmp_path)
    assert {"gate_map.png", "gate_map.pdf", "nd_map.png", "nd_map.pdf", "result.json",
            "report.html"} == set(written)
    text = _text(written["report.html"].read_text(encoding="utf-8"))
    # C = 1.2e-3 F m^-2 = 120 nF cm^-2; lever arm C/e (CODATA e) in cm^-2 V^-1.
    assert "120" in text and f"{1.2e-3 / constants.e / 1e4 / 1e11:.5g} × 1011" in text
    assert "only one map" in text and "D > 0 top gate positive" in text
    assert CAUTIONS[1] in text


def test_batch_index_and_map_pages_link_both_ways(tmp_path, fan_outputs):
    shutil.copytree(fan_outputs[0], tmp_path / "maps" / "A-cd1")
    page = tmp_path / "maps" / "A-cd1" / "report.html"
    rows = [{"device": "A", "cooldown": "cd1", "map": "A-cd1", "status": "ok",
             "density_per_volt": ALPHA, "density_per_volt_stderr": 3e12,
             "zero_density_voltage": V0, "zero_density_voltage_stderr": 0.02},
            {"device": "B", "cooldown": "cd2", "map": "B-cd2", "status": "failed",
             "error": "no fan found in B-cd2.nc"}]
    index = R.write_batch_report(tmp_path, rows, {"A-cd1": page})
    assert index == tmp_path / "index.html"
    index_page = index.read_text(encoding="utf-8")
    links = re.findall(r'href="([^"]+)"', index_page)
    assert "maps/A-cd1/report.html" in links
    assert "no fan found in B-cd2.nc" in index_page
    assert (tmp_path / "batch_summary.png").is_file()
    back = re.findall(r'<a href="([^"]+)">← batch index</a>', page.read_text(encoding="utf-8"))
    assert back == ["../../index.html"]
    assert (page.parent / back[0]).resolve() == index.resolve()
    # Writing the index again does not stack a second back link.
    R.write_batch_report(tmp_path, rows, [page, None])
    assert page.read_text(encoding="utf-8").count("← batch index") == 1


def test_batch_index_shows_a_summary_figure_already_written(tmp_path):
    rows = [{"device": "A", "cooldown": "cd1", "map": "A-cd1", "status": "ok",
             "density_per_volt": ALPHA, "density_per_volt_stderr": 3e12,
             "zero_density_voltage": V0, "zero_density_voltage_stderr": 0.02}]
    png = b"\x89PNG\r\n\x1a\n stand-in bytes"
    (tmp_path / "summary.png").write_bytes(png)
    index = R.write_batch_report(tmp_path, rows, None, summary=tmp_path / "summary.png")
    page = index.read_text(encoding="utf-8")
    assert base64.b64encode(png).decode("ascii") in page
    assert "summary.pdf" in re.findall(r'href="([^"]+)"', page)
    assert not (tmp_path / "batch_summary.png").exists()          # nothing drawn twice
    elsewhere = tmp_path / "sub"
    elsewhere.mkdir()
    (elsewhere / "summary.png").write_bytes(png)
    with pytest.raises(InputError, match="not a file in"):
        R.write_batch_report(tmp_path, rows, None, summary=elsewhere / "summary.png")


def test_batch_table_as_columns(tmp_path):
    columns = {"device": ["A", "A"], "cooldown": ["1", "2"],
               "density_per_volt": [7e14, 7.1e14], "density_per_volt_stderr": [1e12, 1e12],
               "zero_density_voltage": [0.1, 0.3], "zero_density_voltage_stderr": [0.01, 0.01]}
    index = R.write_batch_report(tmp_path, columns, None, title="Cooldown 4 <north>")
    page = index.read_text(encoding="utf-8")
    assert page.count("<tr>") == 3 and "<h1>Cooldown 4 &lt;north&gt;: 2 map(s)</h1>" in page
    with pytest.raises(InputError, match="different lengths"):
        R.write_batch_report(tmp_path, {"device": ["A"], "cooldown": []}, None)
    with pytest.raises(InputError, match="empty"):
        R.write_batch_report(tmp_path, [], None)


def test_output_paths_are_paths(fan_outputs):
    _, written, _ = fan_outputs
    assert all(isinstance(p, Path) for p in written.values())


@pytest.mark.slow
def test_report_of_the_shipped_monolayer_sample(tmp_path):
    from fanmap.fanfit import fit_fan
    from fanmap.reading import open_map

    sample = Path(__file__).resolve().parents[1] / "sample_maps" / "mx07_monolayer_fan.nc"
    fan_map = open_map(sample)
    result = fit_fan(fan_map, material="graphene-monolayer")
    written = R.write_fan_outputs(tmp_path, fan_map, result)
    page = written["report.html"].read_text(encoding="utf-8")
    text = _text(page)
    # Monolayer graphene: fourfold levels, Berry phase pi (Novoselov et al., Nature 438, 197
    # (2005); Zhang et al., Nature 438, 201 (2005)).
    assert re.search(r"<td>degeneracy g</td><td[^>]*>4</td>", page)
    assert re.search(r"<td>Berry phase</td><td[^>]*>π</td>", page)
    assert "Simulated map: ground truth" in text
    states = re.search(r'<h2 id="states">.*?</table>', page, re.S).group(0)
    assert states.count("<tr>") == len(result.states) + 1
    for state in result.states:
        assert f"<td>{html.escape(R.F.state_label(state))}</td>" in states
    assert {"fan.png", "filling.png", "density.png", "residuals.png"} <= set(written)


def test_ambiguous_scale_lists_the_candidates(tmp_path):
    ds = synthetic_fan(n_field=12, n_gate=41)
    result = synthetic_result(extra_states=False)
    result.density_per_volt = result.density_per_volt_stderr = float("nan")
    result.capacitance_per_area = result.density_offset = float("nan")
    result.degeneracy = result.berry_phase = None
    result.crosschecks = None
    result.scale_from = "ambiguous: no R_xy, no dielectric given"
    result.scale_candidates = [{"degeneracy": 2, "density_per_volt": ALPHA / 2},
                               {"degeneracy": 4, "density_per_volt": ALPHA}]
    written = R.write_fan_outputs(tmp_path, ds, result)
    assert "filling.png" not in written and "fan.png" in written
    page = written["report.html"].read_text(encoding="utf-8")
    text = _text(page)
    assert "more than one absolute scale" in text and "undetermined" in text
    assert "filling-factor and density maps are not drawn" in text
    assert page.count("<td>4</td>") >= 1 and "3.6 × 10" in text     # alpha / 2 = 3.6e14


def test_text_from_files_and_fits_is_escaped():
    ds, result = _small()
    result.source = 'evil<script>alert("x")</script>.nc'
    result.warnings = ["a <b>bold</b> & risky warning"]
    page = R.render_fan_report(ds, result, [], [])
    assert "<script" not in page and "<b>bold</b>" not in page
    assert "&lt;script&gt;" in page and "a &lt;b&gt;bold&lt;/b&gt; &amp; risky warning" in page
