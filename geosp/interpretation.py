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

from .webmap import CAUTIONS  # noqa: E402  (one wording for map and report)


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
        sources = [joint_strengths(r) for r in state.fits.sources]
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


def joint_strengths(row):
    """A source row with the strength of the final joint solve (used by the model raster)."""
    row = dict(row)
    if "jump_joint_mv" in row:
        row["jump_mv"] = row["jump_joint_mv"]
    if "pole_k_joint_mv_m" in row:
        row["pole_k_mv_m"] = row["pole_k_joint_mv_m"]
    return row


def _regional(regional, easting, northing):
    """
    Evaluate the regional of the survey model stored by the fit step: a
    quadratic in coordinates scaled to the survey's half-size, one per block
    of a large survey (each over its core's box), or the plane of older runs.
    """
    easting = np.asarray(easting, dtype=float)
    northing = np.asarray(northing, dtype=float)
    if not regional:
        return np.zeros_like(easting)
    kind = regional.get("kind")
    if kind == "blocks":
        out = np.zeros_like(easting)
        for block in regional["blocks"]:
            w, e, s, n = block["box"]
            inside = (easting >= w) & (easting < e) & (northing >= s) & (northing < n)
            out[inside] = _regional(block, easting[inside], northing[inside])
        return out
    if kind == "quadratic":
        half = regional["half_size_m"]
        x = (easting - regional["east0_m"]) / half
        y = (northing - regional["north0_m"]) / half
        c = regional["coef_mv"]
        return c[0] + c[1] * x + c[2] * y + c[3] * x * x + c[4] * x * y + c[5] * y * y
    return (regional.get("c0_mv", 0.0)
            + regional.get("east_mv_per_m", 0.0) * (easting - regional.get("east0_m", 0.0))
            + regional.get("north_mv_per_m", 0.0) * (northing - regional.get("north0_m", 0.0)))


def source_ground(state, rows):
    """
    Ground elevation (m) each source's depths refer to: the row's own
    ``ground_m`` (the datum of its fit) where it has one, else the DEM
    above its top edge; None without either.
    """
    if not rows:
        return None
    own = np.array([float(r.get("ground_m", np.nan)) if r.get("ground_m") is not None else np.nan
                    for r in rows], dtype=float)
    dem = state.survey.dem if state.survey is not None else None
    if dem is None:
        return own if np.isfinite(own).any() else None
    from .grid import sample_grid

    x = np.array([r["top_x"] for r in rows], dtype=float)
    y = np.array([r["top_y"] for r in rows], dtype=float)
    ground = sample_grid(dem, x, y)
    ground = np.where(np.isfinite(ground), ground, np.nanmedian(state.reduction.stations.upward))
    return np.where(np.isfinite(own), own, ground)


def checksum(path):
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def shareable(project):
    """
    A function that writes the project's file paths in a text relative to the
    project folder, so that a report or run.json that is passed on does not
    show the folders of the machine it was made on.
    """
    import os

    base = project.base_dir
    pairs = []
    for path in project.input_paths():
        path = Path(path)
        for p in [path] + [path.with_suffix(s) for s in (".shx", ".dbf", ".prj", ".cpg")]:
            try:
                pairs.append((str(p), os.path.relpath(p, base)))
            except ValueError:  # another drive (Windows): the name alone
                pairs.append((str(p), p.name))
    pairs.sort(key=lambda pair: -len(pair[0]))  # longest first, so no path is cut inside another
    folder = str(base) + os.sep

    def relative(text):
        text = str(text)
        for absolute, rel in pairs:
            text = text.replace(absolute, rel)
        return text.replace(folder, "")

    return relative


