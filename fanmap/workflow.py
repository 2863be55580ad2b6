"""Workflow files: a TOML description of an archive run, checked before anything runs.

A workflow names the maps (paths or globs, relative to the file), the settings
of each device (material, dielectric prior, channels, units, gate and field
limits), the analyses to run and where the outputs go.  :func:`load_workflow`
reads it with the standard library (``tomllib``; ``tomli`` on Python 3.10),
checks every key and value, and collects *all* problems into one
:class:`~fanmap.errors.WorkflowError` whose lines each name the line of the
file they refer to.  Unknown keys get a did-you-mean.

The format (every table except ``[[devices]]`` is optional)::

    [workflow]
    name = "Cooldown 4, Kestrel Row"     # free text, shown in the report

    [analyses]                           # which analyses run (defaults shown)
    fan = true                           # Landau-fan calibration of fan maps
    gates = true                         # dual-gate calibration of gate maps
    crosschecks = true                   # Hall / oscillation cross-checks of fan maps

    [outputs]
    directory = "results"                # relative to the workflow file
    figures = true                       # per-map figures and report page
    summary = true                       # lever arm and V0 per device over time

    [defaults]                           # settings every device starts from
    material = "graphene-monolayer"      # a preset of fanmap.materials
    gate_range = [-40.0, 40.0]           # V: analyse only this part of the gate axis
    field_range = [1.0, 14.0]            # T: analyse only this part of the field axis
    gate_limits = [-60.0, 60.0]          # V: the device's allowed sweep; maps beyond it are flagged
    top_gate_limits = [-8.0, 8.0]        # V: the same for the two gates of a gate map
    bottom_gate_limits = [-60.0, 60.0]
    excitation_current = 1e-8            # A, when the files hold lock-in voltages
    field_value = 0.0                    # T, field of gate maps whose files do not say
    kind = "fan"                         # force the map kind ("fan" or "gates")
    dielectric = { thickness_nm = 285.0, permittivity = 3.9 }         # prior for fan maps
    top_dielectric = { thickness_nm = 30.0, permittivity = 3.4 }      # priors for gate maps
    bottom_dielectric = { thickness_nm = 285.0, permittivity = 3.9 }
    channels = { signal = "Vxx", hall = "Vxy", gate = "Vg", field = "B" }  # also top_gate, bottom_gate
    units = { gate = "V", field = "T", signal = "V", hall = "V" }

    [[devices]]                          # one table per device
    name = "KR-12"
    cooldown = "CD4"
    maps = ["raw/KR-12/*.nc"]            # globs; a folder means every map inside it
    material = "graphene-bilayer"        # any default can be overridden here

Examples
--------
>>> import pathlib, tempfile
>>> folder = pathlib.Path(tempfile.mkdtemp())
>>> _ = (folder / "fan.nc").write_bytes(b"")
>>> _ = (folder / "run.toml").write_text('''
... [[devices]]
... name = "D1"
... maps = ["*.nc"]
... materail = "2deg"
... ''')
>>> load_workflow(folder / "run.toml")
Traceback (most recent call last):
...
fanmap.errors.WorkflowError: workflow ...run.toml has 1 problem:
  line 5: unknown key 'materail' in [[devices]] #1; did you mean 'material'?
"""

import difflib
import glob
import math
import os
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

from .archive import MAP_SUFFIXES, find_map_files
from .errors import InputError, WorkflowError
from .materials import MATERIAL_NAMES
from .units import QUANTITY_NAMES, parse_unit

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = ["Workflow", "Device", "load_workflow", "parse_workflow"]

#: Reading-option names (keyword arguments of ``fanmap.reading.open_map``) per workflow key.
_CHANNEL_OPTIONS = {"signal": "signal", "hall": "hall", "gate": "gate", "field": "field",
                    "top_gate": "top_gate", "bottom_gate": "bottom_gate"}
_UNIT_OPTIONS = {"gate": "gate_units", "field": "field_units", "signal": "signal_units",
                 "hall": "hall_units"}
