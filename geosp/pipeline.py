"""
Chain the steps in memory: check -> reduce -> grid -> detect -> fit -> publish.

This module calls io/ to read and write but does no file I/O of its own.
The stage sections of the project file are the keyword options of the stage
entry functions, read from their signatures (one obvious place for each
option and its default).
"""

from __future__ import annotations

import inspect
import math
import logging
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from . import __version__
from .errors import InputError, InputErrors, format_rows
from .models import Stations, Survey

log = logging.getLogger(__name__)

# Options that are computed by the pipeline, not set by users.
_INTERNAL = {"progress", "station_spacing_m", "covariance", "network", "estimate_terrain", "keep_selection"}

# Faults farther than this from every station are out of reach.
FAULT_REACH_M = 2000.0

# A station farther than this from the median station position is a coordinate error.
FAR_STATION_M = 200_000.0


def _kwonly_defaults(func):
    out = {}
    for name, param in inspect.signature(func).parameters.items():
        if param.kind is inspect.Parameter.KEYWORD_ONLY and name not in _INTERNAL:
            default = param.default
            if isinstance(default, tuple):
                default = list(default)
            out[name] = default
    return out


def publish_options(*, title="", map=True, report=True, tiles="", tiles_attribution="", sp_range_mv="auto"):
    """
    Options of the [publish] section.

    Parameters
    ----------
    title : str
        Title of the map and report (default: the survey name).
    map, report : bool
        Write map.html / report.html.
    tiles : str
        Optional basemap tile URL template (``https://.../{z}/{x}/{y}.png``).
        Off by default so the map works offline.
    tiles_attribution : str
        Attribution text shown with the tiles.
    sp_range_mv : float or "auto"
        Half-range of the map's SP colour scale (mV): blue at −value, red at
        +value. "auto" (default) takes the 98th percentile of |SP| rounded
        up to a round number, which differs from run to run; give a number
        (for example 150) to compare the maps of several runs or surveys.
    """
    return dict(title=title, map=map, report=report, tiles=tiles, tiles_attribution=tiles_attribution,
                sp_range_mv=sp_range_mv)


def stage_defaults():
    """``{section: {option: default}}`` for every stage section, from the stage signatures."""
    from . import grid, interpret, reduce, segments

    detect_defaults = _kwonly_defaults(segments.make_segments)
    detect_defaults.update(_kwonly_defaults(interpret.detect_sources))
    fit_defaults = _kwonly_defaults(interpret.fit_sources)
    return {
        "reduce": _kwonly_defaults(reduce.reduce_survey),
        "grid": _kwonly_defaults(grid.grid_stations),
        "detect": detect_defaults,
        "fit": fit_defaults,
        "publish": _kwonly_defaults(publish_options),
    }


def load_project(path):
    """Read and validate a project file (see :func:`geosp.io.project.read_project`)."""
    from .io.project import read_project

    return read_project(path, stage_defaults=stage_defaults())


def _pick(options, func):
    names = set(inspect.signature(func).parameters)
    return {k: v for k, v in options.items() if k in names and k not in _INTERNAL}


def working_crs(project, stations_gdf):
    """The declared CRS, or the UTM zone of the stations' centroid; with a note saying which."""
    import pyproj

    declared = project.survey.get("crs", "")
    if declared:
        try:
            crs = pyproj.CRS.from_user_input(declared)
        except pyproj.exceptions.CRSError:
            raise InputError(project.path, f"[survey] crs = {declared!r} is not a known CRS.",
                             "Use an EPSG code such as \"EPSG:32633\" or a WKT string.") from None
        if crs.is_geographic:
            raise InputError(project.path, f"[survey] crs = {declared!r} is geographic (degrees).",
                             "geosp works in metres: name a projected CRS such as the UTM zone "
                             "of the survey, or leave crs out to use it automatically.")
        return crs.to_string(), f"declared in the project file ({crs.name})"
    crs = stations_gdf.geometry.estimate_utm_crs()
    return crs.to_string(), f"UTM zone of the stations' centroid ({crs.name}), chosen automatically"