def provenance(project, state):
    """The run.json content: version, project file, input checksums, timings, warnings."""
    import os

    share = shareable(project)
    inputs = {}
    for path in project.input_paths():
        path = Path(path)
        group = [path]
        if path.suffix.lower() == ".shp":
            group += [path.with_suffix(s) for s in (".shx", ".dbf", ".prj", ".cpg")]
        for p in group:
            if p.exists():
                try:
                    key = os.path.relpath(p, project.base_dir)
                except ValueError:  # another drive (Windows)
                    key = p.name
                inputs[key] = {"sha256": checksum(p), "bytes": p.stat().st_size}
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
        "warnings": [share(w) for w in state.warnings],
        "terrain": terrain_result(state),
        "environment": {"python": platform.python_version(), "numpy": numpy.__version__,
                        "scipy": scipy.__version__, "platform": platform.platform()},
    }


def terrain_result(state):
    """
    The terrain coefficient the run used, for run.json: slope (mV/m), its
    95 % interval and a 1-sigma equivalent (interval width / (2 × 1.96)),
    and how it was estimated; None when no terrain correction was applied.
    """
    red = state.reduction
    if red is None or not red.terrain or not red.terrain.get("applied"):
        return None
    terrain = red.terrain  # after a second pass, it carries that pass's interval and method
    out = {}
    for key in ("slope_mv_per_m", "ci_lo", "ci_hi", "first_pass_slope_mv_per_m", "reference_elevation_m"):
        value = terrain.get(key)
        if value is not None and np.isfinite(value):
            out[key] = round(float(value), 6)
    if "ci_lo" in out and "ci_hi" in out:
        out["sd_mv_per_m"] = round((out["ci_hi"] - out["ci_lo"]) / (2 * 1.959964), 6)
    out["method"] = terrain.get("method", "")
    out["n_used"] = int(terrain.get("n_used") or 0)
    return out


def _fmt(value, digits=0):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not np.isfinite(value):
        return "—"
    return f"{value:.{digits}f}"


def _summary_rows(state, title):
    survey = state.survey
    st = state.reduction.stations
    rows = {
        "Survey": survey.name,
        "Working CRS": f"{survey.crs} ({survey.crs_note})",
        "Stations": f"{len(st)} on {len(set(st.line_id) - {''})} lines",
        "Faults": f"{len(survey.faults)} mapped traces",
    }
    if state.detections:
        n_det = sum(d.detected for d in state.detections)
        rows["Fault segments"] = f"{len(state.detections)} ({n_det} with a detected dipolar anomaly)"
    if state.fits is not None:
        fault_sources = [r for r in state.fits.sources if r["model"] == "fault_patch"]
        cultural = [r for r in state.fits.sources if r["model"] != "fault_patch"]
        rows["Fitted fault sources"] = str(len(fault_sources))
        if cultural:
            rows["Likely cultural sources"] = str(len(cultural))
    if state.grid is not None:
        rows["SP grid"] = (f"{state.grid.method}, cross-validated RMSE {state.grid.cv_rmse_mv:.1f} mV, "
                           f"masked beyond {state.grid.mask_distance_m:.0f} m from stations")
    rows["Warnings"] = str(len(state.warnings))
    return rows


