"""
The project file (TOML): one file that describes a survey so a run is reproducible.

The input sections ([survey], [stations], [readings], [faults], [dem]) have
fixed keys (contract.md). The stage sections ([reduce], [grid], [detect],
[fit], [publish]) take the keyword options of each stage's entry function;
the caller passes their defaults so this module stays below the steps.
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputErrors, OptionError

# Keys of the input sections, with defaults. "" means "not given".
INPUT_SECTIONS = {
    "survey": {"name": "", "crs": ""},
    "stations": {
        "path": "", "layer": "", "id": "", "value_mv": "", "line": "", "elevation": "",
        "time": "", "sigma_mv": "", "lon": "", "lat": "", "x": "", "y": "", "crs": "",
        "value_scale": 1.0,
    },
    "readings": {
        "path": "", "line": "", "from": "", "to": "", "time": "", "value_mv": "",
        "electrode_checks": "", "checks_time": "time", "checks_offset_mv": "offset_mv",
        "reference_station": "",
    },
    "faults": {"path": "", "layer": "", "id": "", "dip_deg": "", "dip_dir_deg": ""},
    "dem": {"path": ""},
}
REQUIRED = {
    "stations": ("path", "id"),
    "readings": ("path", "line", "from", "to", "time", "value_mv"),
    "faults": ("path",),
    "dem": ("path",),
}
PATH_KEYS = {("stations", "path"), ("readings", "path"), ("readings", "electrode_checks"),
             ("faults", "path"), ("dem", "path")}
STAGE_SECTIONS = ("reduce", "grid", "detect", "fit", "publish")
# Stage options whose default "auto" may also be replaced by true or false.
BOOL_OR_AUTO = ("terrain", "fit_sigma_ratio")


@dataclass(frozen=True)
class Project:
    """A parsed project file: input sections with paths resolved, stage options with defaults."""

    path: Path
    text: str
    survey: dict
    stations: dict
    faults: dict
    readings: dict | None = None
    dem: dict | None = None
    stages: dict = field(default_factory=dict)  # section -> {option: value}

    @property
    def base_dir(self):
        return self.path.parent

    def input_paths(self):
        """Every input file named by the project (resolved), the project file first."""
        paths = [self.path]
        for section in (self.stations, self.readings, self.faults, self.dem):
            if not section:
                continue
            for key in ("path", "electrode_checks"):
                if section.get(key):
                    paths.append(Path(section[key]))
        return paths


def _suggest(word, options):
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.5)
    return f" Did you mean '{close[0]}'?" if close else ""


def _type_ok(value, default, *, auto=True):
    if default is None:
        return True
    if isinstance(default, bool):
        return isinstance(value, bool)
    if isinstance(default, (int, float)):
        return (isinstance(value, (int, float)) and not isinstance(value, bool)) or (auto and value == "auto")
    if isinstance(default, (list, tuple)):
        if not isinstance(value, list):
            return False
        if default and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in default):
            # A list of numbers stays a list of numbers.
            return all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
        return True
    if isinstance(default, str):
        # String defaults such as "auto" or "cv" stand for a choice; a number or a list may replace them.
        return isinstance(value, (str, int, float, list)) and not isinstance(value, bool)
    return True


def _shape_problem(key, value):
    """Rules that follow from an option's name: seeds, counts of steps, ranges (empty when fine)."""
    if key == "seed" and not (isinstance(value, int) and not isinstance(value, bool) and value >= 0):
        return "must be a whole number, 0 or more."
    if key.endswith("_range_deg") and isinstance(value, list) and len(value) != 2:
        return "must be two numbers, [lowest, highest]."
    if key.endswith("_steps") and isinstance(value, (int, float)) and not isinstance(value, bool) and value < 1:
        return "must be at least 1."
    if key == "tiles" and isinstance(value, str) and re.search(r"\{[{%#]", value):
        return "must use single braces, as in https://tiles.example/{z}/{x}/{y}.png."
    return ""


def _describe(default):
    if isinstance(default, bool):
        return "true or false"
    if isinstance(default, (int, float)):
        return "a number"
    if isinstance(default, (list, tuple)):
        return "a list such as [1, 2]"
    return "a string"