def load_survey(project):
    """
    Read every input of a project, validate it and bring it to the working CRS.

    Returns
    -------
    survey : Survey
    """
    from .io.faults import read_faults
    from .io.readings import read_electrode_checks, read_readings
    from .io.stations import read_stations

    caught = []
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        gdf = read_stations(project.stations)
        crs, crs_note = working_crs(project, gdf)
        gdf = gdf.to_crs(crs)
        faults = read_faults(project.faults, crs=crs)
        dem = None
        elevation = gdf["elev_m"].to_numpy(dtype=float)
        if project.dem:
            from .grid import sample_grid
            from .io.raster import read_raster

            dem = read_raster(project.dem["path"], crs=crs)
            sampled = sample_grid(dem, gdf.geometry.x.to_numpy(), gdf.geometry.y.to_numpy())
            outside = ~np.isfinite(sampled)
            if outside.any():
                label = "line" if gdf.attrs.get("csv") else "feature"
                rows = [f"{s} ({label} {r})" for s, r in zip(gdf["station_id"][outside], gdf["row"][outside])]
                raise InputError(project.dem["path"], f"the DEM does not cover {outside.sum()} of {len(gdf)} "
                                 f"stations: {format_rows(rows)}.",
                                 "Use a DEM that covers the whole survey (with a margin), or remove [dem].")
            elevation = sampled
        readings = checks = None
        if project.readings:
            readings = read_readings(project.readings)
            if project.readings.get("electrode_checks"):
                checks = read_electrode_checks(project.readings)
        caught.extend(str(r.message) for r in records)
    times = gdf["time"].to_numpy(dtype="datetime64[s]") if "time" in gdf else None
    stations = Stations(
        station_id=gdf["station_id"].to_numpy(), easting=gdf.geometry.x.to_numpy(),
        northing=gdf.geometry.y.to_numpy(), upward=elevation, sp_mv=gdf["sp_mv"].to_numpy(dtype=float),
        crs=crs, line_id=gdf["line_id"].to_numpy(), time=times, sigma_mv=gdf["sigma_mv"].to_numpy(dtype=float),
        source_row=gdf["row"].to_numpy(),
    )
    problems = []
    distance = np.hypot(stations.easting - np.median(stations.easting),
                        stations.northing - np.median(stations.northing))
    far = distance > FAR_STATION_M
    if far.any():
        label = "line" if gdf.attrs.get("csv") else "feature"
        rows = [f"{s} ({label} {r}, {d / 1000:.0f} km)" for s, r, d in
                zip(stations.station_id[far], stations.source_row[far], distance[far])]
        problems.append(InputError(project.stations["path"], f"{far.sum()} station(s) lie more than "
                                   f"{FAR_STATION_M / 1000:.0f} km from the middle of the survey: {format_rows(rows)}.",
                                   "Check their coordinates (a typing error, or x and y swapped) and the CRS; "
                                   "a project holds one survey area."))
    reference = ""
    if readings is not None:
        known = set(stations.station_id)
        unknown = [(r, s) for r, a, b in zip(readings.source_row, readings.from_id, readings.to_id)
                   for s in (a, b) if s not in known]
        if unknown:
            problems.append(InputError(readings.path, f"readings name stations that are not in the stations file: "
                                       f"{format_rows([f'{s} (line {r})' for r, s in unknown])}.",
                                       f"Add them to {project.stations['path']} or correct the ids."))
        reference = project.readings.get("reference_station") or str(readings.from_id[0])
        if reference not in known:
            problems.append(InputError(project.path, f"reference_station '{reference}' is not a station.",
                                       "Name a station id from the stations file."))
        if np.isfinite(stations.sp_mv).any() and project.stations.get("value_mv"):
            caught.append("The stations file has SP values and [readings] is given: the values are replaced "
                          "by the reduced readings.")
    elif not np.isfinite(stations.sp_mv).any():
        problems.append(InputError(project.path, "no SP values: [stations] has no value_mv and there is no [readings].",
                                   "Name the SP column with value_mv = \"...\", or add a [readings] section."))
    if problems:
        raise InputErrors(problems)
    caught.extend(_fault_reach(project, faults, stations))
    name = project.survey.get("name") or project.path.stem
    return Survey(stations=stations, faults=faults, crs=crs, crs_note=crs_note, dem=dem, readings=readings,
                  electrode_checks=checks, reference_station=reference, name=name, warnings=tuple(caught))


