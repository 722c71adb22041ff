"""
Write docs/project-file.md and docs/commands.md from the code.

The project-file reference lists every section and key of a geosp project
file with its default and meaning:

- the input sections ([survey], [stations], [readings], [faults], [dem]) and
  their defaults come from ``geosp.io.project.INPUT_SECTIONS`` and
  ``REQUIRED``; their descriptions are written below (``INPUT_HELP``);
- the stage sections ([reduce], [grid], [detect], [fit], [publish]) come from
  ``geosp.pipeline.stage_defaults()``, and each key's description from the
  numpydoc "Parameters" section of the stage entry function that owns it.

The command reference holds the usage text of every ``geosp`` command, from
the argparse parser in ``geosp.cli``.

Run from the repository root::

    python docs/make_reference.py            # rewrite both files
    python docs/make_reference.py --check    # exit 1 if either is out of date

The output is deterministic: it depends only on the code, never on the time,
the machine or the terminal width.
"""

from __future__ import annotations

import argparse
import inspect
import os
import re
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
PROJECT_FILE_MD = HERE / "project-file.md"
COMMANDS_MD = HERE / "commands.md"

# Section -> the entry functions whose keyword-only options make its keys
# (the same functions geosp.pipeline.stage_defaults() reads).
STAGE_FUNCTIONS = {
    "reduce": ("geosp.reduce:reduce_survey",),
    "grid": ("geosp.grid:grid_stations",),
    "detect": ("geosp.segments:make_segments", "geosp.interpret:detect_sources"),
    "fit": ("geosp.interpret:fit_sources",),
    "publish": ("geosp.pipeline:publish_options",),
}

SECTION_INTRO = {
    "survey": "Name and working coordinate reference system of the survey.",
    "stations": (
        "The station file: total-field SP values, or only the station positions when the values "
        "come from `[readings]`. Column names are case-sensitive."),
    "readings": (
        "Optional raw gradient (dipole) readings, for example a leapfrog survey. geosp corrects "
        "them for electrode offset and drift, integrates them along the lines, closes the loops by "
        "network adjustment and ties everything to the reference station."),
    "faults": "The mapped fault traces (LineString or MultiLineString features).",
    "dem": "Optional digital elevation model, for station elevations and the terrain correction.",
    "reduce": "Reduction of the readings to total field: drift, ties, loops, terrain, outliers.",
    "grid": "Gridding of the reduced stations into `sp_grid.tif` (for display and QC; fits use the stations).",
    "detect": ("Cutting the faults into segments, and selecting the sources of the survey model one "
               "at a time against a calibrated false-alarm rate (each one fitted as it is added)."),
    "fit": "Uncertainties of the selected sources, from the whole survey model at once.",
    "publish": "The web map and the report.",
}

# Descriptions of the input-section keys (contract: "Inputs" and "Project file").
INPUT_HELP = {
    "survey": {
        "name": "Survey name shown on the map and the report. Default: the project file's name.",
        "crs": ("Working CRS, an EPSG code such as `\"EPSG:32633\"` or a WKT string; it must be "
                "projected (metres). Default: the UTM zone of the stations' centroid, chosen "
                "automatically and reported by `geosp check`. Every distance geosp reports is in "
                "metres in this CRS."),
    },
    "stations": {
        "path": ("Station file: ESRI Shapefile (`.shp`, or zipped `.zip`), GeoPackage (`.gpkg`), "
                 "GeoJSON (`.geojson`) or CSV (`.csv`). Vector files must carry their CRS (a `.prj` "
                 "beside a shapefile). Relative to the project file."),
        "layer": "GeoPackage layer name; optional when the file holds one layer.",
        "id": "Column holding the station id (text). Repeated ids are reoccupations of the same station.",
        "value_mv": ("Column holding the SP value in mV: total field relative to a reference station. "
                     "Omit it when the values come from `[readings]`."),
        "line": "Column holding the survey line id (optional; used for outlier checks, cross-validation and profiles).",
        "elevation": "Column holding the station elevation in m (optional; the `[dem]`, when given, is used instead).",
        "time": ("Column holding the reading time, ISO 8601 (`2026-05-11T09:30:00`). Needed when a "
                 "station id repeats with different values (base or tie reoccupations)."),
        "sigma_mv": "Column holding each station's 1-sigma uncertainty in mV (optional; blank = unknown).",
        "lon": "CSV only: longitude column, WGS 84 degrees. Default `lon` when neither x/y nor lon/lat is given.",
        "lat": "CSV only: latitude column, WGS 84 degrees. Default `lat`.",
        "x": "CSV only: easting column in the projected CRS named by `crs` (instead of lon/lat).",
        "y": "CSV only: northing column in the projected CRS named by `crs`.",
        "crs": "CSV only, with `x`/`y`: their CRS (EPSG code or WKT, projected, metres).",
        "value_scale": ("Multiply every value by this number. Use 1000 when the file holds volts; "
                        "geosp stops with an error when all values look like volts (below 2 in size)."),
    },
    "readings": {
        "path": "CSV file of gradient readings, one reading per row, in time order.",
        "line": "Column holding the line id of each reading.",
        "from": "Column holding the station id of the `from` electrode.",
        "to": "Column holding the station id of the `to` electrode.",
        "time": "Column holding the reading time, ISO 8601 (local time without a zone is fine if it is consistent).",
        "value_mv": "Column holding the potential difference in mV: potential at `to` minus potential at `from`, as read.",
        "electrode_checks": ("Optional CSV of electrode checks (both electrodes side by side): a time "
                             "and the pair offset in mV. Used for the drift correction."),
        "checks_time": "Time column of the electrode-checks file (ISO 8601).",
        "checks_offset_mv": "Offset column of the electrode-checks file, mV.",
        "reference_station": ("Station whose potential is 0; every value is relative to it. "
                              "Default: the `from` station of the first reading."),
    },
    "faults": {
        "path": "Fault file: Shapefile, GeoPackage or GeoJSON of LineString/MultiLineString features, any CRS with a definition (reprojected to the working CRS).",
        "layer": "GeoPackage layer name; optional when the file holds one layer.",
        "id": "Column holding the fault id. Default: the feature order (1, 2, ...).",
        "dip_deg": "Column holding the mapped dip in degrees (0-90). Blank or NULL = unknown: the dip is fitted.",
        "dip_dir_deg": ("Column holding the mapped dip direction, degrees clockwise from grid north. "
                        "Blank = unknown: the fit searches both sides of the trace."),
    },
    "dem": {
        "path": ("Elevation raster in metres (GeoTIFF or any GDAL raster) with a CRS. It must cover "
                 "every station; give it a margin of several hundred metres."),
    },
}