_KINDS = ("fan", "gates")


@dataclass
class Device:
    """One device of a workflow: its maps and its analysis settings (SI)."""

    name: str
    maps: list[Path]
    settings: dict
    cooldown: str | None = None
    notes: str = ""


@dataclass
class Workflow:
    """A validated workflow file."""

    path: Path
    name: str
    description: str
    analyses: dict
    output_directory: Path
    figures: bool
    summary: bool
    devices: list[Device] = field(default_factory=list)


# --- where is a key in the TOML text ------------------------------------------

_BARE_OR_QUOTED = r'(?:[A-Za-z0-9_-]+|"[^"]*"|\'[^\']*\')'
_DOTTED = rf'{_BARE_OR_QUOTED}(?:\s*\.\s*{_BARE_OR_QUOTED})*'
_HEADER_RE = re.compile(rf'^\s*(\[\[|\[)\s*({_DOTTED})\s*(\]\]|\])')
_KEY_RE = re.compile(rf'^\s*({_DOTTED})\s*=')
_INLINE_KEY_RE = re.compile(rf'[{{,]\s*({_BARE_OR_QUOTED})\s*=')


def _split_dotted(text):
    parts = re.findall(_BARE_OR_QUOTED, text)
    return [p[1:-1] if p[:1] in "\"'" else p for p in parts]


def _key_lines(text):
    """Map key paths (tuples; array-of-table entries as indices) to 1-based line numbers.

    A small scanner, not a parser: tomllib has already accepted the text, so
    only headers, ``key =`` lines and one level of inline table need finding.
    """
    lines = {}
    table_counts = {}          # resolved path of an array of tables -> entries seen
    prefix = ()
    in_string = None           # delimiter of an open multi-line string

    def resolve(parts):
        out = []
        for part in parts:
            out.append(part)
            if tuple(out) in table_counts:
                out.append(table_counts[tuple(out)] - 1)
        return tuple(out)

    for number, line in enumerate(text.splitlines(), start=1):
        if in_string:
            if line.count(in_string) % 2 == 1:
                in_string = None
            continue
        header = _HEADER_RE.match(line)
        if header:
            parts = _split_dotted(header.group(2))
            if header.group(1) == "[[":
                parent = resolve(parts[:-1]) + (parts[-1],)
                table_counts[parent] = table_counts.get(parent, 0) + 1
                prefix = parent + (table_counts[parent] - 1,)
            else:
                prefix = resolve(parts)
            lines.setdefault(prefix, number)
            continue
        key = _KEY_RE.match(line)
        if key:
            path = prefix + tuple(_split_dotted(key.group(1)))
            lines.setdefault(path, number)
            value = line[key.end():]
            if value.lstrip().startswith("{"):
                for inner in _INLINE_KEY_RE.finditer(value):
                    lines.setdefault(path + tuple(_split_dotted(inner.group(1))), number)
            for delimiter in ('"""', "'''"):
                if value.count(delimiter) % 2 == 1:
                    in_string = delimiter
    return lines


class _Problems:
    """Collects problems, each tied to the line of the key it is about."""

    def __init__(self, path, text):
        self.path = path
        self.lines = _key_lines(text)
        self.items = []

    def line_of(self, key_path):
        key_path = tuple(key_path)
        while key_path:
            if key_path in self.lines:
                return self.lines[key_path]
            key_path = key_path[:-1]
        return None

    def add(self, key_path, message):
        self.items.append((self.line_of(key_path), message))

    def raise_if_any(self):
        if not self.items:
            return
        count = len(self.items)
        body = "\n".join(f"  line {line}: {msg}" if line else f"  {msg}"
                         for line, msg in sorted(self.items, key=lambda i: (i[0] or 0)))
        raise WorkflowError(
            f"workflow {self.path} has {count} problem{'s' if count > 1 else ''}:\n{body}")