def _fault_reach(project, faults, stations):
    from scipy.spatial import cKDTree

    tree = cKDTree(np.column_stack([stations.easting, stations.northing]))
    far = []
    for fault in faults:
        pts = _densify(fault.coords, 50.0)
        distance = tree.query(pts)[0].min()
        if distance > FAULT_REACH_M:
            far.append((fault, distance))
    if far and len(far) == len(faults):
        raise InputError(project.faults["path"], f"none of the {len(faults)} faults comes within "
                         f"{FAULT_REACH_M:.0f} m of a station (nearest {min(d for _, d in far):.0f} m).",
                         "Check that the faults and stations are in the same area and that both files "
                         "declare the right CRS.")
    return [f"Fault {f.fault_id} (feature {f.source_row}) is {d:.0f} m from the nearest station; "
            "it is outside the survey and is not interpreted." for f, d in far]


def _densify(coords, step):
    pieces = []
    for a, b in zip(coords[:-1], coords[1:]):
        n = max(int(np.hypot(*(b - a)) // step), 1)
        t = np.linspace(0, 1, n, endpoint=False)[:, None]
        pieces.append(a + t * (b - a))
    pieces.append(coords[-1:])
    return np.vstack(pieces)


def summarize(survey):
    """A dict of what is in a survey, for `geosp check` and the report."""
    from scipy.spatial import cKDTree

    st = survey.stations
    xy = np.column_stack([st.easting, st.northing])
    nn = cKDTree(xy).query(xy, k=2)[0][:, 1] if len(st) > 1 else np.array([np.nan])
    values = st.sp_mv[np.isfinite(st.sp_mv)]
    lines = sorted(set(st.line_id) - {""})
    fault_length = sum(np.hypot(*np.diff(f.coords, axis=0).T).sum() for f in survey.faults)
    out = {
        "name": survey.name,
        "crs": survey.crs,
        "crs_note": survey.crs_note,
        "n_stations": int(len(st)),
        "n_lines": len(lines),
        "spacing_median_m": float(np.median(nn)),
        "spacing_p10_m": float(np.percentile(nn, 10)),
        "spacing_p90_m": float(np.percentile(nn, 90)),
        "extent": (float(st.easting.min()), float(st.easting.max()), float(st.northing.min()), float(st.northing.max())),
        "sp_min_mv": float(values.min()) if values.size else None,
        "sp_max_mv": float(values.max()) if values.size else None,
        "n_faults": len(survey.faults),
        "fault_length_km": float(fault_length / 1000.0),
        "faults_with_dip": int(sum(np.isfinite(f.dip_deg) for f in survey.faults)),
        "dem": survey.dem is not None,
        "warnings": list(survey.warnings),
    }
    if survey.dem is not None:
        out["dem_cell_m"] = float(abs(survey.dem.spacing[1]))
        elev = st.upward[np.isfinite(st.upward)]
        out["elevation_range_m"] = (float(elev.min()), float(elev.max())) if elev.size else None
    if survey.readings is not None:
        days = np.unique(survey.readings.time.astype("datetime64[D]"))
        out["n_readings"] = int(len(survey.readings.dv_mv))
        out["reading_days"] = int(len(days))
        out["reference_station"] = survey.reference_station
        out["n_electrode_checks"] = 0 if survey.electrode_checks is None else int(len(survey.electrode_checks.time))
    return out


def format_summary(summary):
    """Human-readable text of :func:`summarize`."""
    s = summary
    w, e, so, n = s["extent"]
    rows = [
        f"Survey        {s['name']}",
        f"Working CRS   {s['crs']} — {s['crs_note']}",
        f"Extent        E {w:.0f}–{e:.0f} m, N {so:.0f}–{n:.0f} m ({(e - w) / 1000:.1f} × {(n - so) / 1000:.1f} km)",
        f"Stations      {s['n_stations']} on {s['n_lines']} lines; spacing median {s['spacing_median_m']:.1f} m "
        f"(10–90 %: {s['spacing_p10_m']:.1f}–{s['spacing_p90_m']:.1f} m)",
    ]
    if s["sp_min_mv"] is not None:
        rows.append(f"SP values     {s['sp_min_mv']:.1f} to {s['sp_max_mv']:.1f} mV")
    else:
        rows.append("SP values     from the readings (reduced by 'geosp reduce')")
    rows.append(f"Faults        {s['n_faults']} traces, {s['fault_length_km']:.1f} km in all, "
                f"{s['faults_with_dip']} with a mapped dip")
    if s["dem"]:
        er = s.get("elevation_range_m")
        rows.append(f"DEM           {s['dem_cell_m']:.0f} m cells, covers every station"
                    + (f"; station elevations {er[0]:.0f}–{er[1]:.0f} m" if er else ""))
    else:
        rows.append("DEM           none (no terrain correction)")
    if "n_readings" in s:
        rows.append(f"Readings      {s['n_readings']} gradient readings over {s['reading_days']} days; "
                    f"{s['n_electrode_checks']} electrode checks; reference station {s['reference_station']}")
    if s["warnings"]:
        rows.append(f"Warnings ({len(s['warnings'])}):")
        rows.extend(f"  - {w}" for w in s["warnings"])
    else:
        rows.append("Warnings      none")
    return "\n".join(rows)


@dataclass
class RunState:
    """
    What the stages produced so far (kept in memory by `run`).

    ``products`` holds, per stage, the fields that stage set (and its
    warnings): the unit the cache between single-stage commands keeps
    (geosp.io.state). The fit stage replaces ``reduction`` and ``grid`` with
    the survey model's terrain correction; the reduce and grid products keep
    the stage's own results, so a later re-run of detection starts from them.
    """

    version: str = __version__
    project_text: str = ""
    survey: Survey | None = None
    reduction: object = None
    grid: object = None
    segments: tuple = ()
    detections: tuple = ()
    fits: object = None
    selection: object = None  # the survey model after detection (geosp.interpret.Selection)
    noise: dict = field(default_factory=dict)  # the fitted noise model
    timings: dict = field(default_factory=dict)
    products: dict = field(default_factory=dict)  # stage -> {field: value, "warnings": [text]}

    @property
    def warnings(self):
        """Every warning: the inputs' first, then each stage's in order, each once."""
        out = list(self.survey.warnings) if self.survey is not None else []
        for stage in ORDER:
            out.extend(w for w in self.products.get(stage, {}).get("warnings", ()) if w not in out)
        return out

    def record(self, stage, warned=(), **fields):
        """Set ``fields`` as the products of ``stage`` (replacing earlier ones) and on the state."""
        for name, value in fields.items():
            setattr(self, name, value)
        self.products[stage] = dict(fields, warnings=list(dict.fromkeys(warned)))

    def restore(self, products):
        """Take cached products ({stage: {field: value}}), in stage order."""
        for stage in ORDER:
            if stage in products:
                self.products[stage] = dict(products[stage])
                for name, value in products[stage].items():
                    if name != "warnings":
                        setattr(self, name, value)


def _timed(state, name):
    class _Timer:
        def __enter__(self):
            self.t0 = time.perf_counter()

        def __exit__(self, *exc):
            state.timings[name] = round(time.perf_counter() - self.t0, 3)

    return _Timer()


class _Capture:
    """Collect the warnings raised inside the block (as text, in order) in ``.texts``."""

    def __enter__(self):
        self.cm = warnings.catch_warnings(record=True)
        self.records = self.cm.__enter__()
        warnings.simplefilter("always")
        self.texts = []
        return self

    def __exit__(self, *exc):
        self.cm.__exit__(*exc)
        self.texts = [str(r.message) for r in self.records]


def run_reduce(project, state):
    from .reduce import reduce_survey

    with _timed(state, "reduce"), _Capture() as caught:
        reduction = reduce_survey(state.survey, **_pick(project.stages["reduce"], reduce_survey))
    state.record("reduce", caught.texts + list(reduction.warnings), reduction=reduction)
    return state


def run_grid(project, state, *, stage="grid"):
    from .grid import grid_stations

    with _timed(state, "grid" if stage == "grid" else "grid again"), _Capture() as caught:
        grid = grid_stations(state.reduction.stations, **_pick(project.stages["grid"], grid_stations))
    if stage == "grid":
        state.record("grid", caught.texts, grid=grid)
    else:
        state.grid = grid
    return caught.texts


def run_detect(project, state, *, workers=None, scheduler=None, progress=None):
    from .grid import station_spacing
    from .interpret import detect_sources
    from .segments import make_segments

    options = dict(project.stages["detect"])
    if workers is not None:
        options["workers"] = workers
    if scheduler is not None:
        options["scheduler"] = scheduler
    stations = state.reduction.stations
    with _timed(state, "detect"), _Capture() as caught:
        spacing = station_spacing(stations)
        segments = make_segments(state.survey.faults, station_spacing_m=spacing,
                                 **_pick(options, make_segments))
        selection, detections = detect_sources(
            stations, segments, network=state.reduction.network.get("station_covariance"),
            estimate_terrain=_terrain_in_model(state.reduction), progress=progress,
            **_pick(options, detect_sources))
    state.record("detect", caught.texts, segments=segments, selection=selection, detections=detections)
    return state


def _terrain_in_model(reduction):
    """The survey model estimates k unless the terrain correction is off or its slope was given."""
    terrain = reduction.terrain or {}
    return bool(terrain.get("applied")) and terrain.get("method") != "slope given in the project file"


def run_fit(project, state, *, workers=None, scheduler=None, progress=None):
    from .interpret import fit_sources

    with _timed(state, "fit"), _Capture() as caught:
        result = fit_sources(state.selection, state.reduction.stations, state.detections,
                             network=state.reduction.network.get("station_covariance"))
    fields = {"fits": result.fits, "noise": result.noise}
    warned = caught.texts
    if result.terrain is not None:
        from dataclasses import replace

        first = state.reduction.terrain or {}
        terrain = dict(result.terrain, first_pass_slope_mv_per_m=first.get("slope_mv_per_m"))
        state.reduction = replace(state.reduction, stations=result.stations, terrain=terrain)
        warned = warned + run_grid(project, state, stage="fit")  # the grid shows the model's terrain correction
        fields.update(reduction=state.reduction, grid=state.grid)
    state.record("fit", warned, **fields)
    return state


def check_options(project):
    """Refuse out-of-range stage options (OptionError, exit 2) before any stage runs."""
    from .grid import check_grid_options, grid_stations
    from .interpret import check_detect_options, detect_sources
    from .reduce import check_reduce_options, reduce_survey

    check_reduce_options(**_pick(project.stages["reduce"], reduce_survey))
    check_grid_options(**_pick(project.stages["grid"], grid_stations))
    check_detect_options(**_pick(project.stages["detect"], detect_sources))
    sp_range = project.stages["publish"].get("sp_range_mv", "auto")
    if sp_range != "auto" and not (isinstance(sp_range, (int, float)) and not isinstance(sp_range, bool)
                                   and math.isfinite(sp_range) and sp_range > 0):
        from .errors import OptionError

        raise OptionError("[publish]", f"sp_range_mv = {sp_range!r} must be \"auto\" or a number of mV above 0.",
                          "For example sp_range_mv = 150.")
    if "workers" in project.stages["detect"]:
        from .parallel import resolve_workers

        resolve_workers(project.stages["detect"]["workers"])


def check(project):
    """Load and validate every input and option; return the survey and its summary. Writes nothing."""
    survey = load_survey(project)
    check_options(project)
    return survey, summarize(survey)


# ---------------------------------------------------------------------------
# Whole runs and outputs

ORDER = ("reduce", "grid", "detect", "fit", "publish")


def default_out(project):
    """Default output folder: ``geosp_output`` beside the project file."""
    return project.base_dir / "geosp_output"


def _progress(progress, label):
    return progress(label) if progress else None


def run_stages(project, state, stages, *, workers=None, scheduler=None, progress=None, say=None):
    """Run ``stages`` (a subset of ORDER, in order) on ``state``, filling what is missing before them."""
    say = say or (lambda *a: None)
    if state.survey is None:
        with _timed(state, "check"):
            state.survey = load_survey(project)
    first = min(ORDER.index(s) for s in stages)
    needed = [s for s in ORDER[:first] if s != "publish" and _missing(state, s)]
    for stage in needed + [s for s in ORDER if s in stages and s != "publish"]:
        say(f"geosp: {stage} ...")
        if stage == "reduce":
            run_reduce(project, state)
        elif stage == "grid":
            run_grid(project, state)
        elif stage == "detect":
            run_detect(project, state, workers=workers, scheduler=scheduler,
                       progress=_progress(progress, "detect"))
        elif stage == "fit":
            run_fit(project, state, workers=workers, scheduler=scheduler, progress=_progress(progress, "fit"))
    return state


def _missing(state, stage):
    return stage not in state.products


def execute(project_path, stages, *, out=None, workers=None, scheduler=None, progress=None, say=None,
            threads=1):
    """
    Run ``stages`` of a project and write their outputs to ``out``.

    The inputs are always read again. Earlier stages are taken from the
    output folder's cache when their inputs and options are unchanged (so one
    stage can be re-run after editing the project file; geosp.io.state) and
    run first otherwise. Stages from the first one asked for onwards run again.

    BLAS runs with at most ``threads`` threads for the whole run (default 1:
    geosp's solves are small, and parallel work comes from ``workers``);
    gridding windows and segment fits always use one.

    Returns
    -------
    out : Path
    state : RunState
    """
    from pathlib import Path

    from .io.atomic import ensure_not_input, output_set
    from .io.state import CacheError, read_state, stage_keys, write_state
    from .parallel import limit_blas

    say = say or (lambda *a: None)
    project = load_project(project_path)
    out = Path(out) if out is not None else default_out(project)
    ensure_not_input(out, project.input_paths())
    state = RunState(project_text=project.text)
    t0 = time.perf_counter()
    with limit_blas(_check_threads(threads)), _timed(state, "check"):
        state.survey = load_survey(project)  # a missing or changed input is seen before any cache
        check_options(project)
    # The folder is locked, and the cache read, only once the inputs are known to be good.
    with output_set(out, say=say) as staging, limit_blas(threads):
        keys = stage_keys(project, __version__, [s for s in ORDER if s != "publish"])
        first = min(ORDER.index(s) for s in stages)
        before = [s for s in ORDER[:first] if s != "publish"]
        if before:
            cached, note = read_state(out, version=__version__, keys=keys, stages=before)
            state.restore(cached)
            if cached:
                say(f"geosp: reusing {', '.join(cached)} from {out}")
            if note:
                say(f"geosp: the cache in {out} was not used for every stage ({note}); running them again")
        run_stages(project, state, stages, workers=workers, scheduler=scheduler, progress=progress, say=say)
        with _timed(state, "write"):
            try:
                write_state(out, version=__version__, keys=keys,
                            products={s: state.products[s] for s in ORDER if s in state.products})
            except (CacheError, OSError) as err:
                say(f"geosp: the stage cache was not written ({err}); single-stage commands will start afresh")
            written = write_outputs(project, state, staging, publish="publish" in stages)
    state.timings["total"] = round(time.perf_counter() - t0, 3)
    say(f"geosp: wrote {', '.join(written)} in {out}")
    return out, state


def _check_threads(threads):
    if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
        raise InputError("threads", f"got {threads!r}.", "Give a whole number of BLAS threads, 1 or more.")
    return threads


def write_outputs(project, state, out, *, publish=False):
    """
    Write every output the state can fill into the folder ``out``; map and report only when ``publish``.

    run.json is written last and lists the SHA-256 of the others. Returns the names written.
    """
    from . import interpretation, tables
    from .io.atomic import atomic_path
    from .io.layers import write_layers
    from .io.raster import write_geotiff

    crs = state.survey.crs
    reduced = state.reduction.stations
    model = residual = None
    if state.fits is not None:
        model, residual = state.fits.model_mv, state.fits.residual_mv
    layers = {"stations": tables.stations_frame(reduced, model_mv=model, residual_mv=residual)}
    if state.detections:
        layers["fault_segments"] = tables.segments_frame(state.detections, crs)
    if state.fits is not None:
        rows = list(state.fits.sources)
        st = state.reduction.stations
        reach = state.grid.mask_distance_m if state.grid is not None else 0.0
        coverage = tables.data_coverage(st.easting, st.northing, reach) if len(st) >= 3 else None
        layers["sources"] = tables.sources_frame(rows, crs, coverage=coverage)
        layers["sources_3d"] = tables.sources_3d_frame(rows, crs, ground_m=interpretation.source_ground(state, rows))
    write_layers(out / "interpretation.gpkg", layers)
    extra = []
    if "sources" in layers:
        with atomic_path(out / "targets.csv") as tmp:
            tables.targets_frame(layers["sources"]).to_csv(tmp, index=False)
        extra.append("targets.csv")
        if len(layers["sources"]):
            with atomic_path(out / "sources.kml") as tmp:
                tables.kml_frame(layers["sources"]).to_file(tmp, driver="KML", layer="sources")
            extra.append("sources.kml")
    rasters = interpretation.rasters(state)
    for name, raster in rasters.items():
        write_geotiff(raster, out / name, tags=raster.tags)
    written = ["interpretation.gpkg"] + extra + list(rasters)
    if publish:
        options = project.stages["publish"]
        title = options.get("title") or state.survey.name
        if options.get("map", True):
            from .figures.printable import printable_map
            from .webmap import colour_range, make_webmap

            # One colour range for the web map and the printable one.
            amplitude = colour_range(layers["stations"], rasters.get("sp_grid.tif"),
                                     options.get("sp_range_mv", "auto"))

            html = make_webmap(stations=layers["stations"], segments=layers.get("fault_segments"),
                               sources=layers.get("sources"), grid=rasters.get("sp_grid.tif"), title=title,
                               tiles=options.get("tiles") or None,
                               tiles_attribution=options.get("tiles_attribution", ""),
                               cautions=interpretation.CAUTIONS,
                               sp_range_mv=amplitude, dem=state.survey.dem)
            with atomic_path(out / "map.html") as tmp:
                tmp.write_text(html, encoding="utf-8")
            written.append("map.html")
            figure = printable_map(rasters.get("sp_grid.tif"), layers.get("fault_segments"), layers.get("sources"),
                                   title=title, cautions=interpretation.CAUTIONS, amplitude=amplitude,
                                   note=f"Coordinates in {crs}. geosp {__version__}.")
            with atomic_path(out / "map.pdf") as tmp:
                figure.savefig(tmp, format="pdf", dpi=200)
            written.append("map.pdf")
        if options.get("report", True):
            from .report import make_report

            content = interpretation.report_content(state, title=title, share=interpretation.shareable(project))
            html = make_report(**content, provenance=interpretation.provenance(project, state))
            with atomic_path(out / "report.html") as tmp:
                tmp.write_text(html, encoding="utf-8")
            written.append("report.html")
    provenance = interpretation.provenance(project, state)
    provenance["outputs"] = {name: interpretation.checksum(out / name) for name in written}
    with atomic_path(out / "run.json") as tmp:
        import json

        tmp.write_text(json.dumps(provenance, indent=2, default=str), encoding="utf-8")
    written.append("run.json")
    return written


def demo_project_path():
    """The bundled demo area's project file (shipped as package data ``geosp.demo_area``)."""
    from pathlib import Path

    try:
        from importlib.resources import files

        path = Path(str(files("geosp.demo_area") / "project.toml"))
        if path.exists():
            return path
    except (ModuleNotFoundError, TypeError):
        pass
    path = Path(__file__).resolve().parents[1] / "demo_area" / "project.toml"
    if not path.exists():
        raise InputError(path, "the bundled demo area is missing from this installation.",
                         "Reinstall geosp (pip install --force-reinstall geosp).")
    return path


def demo(out, *, workers=None, progress=None, say=None, threads=1):
    """Run the whole pipeline on the bundled demo area into ``out``."""
    return execute(demo_project_path(), ORDER, out=out, workers=workers, progress=progress, say=say,
                   threads=threads)


def format_run(out, state):
    """What a run wrote and found, for the terminal."""
    from pathlib import Path

    out = Path(out)
    rows = []
    if state.detections:
        n_det = sum(d.detected for d in state.detections)
        rows.append(f"Segments      {len(state.detections)} fault segments, {n_det} with a detected dipolar anomaly")
    if state.fits is not None:
        kinds = {}
        for row in state.fits.sources:
            kinds[row["model"]] = kinds.get(row["model"], 0) + 1
        text = ", ".join(f"{n} {k}" for k, n in sorted(kinds.items())) or "none"
        rows.append(f"Sources       {text}")
    if state.warnings:
        rows.append(f"Warnings      {len(state.warnings)} (listed in run.json and the report)")
    for name, label in (("map.html", "Map"), ("report.html", "Report"), ("interpretation.gpkg", "GeoPackage")):
        if (out / name).exists():
            rows.append(f"{label:<13} {(out / name).resolve()}")
    if state.timings:
        rows.append("Timings       " + ", ".join(f"{k} {v:.1f} s" for k, v in state.timings.items()))
    return "\n".join(rows)


def forward(sources_path, stations_path, *, out=None, layer="sources"):
    """
    Predicted SP (mV) of the sources in a GeoPackage layer at given stations.

    Returns ``(out_path or None, text table)``.
    """
    from pathlib import Path

    import pyproj

    from .io.forward import read_forward_inputs, write_forward_output
    from .physics.forward import sources_sp

    sources, stations = read_forward_inputs(sources_path, stations_path, layer=layer)
    crs = pyproj.CRS.from_user_input(sources.crs)
    if crs.is_geographic:
        raise InputError(sources_path, f"layer '{layer}' is in a geographic CRS ({crs.name}).",
                         "Sources must be in a projected CRS in metres (as geosp writes them).")
    stations = stations.to_crs(crs)
    coordinates = (stations.geometry.x.to_numpy(), stations.geometry.y.to_numpy())
    rows = sources.drop(columns="geometry").to_dict("records")
    _near_the_sources(coordinates, rows, sources_path, stations_path, crs)
    stations["model_mv"] = sources_sp(coordinates, rows)
    if out is None:
        return None, stations.drop(columns="geometry").to_string(index=False, max_rows=60)
    return write_forward_output(stations, Path(out)), ""


def _near_the_sources(coordinates, rows, sources_path, stations_path, crs):
    """Refuse stations that are all far from every source: mistyped coordinates or another CRS."""
    from pathlib import Path

    x, y = (np.asarray(c, dtype=float) for c in coordinates)
    tops = np.array([[r["top_x"], r["top_y"]] for r in rows], dtype=float)
    if x.size == 0 or tops.size == 0:
        return
    size = max([float(r.get(k) or 0.0) for r in rows for k in ("bottom_depth_m", "length_m")] + [0.0])
    reach = max(10_000.0, 20.0 * size)
    nearest = float(np.min(np.hypot(x[:, None] - tops[None, :, 0], y[:, None] - tops[None, :, 1])))
    if not nearest <= reach:
        raise InputError(stations_path, f"no station lies within {reach / 1000:.0f} km of a source of "
                         f"{Path(sources_path).name} (the nearest is {nearest / 1000:,.0f} km away), where "
                         "their SP would be zero.",
                         f"Check the coordinates: x,y columns must be in the sources' CRS ({crs.name}), "
                         "or give lon,lat.")


def section(model_path, *, stations=None, out):
    """
    Solve a primary-flow model (heat or pressure, then SP) and write its outputs.

    Writes ``section_profile.csv`` (and ``section_profile.gpkg`` when the
    model's [profile] is georeferenced) and ``section.png`` in ``out``.

    Returns ``(out, result, written)``.
    """
    from pathlib import Path

    from .figures.flow import section_figure
    from .flow import run_flow_model
    from .io.atomic import atomic_path, ensure_not_input, make_output_dir
    from .io.flowmodel import read_flow_model, read_section_stations, write_flow_profile

    model = read_flow_model(model_path)
    observed = read_section_stations(stations) if stations else None
    out = Path(out)
    inputs = [Path(model_path)] + ([Path(stations)] if stations else [])
    ensure_not_input(out, inputs, output_names=("section_profile.csv", "section_profile.gpkg", "section.png"))
    result = run_flow_model(model, stations=observed)
    make_output_dir(out)
    written = [write_flow_profile(result, out / "section_profile.csv")]
    if model.profile_origin_xy is not None and model.crs:
        written.append(write_flow_profile(result, out / "section_profile.gpkg"))
    figure = section_figure(result)
    with atomic_path(out / "section.png") as tmp:
        figure.savefig(tmp, dpi=150, format="png")
    written.append(out / "section.png")
    return out, result, written


def format_section(out, result, written):
    """Terminal summary of :func:`section`."""
    rows = [f"Section       {getattr(result.model, 'title', '') or 'model'} solved in {result.seconds:.1f} s",
            f"Surface SP    {float(min(result.profile_mv)):.1f} to {float(max(result.profile_mv)):.1f} mV "
            "along the profile"]
    if result.observed_mv is not None:
        rows.append(f"Misfit        RMS {result.rms_mv:.1f} mV; after a best constant offset "
                    f"({result.offset_mv:+.1f} mV) {result.rms_offset_mv:.1f} mV")
    rows.append("Wrote         " + ", ".join(str(p) for p in written))
    return "\n".join(rows)