def _source_text(row):
    """Plain-language lines for one source, with its uncertainty ranges."""
    if row["model"] == "buried_line":
        return [f"A buried line of current sources fits the anomaly on segment {row['segment_id']} better than a "
                f"fault patch ({_fmt(row.get('length_m'))} m long toward {_fmt(row.get('strike_deg'))}°, "
                f"{_fmt(row['top_depth_m'])} m deep). This pattern is typical of a pipeline or cable that leaks "
                "or takes current along its length, and is not interpreted as a fault source. Check it against "
                "the infrastructure on site."]
    if row["model"] == "pole_pair":
        return [f"A shallow pole pair fits the anomaly on segment {row['segment_id']} better than a fault patch "
                f"(positive pole {_fmt(row['top_depth_m'])} m deep, negative pole {_fmt(row.get('neg_depth_m'))} m "
                "deep). This pattern is typical of a cultural source — a well casing, a pipeline under cathodic "
                "protection, a fence or a buried cable — and is not interpreted as a fault source. Check it "
                "against the infrastructure on site."]
    lines = [
        f"Fault-patch source on segment {row['segment_id']} (fault {row['fault_id']}): top of the patch "
        f"{_fmt(row['top_depth_m'])} m below ground (16–84 %: {_fmt(row.get('top_depth_lo_m'))}–"
        f"{_fmt(row.get('top_depth_hi_m'))} m), bottom {_fmt(row['bottom_depth_m'])} m, "
        f"{_fmt(row['length_m'])} m along strike {_fmt(row['strike_deg'])}°, dipping {_fmt(row['dip_deg'])}° "
        f"toward {_fmt(row['dip_dir_deg'])}°.",
        f"Potential jump across the patch {_fmt(row['jump_mv'])} mV (16–84 %: {_fmt(row.get('jump_lo_mv'))} to "
        f"{_fmt(row.get('jump_hi_mv'))} mV); positive means the dip-direction side is positive. "
        f"RMS misfit {_fmt(row.get('rms_mv'), 1)} mV, reduced χ² {_fmt(row.get('chi2_red'), 2)}, "
        f"evidence over no source ΔBIC = {_fmt(row.get('bic_gain'))}.",
    ]
    if row.get("geo_mean_depth_m") is not None and np.isfinite(row.get("geo_mean_depth_m", np.nan)):
        lines.append(
            f"The well-resolved combinations are the geometric-mean depth √(top·bottom) = "
            f"{_fmt(row['geo_mean_depth_m'])} ± {_fmt(row.get('geo_mean_depth_sd_m'))} m and the strength × height "
            f"product {_fmt(row.get('jump_height_mv_m'))} ± {_fmt(row.get('jump_height_sd_mv_m'))} mV·m; top depth, "
            "bottom depth and jump trade off against each other.")
    if row.get("flags"):
        lines.append(f"Flags: {row['flags']}.")
    return lines


#: The report draws the profiles of at most this many segments with sources, at this resolution.
MAX_PROFILE_FIGURES = 12
PROFILE_DPI = 80