_HEADER = re.compile(r"^([A-Za-z_*][A-Za-z0-9_, *]*?)\s*(?::\s*(.*))?$")


def _load(spec):
    import importlib

    module, name = spec.split(":")
    return getattr(importlib.import_module(module), name)


def _sections(doc):
    """Split a numpydoc docstring into ``{section title: [lines]}``."""
    lines = doc.splitlines()
    out, current = {}, None
    i = 0
    while i < len(lines):
        if i + 1 < len(lines) and lines[i].strip() and set(lines[i + 1].strip()) == {"-"} \
                and not lines[i].startswith(" "):
            current = lines[i].strip()
            out[current] = []
            i += 2
            continue
        if current is not None:
            out[current].append(lines[i])
        i += 1
    return out


def parse_parameters(func):
    """
    Read the numpydoc "Parameters" section of a function.

    Returns
    -------
    dict
        ``{name: (type text, description)}``. ``a, b : type`` lines give
        the same entry to each name; the description is the indented text
        below the line, joined into one paragraph per blank-line block.
    """
    doc = inspect.getdoc(func) or ""
    body = _sections(doc).get("Parameters", [])
    params, names, kind, text = {}, None, "", []

    def flush():
        if names:
            paragraphs = " ".join(line.strip() if line.strip() else "\n\n" for line in text)
            description = re.sub(r" *\n\n *", "\n\n", paragraphs).strip()
            for name in names:
                params[name] = (kind, description)

    for line in body:
        if line and not line.startswith(" "):
            flush()
            match = _HEADER.match(line.strip())
            head = match.group(1) if match else line.strip()
            kind = (match.group(2) or "").strip() if match else ""
            names = [n.strip().lstrip("*") for n in head.split(",") if n.strip()]
            text = []
        elif names is not None:
            text.append(line)
    flush()
    return params


def stage_options():
    """
    ``{section: [(key, default, type text, description, owner)]}`` for the stage sections.

    Keys and defaults come from :func:`geosp.pipeline.stage_defaults`;
    descriptions from the docstrings of the functions in
    :data:`STAGE_FUNCTIONS` (the first that documents the key).
    """
    from geosp.pipeline import stage_defaults

    out = {}
    for section, defaults in stage_defaults().items():
        funcs = [_load(spec) for spec in STAGE_FUNCTIONS[section]]
        rows = []
        for key, default in defaults.items():
            kind, description, owner = "", "", ""
            for func in funcs:
                if key not in inspect.signature(func).parameters:
                    continue
                owner = owner or f"{func.__module__}.{func.__name__}"
                entry = parse_parameters(func).get(key)
                if entry and entry[1]:
                    kind, description = entry
                    owner = f"{func.__module__}.{func.__name__}"
                    break
            rows.append((key, default, kind, description, owner))
        out[section] = rows
    return out


