"""Workflow files: validation before anything runs, with the line of every problem."""

import importlib.util
import re
import shutil
import textwrap
from pathlib import Path

import pytest
from scipy import constants

from fanmap import cli
from fanmap.archive import read_results_table
from fanmap.errors import WorkflowError
from fanmap.workflow import _key_lines, load_workflow, parse_workflow


@pytest.fixture
def archive(tmp_path):
    for name in ("KR-12/cd4/fan_001.nc", "KR-12/cd4/fan_002.nc", "KR-15/gates_000.nc"):
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_bytes(b"")
    return tmp_path


def write(folder, text, name="run.toml"):
    path = folder / name
    path.write_text(textwrap.dedent(text).lstrip("\n"))
    return path


GOOD = """
[workflow]
name = "Kestrel Row, cooldown 4"

[analyses]
crosschecks = false

[outputs]
directory = "out"
figures = false

[defaults]
material = "graphene-monolayer"
dielectric = { thickness_nm = 285.0, permittivity = 3.9 }
gate_limits = [-60.0, 60.0]
units = { gate = "mV", field = "kG" }

[[devices]]
name = "KR-12"
cooldown = "CD4"
maps = ["KR-12/**/*.nc"]
gate_range = [-40, 40]

[[devices]]
name = "KR-15"
maps = ["KR-15"]
material = "graphene-bilayer"
[devices.top_dielectric]
thickness_nm = 32
permittivity = 3.4
"""


def test_valid_workflow_resolves_maps_settings_and_outputs(archive):
    wf = load_workflow(write(archive, GOOD))
    assert wf.name == "Kestrel Row, cooldown 4"
    assert wf.analyses == {"fan": True, "gates": True, "crosschecks": False}
    assert wf.output_directory == (archive / "out").resolve()
    assert wf.figures is False and wf.summary is True
    first, second = wf.devices
    assert [p.name for p in first.maps] == ["fan_001.nc", "fan_002.nc"]
    assert [p.name for p in second.maps] == ["gates_000.nc"]    # a folder means its maps
    assert first.cooldown == "CD4" and second.cooldown is None
    # Defaults apply to every device; a device overrides only what it names.
    assert first.settings["material"] == "graphene-monolayer"
    assert second.settings["material"] == "graphene-bilayer"
    assert first.settings["dielectric"] == {"thickness": pytest.approx(285e-9), "permittivity": 3.9}
    assert second.settings["top_dielectric"] == {"thickness": pytest.approx(32e-9), "permittivity": 3.4}
    assert first.settings["gate_range"] == [-40.0, 40.0] and second.settings["gate_range"] is None
    assert first.settings["gate_limits"] == second.settings["gate_limits"] == [-60.0, 60.0]
    assert first.settings["reading"] == {"gate_units": "mV", "field_units": "kG"}


def problems(path):
    with pytest.raises(WorkflowError) as info:
        load_workflow(path)
    return str(info.value)


def test_unknown_keys_are_errors_with_did_you_mean_and_line(archive):
    text = GOOD.replace("cooldown = \"CD4\"", "cooldwn = \"CD4\"").replace(
        "permittivity = 3.9 }", "permitivity = 3.9 }").replace("[outputs]", "[output]")
    message = problems(write(archive, text))
    lines = text.lstrip("\n").splitlines()
    line_of = {key: next(i for i, l in enumerate(lines, 1) if key in l)
               for key in ("cooldwn", "permitivity", "[output]")}
    assert f"line {line_of['cooldwn']}: unknown key 'cooldwn' in [[devices]] #1; did you mean 'cooldown'?" \
        in message
    assert f"line {line_of['permitivity']}: unknown key 'permitivity'" in message
    assert "did you mean 'permittivity'?" in message
    assert f"line {line_of['[output]']}: unknown key 'output' in the top level; did you mean 'outputs'?" \
        in message
    # The dielectric is also incomplete without its permittivity: reported, not skipped.
    assert "dielectric needs 'permittivity'" in message
    assert message.startswith(f"workflow {archive / 'run.toml'} has 4 problems:")