def report_content(state, *, title, share=str):
    """
    The report's sections, figures and tables (arguments of :func:`geosp.report.make_report`).

    ``share`` rewrites texts that may hold file paths (the warnings), e.g. :func:`shareable`.
    """
    import pandas as pd

    from .figures import detect as detect_figures

    figures, tables, sections = {}, {}, []
    red = state.reduction
    st = red.stations
    intro = [
        f"This memo presents the reduction and interpretation of {len(st)} self-potential stations of "
        f"{state.survey.name}. SP values are in mV relative to the reference station"
        + (f" {state.survey.reference_station}" if state.survey.reference_station else "") + "; distances are "
        f"in metres in {state.survey.crs}.",
        "Sign convention: a source's jump is the potential on the dip-direction side of the fault "
        "(strike + 90°) minus the other side; a positive jump gives positive SP on the dip-direction side.",
    ]
    sections.append({"heading": "Scope and method", "text": intro})

    # Reduction QC
    qc_text = []
    if red.network:
        net = red.network
        qc_text.append(f"Loop closure: χ² = {_fmt(net.get('chi2'), 1)} for {net.get('dof')} independent loops "
                       f"(p = {_fmt(net.get('p_value'), 3)}).")
        mode = net.get("mode")
        if mode:
            words = {"leapfrog": "leapfrog readings (the electrode offset alternates in sign from one "
                                 "reading to the next)",
                     "fixed_lead": "fixed-lead readings (the electrode offset has the same sign on every reading)",
                     "none": "readings without an electrode-offset correction"}.get(mode, mode)
            tried = net.get("chi2_by_mode")
            how = (" Both were tried and loop closure chose: χ² " + ", ".join(
                f"{m.replace('_', '-')} {_fmt(v, 1)}" for m, v in tried.items()) + ".") if tried else ""
            qc_text.append(f"The electrode offsets were removed as for {words}.{how}")
    if red.terrain and red.terrain.get("applied"):
        t = red.terrain
        qc_text.append(f"Terrain correction: SP changes by {_fmt(t['slope_mv_per_m'], 2)} mV per metre of elevation "
                       f"(95 % interval {_fmt(t.get('ci_lo'), 2)} to {_fmt(t.get('ci_hi'), 2)}) from "
                       f"{t.get('n_used')} stations; method: {t.get('method')}. The removed part is in terrain_mv.")
    n_flag = int(np.sum(st.flag != ""))
    qc_text.append(f"{n_flag} stations were flagged and down-weighted (never dropped); see the stations layer.")
    fig_names = []
    try:
        from .figures import reduce as reduce_figures
    except ImportError:
        reduce_figures = None
    if reduce_figures is not None:
        if red.network and hasattr(reduce_figures, "misclosure_figure"):
            figures["Loop misclosures"] = reduce_figures.misclosure_figure(red)
            fig_names.append("Loop misclosures")
        if red.profiles and hasattr(reduce_figures, "profiles_figure"):
            figures["Profiles before and after reduction"] = reduce_figures.profiles_figure(red)
            fig_names.append("Profiles before and after reduction")
    table_names = []
    for key, caption in (("lines", "Per-line QC"), ("loops", "Per-loop misclosure"), ("days", "Per-day electrode QC"),
                         ("legs", "Largest standardized residuals")):
        frame = red.qc.get(key) if red.qc else None
        if key == "legs" and isinstance(frame, pd.DataFrame) and len(frame):
            # The legs of one stretch between crossings share its standardized residual: one
            # row per stretch, only legs that loops check, flagged legs always shown.
            checked = frame[(frame["redundancy"] > 1e-3) | (frame["flag"] != "")]
            key_value = checked["std_residual"].round(3).astype(str) + checked["flag"].str[:8]
            frame = checked[~key_value.duplicated()].head(15)
            caption = "Largest standardized residuals (one leg per stretch between loop crossings)"
        if isinstance(frame, pd.DataFrame) and len(frame):
            tables[caption] = frame.head(25)
            table_names.append(caption)
    sections.append({"heading": "Field reduction and QC", "text": qc_text, "figures": fig_names,
                     "tables": table_names})

    # Grid
    if state.grid is not None:
        g = state.grid
        names = []
        try:
            from .figures import grid as grid_figures

            figures["Reduced SP"] = grid_figures.grid_figure(g, st, [f.coords for f in state.survey.faults],
                                                             title="Reduced SP")
            names.append("Reduced SP")
        except ImportError:
            pass
        sections.append({"heading": "SP map", "text": [
            f"Gridded by {g.method}; parameters chosen by spatially blocked cross-validation "
            f"(RMSE {g.cv_rmse_mv:.1f} mV). Nodes farther than {g.mask_distance_m:.0f} m from a station are blank. "
            "Sources were fitted to the stations, never to grid nodes."], "figures": names})

    # Detection
    if state.detections:
        figures["Fault segments by detection score"] = detect_figures.detection_figure(state.detections, st)
        tables["Detection"] = detect_figures.detection_table(state.detections)
        noise = getattr(state, "noise", None) or {}
        model_text = [
            "One model of the whole survey was fitted: a constant, a quadratic regional, the SP-elevation "
            "term and the sources, with a noise model of white station noise, a short-range correlated part "
            "and (for gradient readings) the loop adjustment's own covariance; every fit is generalised "
            "least squares. Windows sliding along every mapped fault were scored with fault-patch templates "
            "against the residual of the current model, and sources were added one at a time where the "
            "score was highest, as long as the probability that noise alone would score that high anywhere "
            "in the survey (the false-alarm probability, from simulations of the fitted noise model) stayed "
            "below the false-alarm rate. A shallow pole pair and a casing competed for every anomaly. "
            "Segments within five times the rate are marked marginal."]
        if "white_sd_mv" in noise:
            model_text.append(
                f"Noise model: white {noise['white_sd_mv']:.1f} mV, correlated {noise['correlated_sd_mv']:.1f} mV "
                f"over {noise['correlation_length_m']:.0f} m; score threshold {noise['threshold']:.2f}.")
        elif "blocks" in noise:
            model_text.append(f"The survey was modelled in {len(noise['blocks'])} overlapping blocks, each with "
                              "its own noise model and threshold.")
        sections.append({"heading": "Dipolar anomalies along faults", "text": model_text,
                         "figures": ["Fault segments by detection score"], "tables": ["Detection"]})

    # Sources
    if state.fits is not None:
        from .report import source_parameter_table

        try:
            from .figures import fit as fit_figures
        except ImportError:
            fit_figures = None
        sections.append({"heading": "Fitted sources", "text": [
            "Each source was fitted by variable-projection least squares from several starts across depth "
            "families and, where the fault map gives no dip, both dip directions. Ranges are 16th–84th "
            "percentiles from the covariance of the whole model at once (every source, the regional and the "
            "terrain coefficient), so the terrain and the correlated noise widen them. A source with its top "
            "depth, dip or position on a bound, or its top depth uncertain by more than a factor of three, is "
            "reported as uncertain, not as a target."]
            + (["The SP values come from gradient readings, whose errors add up along each line between loop "
                "crossings; the fits weight the stations by the covariance the loop adjustment implies "
                "(generalised least squares). Residuals can therefore keep smooth offsets along a line: the fit "
                "reads them as reduction error, not as source."]
               if state.reduction is not None and state.reduction.network.get("station_covariance") is not None
               else [])})
        by_segment = {f.segment.segment_id: f for f in state.fits.fits}
        # One profile figure per segment (sources on one segment share it), for the segments of the
        # targets first, then of uncertain and cultural sources, at most MAX_PROFILE_FIGURES: the
        # report stays a file one can send (the map and the GeoPackage hold every source).
        rank = {"target": 0, "uncertain": 1}
        ordered = sorted(state.fits.sources, key=lambda r: rank.get(str(r.get("status")), 2))
        drawn = list(dict.fromkeys(r["segment_id"] for r in ordered if r["segment_id"] in by_segment))
        drawn = set(drawn[:MAX_PROFILE_FIGURES])
        n_skipped = len({r["segment_id"] for r in state.fits.sources if r["segment_id"] in by_segment} - drawn)
        for row in state.fits.sources:
            fit = by_segment.get(row["segment_id"])
            names, tnames = [], []
            if fit_figures is not None and fit is not None and row["segment_id"] in drawn:
                label = f"{row['segment_id']}: observed and modelled SP across the fault"
                if label not in figures:  # shown with the segment's first source only
                    figures[label] = fit_figures.profiles_figure(fit, st)
                    figures[label].geosp_dpi = PROFILE_DPI
                    names.append(label)
            tables[f"{row['source_id']}: parameters"] = source_parameter_table(row)
            tnames.append(f"{row['source_id']}: parameters")
            if fit is not None and isinstance(fit.selection, pd.DataFrame):
                tables[f"{row['source_id']}: model selection"] = fit.selection
                tnames.append(f"{row['source_id']}: model selection")
            sections.append({"heading": f"Source {row['source_id']}", "level": 3, "text": _source_text(row),
                             "figures": names, "tables": tnames})
        if n_skipped:
            sections.append({"heading": "Other profiles", "level": 3, "text": [
                f"Profile figures of {n_skipped} more segments with sources are left out to keep the report "
                f"small (at most {MAX_PROFILE_FIGURES}, targets first); their parameters are above, and every "
                "source is in the map, the GeoPackage and targets.csv."]})
        if not state.fits.sources:
            sections.append({"heading": "No sources", "level": 3,
                             "text": ["No anomaly cleared the false-alarm threshold; no source is reported."]})
    if state.warnings:
        sections.append({"heading": "Warnings", "text": [share(w) for w in state.warnings]})
    return {"title": title, "survey_summary": _summary_rows(state, title), "sections": sections,
            "figures": figures, "tables": tables, "cautions": CAUTIONS}