def _where(key_path):
    """Human name of the table holding ``key_path``: [outputs], [[devices]] #2, ..."""
    names, device = [], None
    for part in key_path[:-1]:
        if isinstance(part, int):
            device = part + 1
        else:
            names.append(part)
    if device is not None:
        inner = ".".join(names[1:])
        return f"[[devices]] #{device}" + (f" ({inner})" if inner else "")
    return f"[{'.'.join(names)}]" if names else "the top level"


def _check_keys(table, allowed, key_path, problems):
    for key in table:
        if key not in allowed:
            guess = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
            hint = f"; did you mean {guess[0]!r}?" if guess else f"; allowed: {', '.join(allowed)}"
            problems.add(key_path + (key,), f"unknown key {key!r} in {_where(key_path + (key,))}{hint}")


def _is_number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _expect(value, kind, key_path, problems):
    checks = {"text": lambda v: isinstance(v, str) and v.strip() != "",
              "true/false": lambda v: isinstance(v, bool),
              "a number": _is_number,
              "a table": lambda v: isinstance(v, dict)}
    if not checks[kind](value):
        problems.add(key_path, f"{key_path[-1]!r} must be {kind}, not {value!r}")
        return False
    return True


# --- the settings tables shared by [defaults] and [[devices]] --------------------

def _limits(value, key_path, unit, problems):
    if (not isinstance(value, list) or len(value) != 2 or not all(_is_number(v) for v in value)
            or not value[0] < value[1]):
        problems.add(key_path, f"{key_path[-1]!r} must be [low, high] in {unit} with low < high, "
                               f"not {value!r}")
        return None
    return [float(value[0]), float(value[1])]


def _dielectric(value, key_path, problems):
    if not _expect(value, "a table", key_path, problems):
        return None
    _check_keys(value, ("thickness_nm", "permittivity"), key_path, problems)
    out = {}
    for key, name in (("thickness_nm", "thickness"), ("permittivity", "permittivity")):
        if key not in value:
            problems.add(key_path, f"dielectric needs {key!r} (give thickness_nm and permittivity)")
        elif not _is_number(value[key]) or value[key] <= 0:
            problems.add(key_path + (key,), f"{key!r} must be a positive number, not {value[key]!r}")
        else:
            out[name] = float(value[key]) * (1e-9 if key == "thickness_nm" else 1.0)
    return out if len(out) == 2 else None


def _name_table(value, allowed, key_path, problems):
    if not _expect(value, "a table", key_path, problems):
        return {}
    _check_keys(value, allowed, key_path, problems)
    out = {}
    for key, option in allowed.items():
        if key in value and _expect(value[key], "text", key_path + (key,), problems):
            out[option] = value[key]
    return out


_SIGNAL_QUANTITIES = ("voltage", "resistance", "sheet_resistance", "conductance")
_UNIT_QUANTITIES = {"gate": ("voltage",), "field": ("field",), "signal": _SIGNAL_QUANTITIES,
                    "hall": _SIGNAL_QUANTITIES}


def _units(value, key_path, problems):
    out = _name_table(value, _UNIT_OPTIONS, key_path, problems)
    for key, option in _UNIT_OPTIONS.items():
        if option not in out:
            continue
        try:
            quantity = parse_unit(out[option]).quantity
        except InputError as exc:
            problems.add(key_path + (key,), f"units.{key}: {exc}")
            continue
        if quantity not in _UNIT_QUANTITIES[key]:
            problems.add(key_path + (key,), f"units.{key} = {out[option]!r} is {QUANTITY_NAMES[quantity]}, "
                                            f"not {' or '.join(QUANTITY_NAMES[q] for q in _UNIT_QUANTITIES[key])}")
    return out