def test_bad_values_name_their_line(archive):
    text = """
    [defaults]
    material = "graphene-monolayr"
    gate_range = [10, -10]
    units = { gate = "T" }

    [[devices]]
    name = "KR-12"
    maps = ["KR-12/**/*.nc"]

    [[devices]]
    name = 12
    maps = ["nowhere/*.nc"]
    excitation_current = -1e-9
    """
    message = problems(write(archive, text))
    assert "line 2: unknown material 'graphene-monolayr'; did you mean 'graphene-monolayer'?" in message
    assert "line 3: 'gate_range' must be [low, high] in V with low < high" in message
    assert "line 4: units.gate = 'T' is a magnetic field, not a voltage" in message
    assert "line 11: 'name' must be text, not 12" in message
    assert "line 12: maps entry 'nowhere/*.nc' matches no readable map file" in message
    assert "line 13: 'excitation_current' must be a positive number in A" in message


def test_toml_syntax_errors_keep_tomllib_line_and_column(archive):
    message = problems(write(archive, '[[devices]]\nname = "KR-12\nmaps = []\n'))
    assert "is not valid TOML" in message
    assert re.search(r"line 2, column \d+", message)


def test_structure_errors(archive):
    message = problems(write(archive, '[analyses]\nfan = false\ngates = false\ncrosschecks = false\n'))
    assert "every analysis is switched off" in message
    assert "needs at least one [[devices]] table" in message
    message = problems(write(archive, '[[devices]]\nname = "A"\n\n[[devices]]\nmaps = ["KR-15"]\n'))
    assert "line 1: [[devices]] #1 needs 'maps'" in message
    assert "line 4: [[devices]] #2 needs a 'name'" in message


def test_a_map_listed_by_two_devices_is_an_error(archive):
    text = '[[devices]]\nname = "A"\nmaps = ["KR-12/cd4/*.nc"]\n\n' \
           '[[devices]]\nname = "B"\nmaps = ["KR-12/**/fan_001.nc"]\n'
    message = problems(write(archive, text))
    assert "line 7: map" in message and "is also listed by [[devices]] #1" in message


def test_key_line_finder_handles_arrays_of_tables_dotted_and_inline_keys():
    text = textwrap.dedent('''
        [workflow]
        description = """
        fake = "not a key"
        """
        [[devices]]
        name = "A"
        [devices.channels]
        signal = "Vxx"
        [[devices]]
        name = "B"
        units.gate = "mV"
        dielectric = { thickness_nm = 30, permittivity = 3.4 }
        ''').lstrip("\n")
    lines = _key_lines(text)
    assert lines[("workflow", "description")] == 2
    assert ("workflow", "fake") not in lines           # inside a multi-line string
    assert lines[("devices", 0, "name")] == 6
    assert lines[("devices", 0, "channels", "signal")] == 8
    assert lines[("devices", 1)] == 9
    assert lines[("devices", 1, "units", "gate")] == 11
    assert lines[("devices", 1, "dielectric", "permittivity")] == 12


def test_parse_workflow_resolves_relative_to_the_file(archive):
    wf = parse_workflow('[[devices]]\nname = "D"\nmaps = ["../KR-15/*.nc"]\n', archive / "sub" / "w.toml")
    assert wf.devices[0].maps[0].resolve() == (archive / "KR-15" / "gates_000.nc").resolve()
    assert wf.output_directory == (archive / "sub" / "w-results").resolve()


# --- the shipped example workflows, run on the demo archive they describe ----------------------