def missing_descriptions():
    """``[(section, key, owner function)]`` of stage options without a docstring description."""
    return [(section, key, owner) for section, rows in stage_options().items()
            for key, _, _, description, owner in rows if not description.strip()]


def _toml_value(value):
    if value is None:
        return "not set"
    if isinstance(value, bool):
        return "`true`" if value else "`false`"
    if isinstance(value, str):
        return f'`"{value}"`' if value else '`""` (not given)'
    if isinstance(value, (list, tuple)):
        return "`[" + ", ".join(_toml_value(v).strip("`") for v in value) + "]`"
    if isinstance(value, float) and value.is_integer() and abs(value) < 1e15:
        return f"`{value:.1f}`"
    return f"`{value}`"


def _markdown(text):
    """numpydoc/reST inline markup to Markdown: ``code``, :func:`name`, [Key]_ citations."""
    text = re.sub(r"``(.+?)``", r"`\1`", text)
    text = re.sub(r":(?:func|class|data|mod|meth):`~?(.+?)`", r"`\1`", text)
    return re.sub(r"\[([A-Za-z]+[0-9]{4}[a-z]?)\]_", r"[[\1]](references.md#\1)", text)


def _cell(text):
    return _markdown(text).replace("|", "\\|").replace("\n\n", "<br><br>").replace("\n", " ")


def render_project_file():
    """The Markdown text of docs/project-file.md."""
    from geosp.io.project import INPUT_SECTIONS, REQUIRED

    out = [
        "# Project file reference",
        "",
        "<!-- Generated by docs/make_reference.py from the code; do not edit by hand. -->",
        "",
        "A geosp project file is a [TOML](https://toml.io) file that describes one survey, so that "
        "a run can be repeated exactly. `geosp init` writes a commented template; the "
        "[tutorial](tutorial.md) walks through one. Rules:",
        "",
        "- Relative paths are relative to the project file.",
        "- Only `[stations]` and `[faults]` are required; every other key has a default.",
        "- An unknown section or key is an error that names the nearest known one.",
        "- A value of the wrong type (text where a number is expected, ...) is an error.",
        "- Strings need double quotes: `path = \"stations.shp\"`. Lists use brackets: "
        "`models = [\"fault_patch\"]`.",
        "- Options shown as `\"auto\"` or `\"cv\"` may also be given a number.",
        "- A default of `\"\"` means \"not given\".",
        "",
        "The shortest useful project file:",
        "",
        "```toml",
        "[stations]",
        'path = "stations.shp"',
        'id = "STN"',
        'value_mv = "SP_mV"',
        "",
        "[faults]",
        'path = "faults.gpkg"',
        "```",
        "",
        "Sections: " + ", ".join(f"[`[{s}]`](#{s})" for s in list(INPUT_SECTIONS) + list(STAGE_FUNCTIONS)) + ".",
        "",
    ]
    for section, keys in INPUT_SECTIONS.items():
        required = REQUIRED.get(section, ())
        out += [f"## [{section}]", "", SECTION_INTRO[section], ""]
        if section in ("readings", "dem"):
            out += ["The section is optional; when it is present, the keys marked *required* must be given.", ""]
        elif section in REQUIRED:
            out += ["The section is required.", ""]
        out += ["| key | default | meaning |", "|---|---|---|"]
        for key, default in keys.items():
            shown = "*required*" if key in required else _toml_value(default)
            out.append(f"| `{key}` | {shown} | {_cell(INPUT_HELP[section][key])} |")
        out.append("")
    for section, rows in stage_options().items():
        out += [f"## [{section}]", "", SECTION_INTRO[section], "",
                "| key | default | type | meaning |", "|---|---|---|---|"]
        for key, default, kind, description, _ in rows:
            kind = re.sub(r",?\s*optional$", "", kind)
            out.append(f"| `{key}` | {_toml_value(default)} | {_cell(kind)} | {_cell(description) or '(undocumented)'} |")
        out.append("")
    out += [
        "Notes:",
        "",
        "- `workers` and `scheduler` under `[fit]` are normally given on the command line "
        "(`--workers N`, `--scheduler tcp://HOST:PORT`); the command line wins. \"not set\" means "
        "all cores and no cluster.",
        "- The physics behind these options is in [concepts](concepts.md) and "
        "[concepts-physics](concepts-physics.md); the references in [references](references.md).",
        "",
    ]
    return "\n".join(out)


def _usage(parser, name):
    """Help text of one subcommand (or the top level when ``name`` is None) at a fixed width."""
    old = os.environ.get("COLUMNS")
    os.environ["COLUMNS"] = "100"
    try:
        if name is None:
            return parser.format_help()
        sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
        return sub.choices[name].format_help()
    finally:
        if old is None:
            del os.environ["COLUMNS"]
        else:
            os.environ["COLUMNS"] = old