def _settings(table, key_path, problems, base):
    """Settings from a [defaults] or [[devices]] table, starting from ``base``."""
    settings = dict(base, reading=dict(base["reading"]))
    if "material" in table and _expect(table["material"], "text", key_path + ("material",), problems):
        material = table["material"]
        if material not in MATERIAL_NAMES:
            guess = difflib.get_close_matches(material, MATERIAL_NAMES, n=1, cutoff=0.5)
            hint = f"did you mean {guess[0]!r}? " if guess else ""
            problems.add(key_path + ("material",),
                         f"unknown material {material!r}; {hint}choose one of {', '.join(MATERIAL_NAMES)}")
        settings["material"] = material
    for key in _DIELECTRICS:
        if key in table:
            settings[key] = _dielectric(table[key], key_path + (key,), problems)
    if "channels" in table:
        settings["reading"].update(_name_table(table["channels"], _CHANNEL_OPTIONS,
                                               key_path + ("channels",), problems))
    if "units" in table:
        settings["reading"].update(_units(table["units"], key_path + ("units",), problems))
    for key, unit in (("excitation_current", "A"), ("field_value", "T")):
        if key not in table:
            continue
        value = table[key]
        if _is_number(value) and (value > 0 or key == "field_value"):
            settings["reading"][key] = float(value)
        else:
            problems.add(key_path + (key,), f"{key!r} must be a "
                         f"{'positive ' if key == 'excitation_current' else ''}number in {unit}, not {value!r}")
    if "kind" in table:
        if table["kind"] in _KINDS:
            settings["reading"]["kind"] = table["kind"]
        else:
            problems.add(key_path + ("kind",), f"'kind' must be one of {', '.join(_KINDS)}, "
                                               f"not {table['kind']!r}")
    for key, unit in _LIMITS.items():
        if key in table:
            settings[key] = _limits(table[key], key_path + (key,), unit, problems)
    return settings


_DIELECTRICS = ("dielectric", "top_dielectric", "bottom_dielectric")
_LIMITS = {"gate_range": "V", "field_range": "T", "gate_limits": "V", "top_gate_limits": "V",
           "bottom_gate_limits": "V"}
_SETTING_KEYS = ("material",) + _DIELECTRICS + ("channels", "units", "excitation_current", "field_value",
                                               "kind") + tuple(_LIMITS)
_DEVICE_KEYS = ("name", "maps", "cooldown", "notes") + _SETTING_KEYS
_TOP_KEYS = ("workflow", "analyses", "outputs", "defaults", "devices")
_ANALYSES = {"fan": True, "gates": True, "crosschecks": True}


def _resolve_maps(patterns, base_dir, key_path, problems, exclude):
    if isinstance(patterns, str):
        patterns = [patterns]
    if not isinstance(patterns, list) or not patterns:
        problems.add(key_path, "'maps' must be a list of paths or globs (relative to the workflow file)")
        return []
    found = []
    for index, pattern in enumerate(patterns):
        if not isinstance(pattern, str) or not pattern.strip():
            problems.add(key_path + (index,), f"each entry of 'maps' must be text, not {pattern!r}")
            continue
        full = Path(pattern).expanduser()
        full = Path(os.path.normpath(full if full.is_absolute() else base_dir / full))
        if full.is_dir():
            matches = find_map_files(full, exclude=exclude)
        else:
            matches = sorted(Path(p) for p in glob.glob(str(full), recursive=True)
                             if Path(p).is_file() and Path(p).suffix.lower() in MAP_SUFFIXES)
        if not matches:
            problems.add(key_path + (index,),
                         f"maps entry {pattern!r} matches no readable map file (looked for "
                         f"{', '.join(MAP_SUFFIXES)} under {full}); check the path")
        found.extend(matches)
    return found


