"""
What the outputs say: model and residual rasters, report content, provenance
and the cautions. Builds objects in memory; the pipeline writes them.
"""

from __future__ import annotations

import hashlib
import platform
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import __version__
from .models import Raster

CAUTIONS = (
    "Self-potential interpretation is non-unique: many source distributions fit the same data, and "
    "the sources shown are models, not observations.",
    "Depths, extents and strengths carry the stated uncertainties only under the model's assumptions "
    "(uniform dipole layer on a planar patch, half-space, the terrain treatment described in the report).",
    "Siting a well is a decision for licensed professionals under local regulations; use these results "
    "as one line of evidence among geology, geochemistry and other geophysics.",
    "Field crews must follow local electrical and site-safety practice (power lines, pipelines under "
    "cathodic protection, thermal ground, steam and gas).",
)


def _station_frame_coords(state):
    st = state.reduction.stations
    return st.easting, st.northing


def rasters(state):
    """``{file name: Raster}`` of every raster the state can fill (nodata outside the data footprint)."""
    out = {}
    if state.grid is None:
        return out
    grid = state.grid.grid
    base_tags = {"units": "mV", "geosp_version": __version__,
                 "reference_station": state.survey.reference_station or "", **grid.tags}
    out["sp_grid.tif"] = Raster(grid.easting, grid.northing, grid.values, grid.crs, "mV",
                                {**base_tags, "content": "gridded observed SP (reduced total field)"})
    dist = state.grid.distance
    out["sp_distance.tif"] = Raster(dist.easting, dist.northing, dist.values, dist.crs, "m",
                                    {"units": "m", "content": "distance to the nearest station",
                                     "geosp_version": __version__})
    if state.fits is not None:
        from .grid import grid_like
        from .physics.forward import sources_sp

        ee, nn = np.meshgrid(grid.easting, grid.northing)
        mask = np.isfinite(grid.values)
        model = np.full(grid.values.shape, np.nan)
        sources = [dict(r) for r in state.fits.sources]
        if mask.any():
            values = np.zeros(mask.sum())
            if sources:
                values += sources_sp((ee[mask], nn[mask]), sources)
            values += _regional(state.fits.regional, ee[mask], nn[mask])
            model[mask] = values
        out["sp_model.tif"] = Raster(grid.easting, grid.northing, model, grid.crs, "mV",
                                     {**base_tags, "content": "modelled SP: all fitted sources plus the joint regional"})
        residual = grid_like(state.grid, state.reduction.stations, state.fits.residual_mv)
        out["sp_residual.tif"] = Raster(residual.easting, residual.northing, residual.values, grid.crs, "mV",
                                        {**base_tags, "content": "observed minus modelled SP, gridded from stations"})
    return out


def _regional(regional, easting, northing):
    """Evaluate the joint regional ``c0 + ce·(e − e0) + cn·(n − n0)`` (keys as the fit step stores them)."""
    if not regional:
        return np.zeros_like(easting)
    c0 = regional.get("c0_mv", 0.0)
    ce = regional.get("ce_mv_per_m", 0.0)
    cn = regional.get("cn_mv_per_m", 0.0)
    e0 = regional.get("e0_m", 0.0)
    n0 = regional.get("n0_m", 0.0)
    return c0 + ce * (easting - e0) + cn * (northing - n0)


def source_ground(state, rows):
    """Ground elevation (m) above each source's top edge, from the DEM when there is one (else None)."""
    dem = state.survey.dem if state.survey is not None else None
    if dem is None or not rows:
        return None
    from .grid import sample_grid

    x = np.array([r["top_x"] for r in rows], dtype=float)
    y = np.array([r["top_y"] for r in rows], dtype=float)
    ground = sample_grid(dem, x, y)
    return np.where(np.isfinite(ground), ground, np.nanmedian(state.reduction.stations.upward))


def checksum(path):
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def provenance(project, state):
    """The run.json content: version, project file, input checksums, timings, warnings."""
    inputs = {}
    for path in project.input_paths():
        path = Path(path)
        group = [path]
        if path.suffix.lower() == ".shp":
            group += [path.with_suffix(s) for s in (".shx", ".dbf", ".prj", ".cpg")]
        for p in group:
            if p.exists():
                inputs[p.name if p.parent == project.base_dir else str(p)] = {"sha256": checksum(p),
                                                                               "bytes": p.stat().st_size}
    import numpy
    import scipy

    return {
        "geosp_version": __version__,
        "created_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "project_file": project.path.name,
        "project_text": project.text,
        "inputs": inputs,
        "working_crs": state.survey.crs if state.survey else None,
        "crs_note": state.survey.crs_note if state.survey else None,
        "timings_s": state.timings,
        "warnings": state.warnings,
        "environment": {"python": platform.python_version(), "numpy": numpy.__version__,
                        "scipy": scipy.__version__, "platform": platform.platform()},
    }