WORKFLOWS = Path(__file__).resolve().parents[1] / "workflows"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The small demo archive beside copies of the shipped workflow files."""
    spec = importlib.util.spec_from_file_location("make_demo_archive", WORKFLOWS / "make_demo_archive.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    folder = tmp_path_factory.mktemp("kestrel-row")
    module.make_demo_archive(folder / "demo-archive", "small")
    for path in WORKFLOWS.glob("*.toml"):
        shutil.copy(path, folder / path.name)
    return folder


def sio2_lever_arm(thickness=285e-9, permittivity=3.9):
    # Parallel-plate lever arm eps0 eps_r / (e d) from CODATA constants (scipy.constants);
    # eps_r = 3.9 for SiO2 and 3.4 for hBN are handbook values (common practice).
    return constants.epsilon_0 * permittivity / (constants.e * thickness)


def test_shipped_workflows_are_valid(demo):
    shipped = sorted(WORKFLOWS.glob("*.toml"))
    assert len(shipped) >= 2
    for path in shipped:
        workflow = load_workflow(demo / path.name)
        assert workflow.devices and all(device.maps for device in workflow.devices)


def truth(path, name):
    import xarray as xr
    with xr.open_dataset(path) as ds:
        return float(ds.attrs[f"truth_{name}"])


def _rows(folder):
    return {Path(row["path"]).name: row for row in read_results_table(folder / "results.csv")}


@pytest.mark.slow
def test_fans_workflow_runs_on_the_local_cluster(demo):
    assert cli.main(["batch", str(demo / "kestrel-row-fans.toml")]) == 0
    out = demo / "kestrel-row-fans-results"
    rows = _rows(out)
    assert len(rows) == 5
    crashed = rows.pop("fan_2026-03-05_crashed.nc")
    assert crashed["status"] == "failed" and "not a readable netCDF" in crashed["error"]
    for name, row in rows.items():
        assert row["status"] == "ok", (name, row["error"])
        assert (out / "maps" / row["map"] / "report.html").is_file()
        assert (out / "maps" / row["map"] / "fan.png").is_file()
    kr12 = {name: row for name, row in rows.items() if row["device"] == "KR-12"}
    assert {row["cooldown"] for row in kr12.values()} == {"CD3", "CD4"}
    for row in kr12.values():
        assert row["density_per_volt"] == pytest.approx(sio2_lever_arm(), rel=0.03)
        # V0 moved between the cooldowns; each row has its own map's (simulated) V0.
        assert row["zero_density_voltage"] == pytest.approx(truth(row["path"], "zero_density_voltage"), abs=0.05)
    hall_bar = rows["fan_2026-02-23.nc"]
    assert hall_bar["device"] == "KR-H3" and hall_bar["density_per_volt"] == pytest.approx(6.0e15, rel=0.03)
    assert (out / "summary.png").stat().st_size > 0 and (out / "index.html").is_file()


@pytest.mark.slow
def test_dual_gate_workflow_reads_lab_csv_and_flags_the_sweep_limits(demo):
    assert cli.main(["batch", str(demo / "kestrel-row-dual-gate.toml"), "--workers", "0"]) == 0
    rows = _rows(demo / "kestrel-row-dual-gate-results")
    assert set(rows) == {"gates_2026-03-10_0T.nc", "gates_2026-03-10_9T.nc", "backgate_fan_2026-03-11.csv"}
    assert all(row["status"] == "ok" for row in rows.values()), [r["error"] for r in rows.values()]
    at_9T = rows["gates_2026-03-10_9T.nc"]
    assert at_9T["top_capacitance"] == pytest.approx(
        constants.e * sio2_lever_arm(30e-9, 3.4), rel=0.05)
    assert at_9T["bottom_capacitance"] == pytest.approx(constants.e * sio2_lever_arm(), rel=0.05)
    assert rows["gates_2026-03-10_0T.nc"]["capacitance_ratio"] == pytest.approx(
        (285 / 30) * (3.4 / 3.9), rel=0.1)
    for row in (at_9T, rows["gates_2026-03-10_0T.nc"]):
        assert "beyond the device's bottom_gate_limits [-50, 50] V" in row["warnings"]
    # The CSV holds lock-in microvolts at 10 nA, field in kG, gate in mV: read as the workflow says.
    fan = rows["backgate_fan_2026-03-11.csv"]
    assert fan["density_per_volt"] == pytest.approx(sio2_lever_arm(), rel=0.03)
    assert fan["zero_density_voltage"] == pytest.approx(-1.5, abs=0.1)