def read_project(path, *, stage_defaults=None):
    """
    Read and validate a project file.

    Parameters
    ----------
    path : str or Path
        The TOML project file.
    stage_defaults : dict, optional
        ``{section: {option: default}}`` for the stage sections, from the
        stage functions' signatures.

    Returns
    -------
    project : Project

    Raises
    ------
    InputError
        Missing file, TOML syntax error, unknown section or key (with the
        nearest known one), wrong value type, missing required key.
    """
    path = Path(path)
    stage_defaults = stage_defaults or {}
    if not path.exists():
        raise OptionError(path, "the project file does not exist.",
                          "Check the path, or write a template with 'geosp init PROJECT.toml'.")
    if path.is_dir():
        raise OptionError(path, "is a folder, not a project file.", "Pass the .toml file inside it.")
    text = path.read_text(encoding="utf-8-sig", errors="replace")  # a byte-order mark is not part of the text
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise OptionError(path, f"is not valid TOML ({err}).",
                          "Fix the syntax; strings need quotes, e.g. path = \"stations.shp\".") from None
    known_sections = {**INPUT_SECTIONS, **{s: stage_defaults.get(s, {}) for s in STAGE_SECTIONS}}
    problems = []
    for section, body in data.items():
        if section not in known_sections:
            problems.append(OptionError(path, f"unknown section [{section}].{_suggest(section, known_sections)}",
                                        f"Known sections: {', '.join('[' + s + ']' for s in known_sections)}."))
            continue
        if not isinstance(body, dict):
            problems.append(OptionError(path, f"'{section}' must be a section ([{section}]), not a value.",
                                        f"Write it as [{section}] followed by its keys."))
            continue
        defaults = known_sections[section]
        for key, value in body.items():
            if key not in defaults:
                known = ", ".join(sorted(defaults)) or "none"
                problems.append(OptionError(
                    path, f"unknown key '{key}' in [{section}].{_suggest(key, defaults)}",
                    f"Known keys in [{section}]: {known}."))
            elif not (_type_ok(value, defaults[key], auto=section in STAGE_SECTIONS)
                      or (key in BOOL_OR_AUTO and isinstance(value, bool))):
                problems.append(OptionError(
                    path, f"[{section}] {key} = {value!r} has the wrong type.",
                    f"Give {_describe(defaults[key])}" + (f" (default {defaults[key]!r})." if defaults[key] != "" else ".")))
            elif _shape_problem(key, value):
                problems.append(OptionError(path, f"[{section}] {key} = {value!r} {_shape_problem(key, value)}",
                                            f"Remove it to use the default ({defaults[key]!r})."))
            elif section == "stations" and key == "value_scale" and not (math.isfinite(value) and value != 0):
                problems.append(OptionError(path, f"[stations] value_scale = {value!r} must be a non-zero number.",
                                            "Use 1 for millivolts (the default) or 1000 for volts."))
    for section, key in sorted(PATH_KEYS):
        value = data.get(section, {}).get(key) if isinstance(data.get(section), dict) else None
        if isinstance(value, str) and "\x00" in value:
            problems.append(OptionError(path, f"[{section}] {key} contains a NUL character (\\u0000).",
                                        "Write the file name without it."))
    for section in ("stations", "faults"):
        if section not in data:
            problems.append(OptionError(path, f"the [{section}] section is missing.",
                                        "Every project needs [stations] and [faults]; see 'geosp init'."))
    for section, keys in REQUIRED.items():
        if section in data and isinstance(data[section], dict):
            for key in keys:
                if not data[section].get(key):
                    problems.append(OptionError(path, f"[{section}] needs '{key}'.",
                                                f"Add {key} = \"...\" to [{section}]."))
    if problems:
        raise InputErrors(problems)

    def resolved(section):
        if section not in data:
            return None
        merged = {**INPUT_SECTIONS[section], **data[section]}
        for sec, key in PATH_KEYS:
            if sec == section and merged.get(key):
                try:
                    merged[key] = str((path.parent / merged[key]).resolve())
                except (RuntimeError, OSError):  # a symbolic link that leads back to itself
                    raise OptionError(path.parent / merged[key], "is a symbolic link that leads back to itself "
                                      "(a link loop).", f"Point [{section}] {key} at the real file.") from None
        return merged

    stages = {}
    for section in STAGE_SECTIONS:
        options = dict(stage_defaults.get(section, {}))
        options.update(data.get(section, {}))
        stages[section] = options
    return Project(
        path=path.resolve(), text=text, survey=resolved("survey") or dict(INPUT_SECTIONS["survey"]),
        stations=resolved("stations"), faults=resolved("faults"), readings=resolved("readings"),
        dem=resolved("dem"), stages=stages,
    )


TEMPLATE = '''\
# geosp project file. Relative paths are relative to this file.
# Every option has a default; delete what you do not need.
# Reference: docs/project-file.md

[survey]
name = "My prospect"          # shown on the map and the report
# crs = "EPSG:32633"          # working CRS (metres); default: UTM zone of the stations

[stations]                    # total-field stations, or station positions for [readings]
path = "stations.shp"         # .shp (or zipped .zip), .gpkg, .geojson, .csv
# layer = "stations"          # GeoPackage: which layer (optional when there is one)
id = "STN"                    # station id column
value_mv = "SP_mV"            # SP in mV; omit when the values come from [readings]
# line = "LINE"               # survey line id column
# elevation = "ELEV"          # elevation column in m (else sampled from [dem])
# time = "TIME"               # ISO 8601; marks reoccupations of base/tie stations
# value_scale = 1.0           # multiply values by this (1000 if the file is in volts)
# CSV only: lon/lat in WGS 84 ...
# lon = "lon"
# lat = "lat"
# ... or projected x/y with their CRS:
# x = "easting"
# y = "northing"
# crs = "EPSG:32633"

# [readings]                  # raw gradient (dipole) readings, e.g. leapfrog
# path = "dipoles.csv"
# line = "LINE"
# from = "FROM"
# to = "TO"
# time = "TIME"               # ISO 8601
# value_mv = "DV_mV"          # potential at `to` minus potential at `from`, as read
# electrode_checks = "electrode_checks.csv"   # columns time, offset_mv
# reference_station = "A-001" # default: the first station read

[faults]
path = "faults.gpkg"
# layer = "faults"
# id = "FAULT"                # default: feature order
# dip_deg = "dip"             # mapped dip (degrees); unknown dips are fitted
# dip_dir_deg = "dip_dir"     # mapped dip direction (degrees clockwise from north)

# [dem]
# path = "dem.tif"            # any GDAL raster, elevation in m

# Stage options: see docs/project-file.md for every key and its default.
# [reduce]
# [grid]
# [detect]
# [fit]
# [publish]
'''


def write_template(path):
    """Write the commented project-file template; refuse to overwrite an existing file."""
    from ..errors import InputError

    path = Path(path)
    if path.exists():
        raise InputError(path, "already exists; geosp never overwrites a project file.",
                         "Choose another name, e.g. 'geosp init new_survey.toml'.")
    if path.suffix.lower() != ".toml":
        raise InputError(path, "a project file should end in .toml.", "Use a name such as survey.toml.")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(TEMPLATE, encoding="utf-8")
    return path
