"""
Primary-flow model files (TOML) for ``geosp section``; profile stations and outputs.

The format is described in docs/flow-modelling.md. :func:`read_flow_model`
checks the whole file and reports every problem at once (file, key, what is
wrong, how to fix it); unknown keys get the nearest known one suggested.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from pathlib import Path

import numpy as np

from ..errors import InputError, InputErrors, format_rows
from ..models import FlowFixed, FlowModel, FlowRegion, FlowSource
from .atomic import atomic_path

__all__ = ["read_flow_model", "read_section_stations", "write_flow_profile"]

WATER_DENSITY_KG_M3 = 1000.0
GRAVITY_M_S2 = 9.81
DEFAULT_VISCOSITY_PA_S = 1e-3  # water near 20 °C (common practice value)
MAX_CELLS = 3_000_000

TOP_KEYS = ("title", "mesh", "background", "region", "source", "fixed", "heat", "profile")
MESH_KEYS = ("x_m", "y_m", "depth_m", "cell_m", "padding_factor", "padding_m")
PROPERTY_KEYS = ("sigma_s_m", "c_p_v_pa", "c_t_v_k", "hydraulic_conductivity_m_s",
                 "permeability_m2", "viscosity_pa_s", "thermal_conductivity_w_m_k")
SHAPE_KEYS = ("polygon", "box")
REGION_KEYS = ("name",) + SHAPE_KEYS + PROPERTY_KEYS
SOURCE_KEYS = ("name", "point", "line", "polygon", "box", "rate_m3_s", "power_w",
               "fluid_temperature_k")
FIXED_KEYS = ("name",) + SHAPE_KEYS + ("pressure_pa", "temperature_k")
HEAT_KEYS = ("advection", "fluid_heat_capacity_j_m3_k")
PROFILE_KEYS = ("x_m", "y_m", "spacing_m", "origin_xy", "azimuth_deg", "crs")
BACKGROUND_DEFAULTS = {"c_p_v_pa": 0.0, "c_t_v_k": 0.0, "thermal_conductivity_w_m_k": 2.5,
                       "hydraulic_conductivity_m_s": 1e-7}


class _Checker:
    """Collects problems with their location in the file."""

    def __init__(self, path):
        self.path = path
        self.problems = []

    def add(self, where, problem, fix):
        self.problems.append(InputError(self.path, problem, fix, where=where))

    def keys(self, table, allowed, where):
        for key in table:
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.5)
                hint = f"Did you mean '{close[0]}'?" if close else \
                    f"Known keys: {', '.join(allowed)}."
                self.add(where, f"unknown key '{key}'.", hint)

    def number(self, table, key, where, *, positive=False, default=None, required=False):
        if key not in table:
            if required:
                self.add(where, f"'{key}' is missing.", "Add it (units in its name).")
            return default
        value = table[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)) or \
                not math.isfinite(value):
            self.add(where, f"'{key}' = {value!r} is not a number.", "Give a finite number.")
            return default
        if positive and value <= 0:
            self.add(where, f"'{key}' = {value!r} must be positive.", "Give a value above 0.")
            return default
        return float(value)

    def points(self, value, key, where, *, dims, count=None, minimum=None):
        try:
            array = np.asarray(value, dtype=float)
        except (TypeError, ValueError):
            array = None
        ok = array is not None and array.ndim == 2 and array.shape[1] == dims and \
            np.all(np.isfinite(array))
        if ok and count is not None:
            ok = array.shape[0] == count
        if ok and minimum is not None:
            ok = array.shape[0] >= minimum
        if not ok:
            n = f"{count}" if count else f"at least {minimum}"
            example = "[[x, z], ...]" if dims == 2 else "[[x, y, z], ...]"
            self.add(where, f"'{key}' must be a list of {n} points {example} in m.",
                     "Write each vertex as a list of numbers.")
            return None
        if np.any(array[:, -1] < 0):
            self.add(where, f"'{key}' has a negative depth.",
                     "Depths (the last coordinate) are positive down from the surface.")
            return None
        return array

    def box(self, value, where):
        array = np.asarray(value, dtype=float) if isinstance(value, list) else None
        if array is None or array.shape != (6,) or not np.all(np.isfinite(array)) or \
                not (array[0] < array[1] and array[2] < array[3] and 0 <= array[4] < array[5]):
            self.add(where, "'box' must be [x0, x1, y0, y1, z0, z1] in m with x0 < x1, "
                     "y0 < y1 and 0 <= z0 < z1.", "Correct the box corners (z positive down).")
            return None
        return array

    def pair(self, table, key, where, *, required=True):
        if key not in table:
            if required:
                self.add(where, f"'{key}' is missing.", "Give it as [start, end] in m.")
            return None
        value = table[key]
        ok = isinstance(value, list) and len(value) == 2 and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
        if not ok or not value[0] < value[1]:
            self.add(where, f"'{key}' = {value!r} must be [start, end] with start < end.",
                     "Give two numbers in m, the smaller first.")
            return None
        return (float(value[0]), float(value[1]))


def _shape(check, table, where, ndim):
    if ndim == 2:
        if "box" in table:
            check.add(where, "'box' is for 3-D models.", "Use 'polygon' = [[x, z], ...].")
            return None
        if "polygon" not in table:
            check.add(where, "'polygon' is missing.", "Give the vertices [[x, z], ...] in m.")
            return None
        return check.points(table["polygon"], "polygon", where, dims=2, minimum=3)
    if "polygon" in table:
        check.add(where, "'polygon' is for sections.", "Use 'box' = [x0, x1, y0, y1, z0, z1].")
        return None
    if "box" not in table:
        check.add(where, "'box' is missing.", "Give [x0, x1, y0, y1, z0, z1] in m.")
        return None
    return check.box(table["box"], where)


def _properties(check, table, where, base):
    values = {}
    sigma = check.number(table, "sigma_s_m", where, positive=True, required=base is None)
    values["sigma_s_m"] = sigma if sigma is not None else (base or {}).get("sigma_s_m", 1.0)
    for key in ("c_p_v_pa", "c_t_v_k"):
        fallback = BACKGROUND_DEFAULTS[key] if base is None else base[key]
        values[key] = check.number(table, key, where, default=fallback)
    fallback = BACKGROUND_DEFAULTS["thermal_conductivity_w_m_k"] if base is None else \
        base["thermal_conductivity_w_m_k"]
    values["thermal_conductivity_w_m_k"] = check.number(
        table, "thermal_conductivity_w_m_k", where, positive=True, default=fallback)
    hydraulic = check.number(table, "hydraulic_conductivity_m_s", where, positive=True)
    permeability = check.number(table, "permeability_m2", where, positive=True)
    viscosity = check.number(table, "viscosity_pa_s", where, positive=True)
    if hydraulic is not None and (permeability is not None or viscosity is not None):
        check.add(where, "give either 'hydraulic_conductivity_m_s' or 'permeability_m2' "
                  "(with 'viscosity_pa_s'), not both.", "Delete one of them.")
    if hydraulic is not None:
        mobility = hydraulic / (WATER_DENSITY_KG_M3 * GRAVITY_M_S2)
    elif permeability is not None:
        mobility = permeability / (viscosity or DEFAULT_VISCOSITY_PA_S)
    elif base is None:
        mobility = BACKGROUND_DEFAULTS["hydraulic_conductivity_m_s"] / (
            WATER_DENSITY_KG_M3 * GRAVITY_M_S2)
    else:
        mobility = base["mobility_m2_pa_s"]
    values["mobility_m2_pa_s"] = mobility
    return values


def _table_list(check, data, key):
    items = data.get(key, [])
    if isinstance(items, dict):
        items = [items]
    if not isinstance(items, list) or not all(isinstance(i, dict) for i in items):
        check.add(f"[[{key}]]", f"'{key}' must be a list of tables.", f"Write each as [[{key}]].")
        return []
    return items


def read_flow_model(path):
    """
    Read and check a primary-flow model file (TOML).

    Parameters
    ----------
    path : str or Path
        The model file; see docs/flow-modelling.md for its keys.

    Returns
    -------
    model : FlowModel
        Regions with every property resolved (unset ones inherit from
        ``[background]``; a hydraulic conductivity K becomes k/η = K/(ρ_w g)
        with ρ_w = 1000 kg/m³ and g = 9.81 m/s²).

    Raises
    ------
    InputError
        If the file is missing or not TOML, or any key is unknown, missing
        or out of range (all problems are reported together).
    """
    path = Path(path)
    if not path.exists():
        raise InputError(path, "the model file does not exist.", "Check the path.")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as err:
        raise InputError(path, f"is not valid TOML ({err}).",
                         "Fix the syntax; see docs/examples/upflow_section.toml.") from None
    check = _Checker(path)
    check.keys(data, TOP_KEYS, "top level")
    mesh = data.get("mesh")
    if not isinstance(mesh, dict):
        raise InputError(path, "the [mesh] table is missing.",
                         "Add [mesh] with x_m, depth_m and cell_m.")
    check.keys(mesh, MESH_KEYS, "[mesh]")
    x_m = check.pair(mesh, "x_m", "[mesh]")
    y_m = check.pair(mesh, "y_m", "[mesh]", required=False)
    ndim = 3 if "y_m" in mesh else 2
    depth = check.number(mesh, "depth_m", "[mesh]", positive=True, required=True)
    cell = check.number(mesh, "cell_m", "[mesh]", positive=True, required=True)
    factor = check.number(mesh, "padding_factor", "[mesh]", positive=True, default=1.3)
    if factor is not None and not 1.0 < factor <= 2.0:
        check.add("[mesh]", f"'padding_factor' = {factor} is outside (1, 2].",
                  "Use about 1.3.")
    padding = check.number(mesh, "padding_m", "[mesh]", positive=True)
    if None not in (x_m, depth, cell) and (ndim == 2 or y_m is not None):
        cells = (x_m[1] - x_m[0]) / cell * depth / cell
        if ndim == 3:
            cells *= (y_m[1] - y_m[0]) / cell
        if cells > MAX_CELLS:
            check.add("[mesh]", f"the core would have about {cells:,.0f} cells.",
                      f"Use a larger cell_m (limit {MAX_CELLS:,} cells).")
    background_table = data.get("background", {})
    if not isinstance(background_table, dict):
        check.add("[background]", "must be a table.", "Write [background] with sigma_s_m.")
        background_table = {}
    if not background_table:
        check.add("[background]", "the [background] table is missing.",
                  "Add [background] with at least sigma_s_m.")
    check.keys(background_table, PROPERTY_KEYS, "[background]")
    base = _properties(check, background_table, "[background]", None)
    background = FlowRegion("background", None, **base)

    regions = []
    for k, table in enumerate(_table_list(check, data, "region")):
        name = str(table.get("name", f"region {k + 1}"))
        where = f"[[region]] {k + 1} ({name})"
        check.keys(table, REGION_KEYS, where)
        shape = _shape(check, table, where, ndim)
        regions.append(FlowRegion(name, shape, **_properties(check, table, where, base)))

    sources = []
    for k, table in enumerate(_table_list(check, data, "source")):
        name = str(table.get("name", f"source {k + 1}"))
        where = f"[[source]] {k + 1} ({name})"
        check.keys(table, SOURCE_KEYS, where)
        kinds = [key for key in ("point", "line", "polygon", "box") if key in table]
        strengths = [key for key in ("rate_m3_s", "power_w") if key in table]
        if len(kinds) != 1:
            check.add(where, "needs exactly one of 'point', 'line', 'polygon' or 'box'.",
                      "Give the source geometry once.")
            continue
        if len(strengths) != 1:
            check.add(where, "needs exactly one of 'rate_m3_s' (fluid) or 'power_w' (heat).",
                      "Give the strength once; per metre along strike in sections.")
            continue
        strength = check.number(table, strengths[0], where)
        kind = kinds[0]
        if kind == "point":
            geometry = check.points([table["point"]], "point", where, dims=ndim, count=1)
            geometry = None if geometry is None else geometry[0]
        elif kind == "line":
            geometry = check.points(table["line"], "line", where, dims=ndim, count=2)
        else:
            geometry = _shape(check, table, where, ndim)
        fluid_t = check.number(table, "fluid_temperature_k", where, default=0.0)
        if "fluid_temperature_k" in table and strengths[0] != "rate_m3_s":
            check.add(where, "'fluid_temperature_k' belongs to fluid sources.",
                      "Use it with rate_m3_s, or delete it.")
        if geometry is None or strength is None:
            continue
        equation = "pressure" if strengths[0] == "rate_m3_s" else "heat"
        sources.append(FlowSource(name, equation, "region" if kind in SHAPE_KEYS else kind,
                                  geometry, strength, fluid_temperature_k=fluid_t or 0.0))

    fixed = []
    for k, table in enumerate(_table_list(check, data, "fixed")):
        name = str(table.get("name", f"fixed {k + 1}"))
        where = f"[[fixed]] {k + 1} ({name})"
        check.keys(table, FIXED_KEYS, where)
        values = [key for key in ("pressure_pa", "temperature_k") if key in table]
        if len(values) != 1:
            check.add(where, "needs exactly one of 'pressure_pa' or 'temperature_k'.",
                      "Give the value held fixed (excess over the surface value).")
            continue
        value = check.number(table, values[0], where)
        shape = _shape(check, table, where, ndim)
        if value is not None and shape is not None:
            fixed.append(FlowFixed(name, "pressure" if values[0] == "pressure_pa" else "heat",
                                   shape, value))

    heat = data.get("heat", {})
    check.keys(heat, HEAT_KEYS, "[heat]")
    advection = heat.get("advection", False)
    if not isinstance(advection, bool):
        check.add("[heat]", f"'advection' = {advection!r} must be true or false.",
                  "Write advection = true to carry heat with the Darcy flux.")
        advection = False
    capacity = check.number(heat, "fluid_heat_capacity_j_m3_k", "[heat]", positive=True,
                            default=4.18e6)

    profile = data.get("profile", {})
    check.keys(profile, PROFILE_KEYS, "[profile]")
    profile_x = check.pair(profile, "x_m", "[profile]", required=False)
    spacing = check.number(profile, "spacing_m", "[profile]", positive=True)
    profile_y = check.number(profile, "y_m", "[profile]", default=0.0)
    azimuth = check.number(profile, "azimuth_deg", "[profile]", default=90.0)
    origin = profile.get("origin_xy")
    if origin is not None:
        pts = check.points([origin], "origin_xy", "[profile]", dims=2, count=1)
        origin = None if pts is None else (float(pts[0, 0]), float(pts[0, 1]))
    crs = profile.get("crs", "")
    if not isinstance(crs, str):
        check.add("[profile]", "'crs' must be a string such as \"EPSG:32611\".", "Quote it.")
        crs = ""
    if origin is not None and not crs:
        check.add("[profile]", "'origin_xy' needs 'crs'.", "Add crs = \"EPSG:...\" (projected).")
    if profile_y and ndim == 2:
        check.add("[profile]", "'y_m' is for 3-D models.", "Delete it.")

    if check.problems:
        raise InputErrors(check.problems)
    return FlowModel(
        ndim=ndim, core_x_m=x_m, core_y_m=y_m, depth_m=depth, cell_m=cell,
        padding_factor=factor, padding_m=padding, background=background,
        regions=tuple(regions), sources=tuple(sources), fixed=tuple(fixed),
        profile_x_m=profile_x, profile_spacing_m=spacing, profile_y_m=profile_y,
        heat_advection=advection, fluid_heat_capacity_j_m3_k=capacity,
        title=str(data.get("title", "")), source_path=str(path),
        profile_origin_xy=origin, profile_azimuth_deg=azimuth, crs=crs,
    )


def read_section_stations(path):
    """
    Read observed SP along a model profile from CSV.

    Parameters
    ----------
    path : str or Path
        CSV with columns ``x_m`` (position along the profile, m, the model's
        x axis) and ``sp_mv`` (observed SP, mV).

    Returns
    -------
    stations : tuple of arrays
        ``(x_m, sp_mv)``, as ``run_flow_model(..., stations=...)`` takes it.

    Raises
    ------
    InputError
        If the file or a column is missing, or values are blank or not numbers
        (every bad line listed, counting the header as line 1).
    """
    import pandas as pd

    path = Path(path)
    if not path.exists():
        raise InputError(path, "the stations file does not exist.", "Check the path.")
    frame = pd.read_csv(path)
    missing = [c for c in ("x_m", "sp_mv") if c not in frame.columns]
    if missing:
        hints = []
        for name in missing:
            close = difflib.get_close_matches(name, [str(c) for c in frame.columns], n=1,
                                              cutoff=0.5)
            if close:
                hints.append(f"'{close[0]}' for '{name}'?")
        raise InputError(path, f"column {', '.join(repr(m) for m in missing)} is missing.",
                         ("Did you mean " + " ".join(hints)) if hints else
                         "Name the columns x_m (m along the profile) and sp_mv (mV).")
    x = pd.to_numeric(frame["x_m"], errors="coerce").to_numpy(dtype=float)
    sp = pd.to_numeric(frame["sp_mv"], errors="coerce").to_numpy(dtype=float)
    bad = ~(np.isfinite(x) & np.isfinite(sp))
    if bad.any():
        raise InputError(path, "x_m or sp_mv is blank or not a number at "
                         f"{format_rows([f'line {i + 2}' for i in np.flatnonzero(bad)])}.",
                         "Fix or delete these rows; blanks are never read as 0.")
    return x, sp


def _profile_table(result):
    import pandas as pd

    rows = [pd.DataFrame({"point": "profile", "x_m": result.profile_x_m,
                          "model_mv": result.profile_mv})]
    if result.station_x_m is not None:
        rows.append(pd.DataFrame({"point": "station", "x_m": result.station_x_m,
                                  "model_mv": result.predicted_mv,
                                  "sp_mv": result.observed_mv,
                                  "residual_mv": result.residual_mv}))
    return pd.concat(rows, ignore_index=True)


def write_flow_profile(result, path):
    """
    Write the surface SP profile (and stations) of a flow result.

    Parameters
    ----------
    result : geosp.flow.FlowResult
    path : str or Path
        ``.csv`` (always possible) or ``.gpkg`` (layer ``section_profile``;
        needs ``[profile] origin_xy`` and ``crs`` in the model to place the
        points on the map). Columns: ``point`` ("profile" or "station"),
        ``x_m``, ``model_mv`` and, for stations, ``sp_mv`` and ``residual_mv``.

    Raises
    ------
    InputError
        If a GeoPackage is asked for but the model is not georeferenced.
    """
    path = Path(path)
    table = _profile_table(result)
    if path.suffix.lower() == ".gpkg":
        model = result.model
        if model.profile_origin_xy is None or not model.crs:
            raise InputError(model.source_path or path, "the profile has no map position.",
                             "Add origin_xy and crs to [profile], or write a .csv.")
        import geopandas as gpd

        azimuth = np.radians(model.profile_azimuth_deg)
        e0, n0 = model.profile_origin_xy
        x = table["x_m"].to_numpy()
        geometry = gpd.points_from_xy(e0 + x * np.sin(azimuth), n0 + x * np.cos(azimuth))
        frame = gpd.GeoDataFrame(table, geometry=geometry, crs=model.crs)
        with atomic_path(path) as tmp:
            frame.to_file(tmp, layer="section_profile", driver="GPKG")
        return path
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False, float_format="%.6g")
    return path