def subcommands():
    """Names of every ``geosp`` subcommand, in the parser's order."""
    from geosp.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return list(sub.choices)


COMMAND_NOTES = {
    "demo": "Runs every stage on the bundled, invented demo area and writes every output into `--out`.",
    "run": ("Runs check, reduce, grid, detect, fit and publish in memory and writes every output. "
            "`--workers N` runs the segment fits in N processes; `--scheduler tcp://HOST:PORT` sends "
            "them to a Dask cluster instead (see the [tutorial](tutorial.md#many-segments-workers-and-a-dask-cluster))."),
    "check": ("Reads every input, validates it, reprojects it to the working CRS and prints a summary; "
              "writes nothing. Run it after every edit of the project file."),
    "reduce": ("Re-reads the inputs and re-runs the reduction. The later stages cached in the output "
               "folder are cleared; `geosp publish` (or `run`) recomputes whatever is missing."),
    "grid": ("Re-runs the gridding, reusing the reduction cached in the output folder (or running it "
             "first); cached detection and fits are cleared."),
    "detect": "Re-runs segmentation and detection, reusing the cached reduction; cached fits are cleared.",
    "fit": "Re-runs the source fits, reusing the cached detection; takes `--workers` and `--scheduler` like `run`.",
    "publish": ("Writes the map and the report, with the GeoPackage, rasters and run.json, from the cached "
                "stages; runs any stage that is missing first."),
    "forward": ("Predicted SP of the sources in a GeoPackage `sources` layer at the given stations: survey "
                "design and what-if. Without `--out` it prints a table; with `--out` ending in `.gpkg` or "
                "`.csv` it writes the stations with a `model_mv` column (mV; in a GeoPackage, layer `forward`). "
                "Sources must be in a projected CRS; CSV stations give `x`,`y` in that CRS or `lon`,`lat`. See the "
                "[tutorial](tutorial.md#survey-design-with-geosp-forward)."),
    "init": "Writes the commented project-file template (default `project.toml`); never overwrites a file.",
}


def render_commands():
    """The Markdown text of docs/commands.md."""
    from geosp.cli import build_parser

    parser = build_parser()
    out = [
        "# Command reference",
        "",
        "<!-- Generated by docs/make_reference.py from geosp/cli.py; do not edit by hand. -->",
        "",
        "Every command is `geosp COMMAND ...`; `geosp COMMAND --help` prints the same text as below.",
        "",
        "```text",
        _usage(parser, None).rstrip(),
        "```",
        "",
        "## Exit codes",
        "",
        "| code | meaning |",
        "|---|---|",
        "| 0 | success |",
        "| 2 | bad input or bad options: one message names the file, the row or feature, what is wrong "
        "and how to fix it (no traceback); also argparse usage errors |",
        "| 1 | an internal error (a bug): re-run with `--debug` for the traceback and report it |",
        "| 130 | interrupted (Ctrl-C); files already written are complete, nothing half-written is kept |",
        "",
        "## Progress, `--quiet` and `--debug`",
        "",
        "- Long stages (detect, fit) draw a progress bar on standard error when it is a terminal; "
        "in a pipe or a log file there is no bar.",
        "- `--quiet` (`-q`) turns off the progress bars and the summaries printed on standard output; "
        "errors are still printed on standard error and the exit code is unchanged.",
        "- `--debug` shows the full Python traceback instead of the one-line message, for bug reports.",
        "- Warnings (for example a fault outside the survey, a large electrode offset, a blunder "
        "found by the loop adjustment) are collected into `run.json` and the report; `geosp check` "
        "lists them.",
        "- Every output is written atomically: a failed run never leaves a half-written file where "
        "a good one was.",
        "",
        "## Commands",
        "",
    ]
    for name in subcommands():
        out += [f"### geosp {name}", "", COMMAND_NOTES.get(name, ""), "", "```text",
                _usage(parser, name).rstrip(), "```", ""]
    return "\n".join(out)


def outputs():
    """``{path: text}`` of every generated file."""
    return {PROJECT_FILE_MD: render_project_file(), COMMANDS_MD: render_commands()}


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    stale = []
    for path, text in outputs().items():
        if argv[:1] == ["--check"]:
            if not path.exists() or path.read_text(encoding="utf-8") != text:
                stale.append(path.name)
        else:
            path.write_text(text, encoding="utf-8")
    missing = missing_descriptions()
    for section, key, owner in missing:
        print(f"undocumented option [{section}] {key} (add it to the docstring of {owner})", file=sys.stderr)
    if stale:
        print(f"out of date: {', '.join(stale)}; run python docs/make_reference.py", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(HERE.parent))
    sys.exit(main())