def parse_workflow(text, path):
    """Validate workflow ``text`` (read from ``path``) and return a :class:`Workflow`.

    Map paths and the output folder are resolved relative to ``path``'s folder,
    and every map glob must match at least one file.  Raises
    :class:`~fanmap.errors.WorkflowError` listing every problem with its line.
    """
    path = Path(path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:  # its message already gives line and column
        raise WorkflowError(f"workflow {path} is not valid TOML: {exc}") from None
    problems = _Problems(path, text)
    base_dir = path.resolve().parent
    _check_keys(data, _TOP_KEYS, (), problems)

    def table(name):
        value = data.get(name, {})
        return value if _expect(value, "a table", (name,), problems) else {}

    info = table("workflow")
    _check_keys(info, ("name", "description"), ("workflow",), problems)
    for key in ("name", "description"):
        if key in info:
            _expect(info[key], "text", ("workflow", key), problems)

    analyses_table = table("analyses")
    _check_keys(analyses_table, tuple(_ANALYSES), ("analyses",), problems)
    analyses = dict(_ANALYSES)
    for key in _ANALYSES:
        if key in analyses_table and _expect(analyses_table[key], "true/false", ("analyses", key), problems):
            analyses[key] = analyses_table[key]
    if not any(analyses.values()):
        problems.add(("analyses",), "every analysis is switched off; enable fan, gates or crosschecks")

    outputs = table("outputs")
    _check_keys(outputs, ("directory", "figures", "summary"), ("outputs",), problems)
    directory = base_dir / f"{path.stem}-results"
    if "directory" in outputs and _expect(outputs["directory"], "text", ("outputs", "directory"), problems):
        directory = Path(outputs["directory"]).expanduser()
        directory = directory if directory.is_absolute() else base_dir / directory
    flags = {}
    for key in ("figures", "summary"):
        flags[key] = outputs.get(key, True)
        if key in outputs:
            _expect(outputs[key], "true/false", ("outputs", key), problems)

    empty = dict({"material": "auto", "reading": {}}, **{key: None for key in _DIELECTRICS + tuple(_LIMITS)})
    defaults_table = table("defaults")
    _check_keys(defaults_table, _SETTING_KEYS, ("defaults",), problems)
    defaults = _settings(defaults_table, ("defaults",), problems, empty)

    devices_list = data.get("devices")
    devices, seen_maps = [], {}
    if not isinstance(devices_list, list) or not devices_list:
        problems.add(("devices",), "the workflow needs at least one [[devices]] table with "
                                   "'name' and 'maps'")
        devices_list = []
    for index, entry in enumerate(devices_list):
        key_path = ("devices", index)
        if not isinstance(entry, dict):
            problems.add(key_path, "each devices entry must be a table ([[devices]])")
            continue
        _check_keys(entry, _DEVICE_KEYS, key_path, problems)
        name = entry.get("name")
        for key in ("cooldown", "notes"):
            if key in entry:
                _expect(entry[key], "text", key_path + (key,), problems)
        if name is None:
            problems.add(key_path, f"[[devices]] #{index + 1} needs a 'name'")
        else:
            # A device may have several entries: one per cooldown, or per file format.
            _expect(name, "text", key_path + ("name",), problems)
        settings = _settings(entry, key_path, problems, defaults)
        if "maps" not in entry:
            problems.add(key_path, f"[[devices]] #{index + 1} needs 'maps' (paths or globs)")
            maps = []
        else:
            maps = _resolve_maps(entry["maps"], base_dir, key_path + ("maps",), problems,
                                 exclude=[directory])
        unique = []
        for map_path in maps:
            owner = seen_maps.get(map_path.resolve())
            if owner is not None and owner != index:
                problems.add(key_path + ("maps",), f"map {map_path} is also listed by "
                                                   f"[[devices]] #{owner + 1}; give each map one device")
            elif owner is None:
                seen_maps[map_path.resolve()] = index
                unique.append(map_path)
        devices.append(Device(name=name if isinstance(name, str) else f"device-{index + 1}",
                              maps=unique, settings=settings,
                              cooldown=entry.get("cooldown") if isinstance(entry.get("cooldown"), str) else None,
                              notes=entry.get("notes", "") if isinstance(entry.get("notes"), str) else ""))
    problems.raise_if_any()
    return Workflow(path=path, name=info.get("name", path.stem), description=info.get("description", ""),
                    analyses=analyses, output_directory=directory, figures=flags["figures"],
                    summary=flags["summary"], devices=devices)


def load_workflow(path):
    """Read and validate the workflow file at ``path`` (see the module docstring)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise WorkflowError(f"cannot read workflow {path}: {exc}") from None
    return parse_workflow(text, path)
