"""
Offline interactive web map (``map.html``) for the drilling team.

The page is one self-contained HTML document: Leaflet's script, stylesheet
and images are inlined from ``geosp/assets/`` (licences in
``geosp/assets/licenses/``), the SP grid is an inline PNG, and no tile layer
is added unless the user asks for one, so the map works with no network.

Every value that comes from the user's files (ids, names, notes, flags, the
title) passes through :func:`_text` before it reaches a popup, tooltip, legend
or title. It is HTML-escaped (folium escapes nothing) and its curly braces
become character references: folium compiles the text it has rendered as a
Jinja template a second time, so a ``{{ ... }}`` or ``{% ... %}`` in an id
would otherwise be evaluated as template code. The browser shows ``&#123;``
as ``{``, so the text still reads verbatim.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import re
from importlib import resources

import numpy as np
from ._numbers import nice_ceiling as _nice_ceiling

__all__ = ["CAUTIONS", "make_webmap", "check_offline"]

#: Default caution statements (contract, "Safety").
CAUTIONS = (
    "SP interpretation is non-unique: other source geometries can fit the same data.",
    "Sources shown are models, not observations.",
    "Siting a well is a decision for licensed professionals under local regulations.",
    "Field crews must follow local electrical and site-safety practice.",
)

_CMAP = "RdBu_r"  # diverging: negative blue, 0 white, positive red
_GRID_OPACITY = 0.75
# A URL that leaves the page: http(s):// or protocol-relative //.
_REMOTE = re.compile(r"^\s*(?:[a-z][a-z0-9+.-]*:)?//", re.IGNORECASE)
# CSS that loads something: url(...) with a remote target, or any @import.
_CSS_LOADING = re.compile(
    r"""url\(\s*["']?\s*(?:[a-z][a-z0-9+.-]*:)?//|@import""", re.IGNORECASE)
# Attributes through which a browser fetches a resource without a click.
_LOADING_ATTRIBUTES = frozenset(
    {"src", "href", "data", "poster", "action", "srcset", "background", "formaction",
     "manifest", "codebase", "archive", "longdesc", "lowsrc", "dynsrc", "ping", "xlink:href"})


# --------------------------------------------------------------------------
# Assets
# --------------------------------------------------------------------------

def _asset(*parts, binary=False):
    ref = resources.files("geosp").joinpath("assets", *parts)
    return ref.read_bytes() if binary else ref.read_text(encoding="utf-8")


def _data_uri(data, mime="image/png"):
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def _leaflet_css():
    css = _asset("leaflet", "leaflet.css")

    def inline(match):
        name = match.group(1)
        return f'url("{_data_uri(_asset("leaflet", "images", name, binary=True))}")'

    return re.sub(r"url\(images/([\w.-]+\.png)\)", inline, css)


def _leaflet_icons_js():
    icons = {key: _data_uri(_asset("leaflet", "images", name, binary=True))
             for key, name in (("iconUrl", "marker-icon.png"),
                               ("iconRetinaUrl", "marker-icon-2x.png"),
                               ("shadowUrl", "marker-shadow.png"))}
    # Leaflet prefixes imagePath to the icon URL; an empty path keeps the data URIs intact.
    return ("L.Icon.Default.imagePath = '';\n"
            f"L.Icon.Default.mergeOptions({json.dumps(icons)});\n")


def check_offline(document):
    """
    Raise if an HTML document would load anything from the network.

    The document is parsed as HTML, and only the places where a browser
    fetches something are examined: attributes such as ``src``, ``href``,
    ``data`` or ``srcset`` holding an ``http(s)://`` or protocol-relative
    URL, and CSS ``url()`` or ``@import`` inside ``<style>`` elements and
    ``style`` attributes. Text is not a resource: an escaped id that reads
    ``@import 'http://...'`` in a popup or the title loads nothing and
    passes, as do plain links (``<a href>``, which load only when clicked)
    and a tile URL the user asked for (a JavaScript string given to Leaflet).

    Parameters
    ----------
    document : str
        HTML text.

    Raises
    ------
    RuntimeError
        Naming the first offending tag or style fragment.
    """
    from html.parser import HTMLParser

    problems = []

    class _Resources(HTMLParser):
        def __init__(self):
            super().__init__(convert_charrefs=True)
            self._in_style = False

        def handle_starttag(self, tag, attrs):
            self._in_style = tag == "style"
            for name, value in attrs:
                value = value or ""
                if name == "style" and _CSS_LOADING.search(value):
                    problems.append(f"<{tag} style={value[:80]!r}>")
                elif name in _LOADING_ATTRIBUTES and tag != "a":
                    targets = value.split(",") if name == "srcset" else [value]
                    if any(_REMOTE.match(t) for t in targets):
                        problems.append(f"<{tag} {name}={value[:80]!r}>")

        def handle_endtag(self, tag):
            if tag == "style":
                self._in_style = False

        def handle_data(self, data):
            if self._in_style:
                match = _CSS_LOADING.search(data)
                if match:
                    problems.append(f"<style> ... {data[match.start():match.start() + 80]!r}")

    parser = _Resources()
    parser.feed(document)
    parser.close()
    if problems:
        raise RuntimeError(f"The web map would load a network resource: {problems[0]}")


# --------------------------------------------------------------------------
# Formatting (everything returned here is already HTML-safe)
# --------------------------------------------------------------------------

def _text(value):
    """User text made safe for the page: HTML-escaped, braces as references."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    escaped = html.escape(str(value), quote=True)
    return escaped.replace("{", "&#123;").replace("}", "&#125;")


_TEMPLATE_SYNTAX = re.compile(r"\{[{%#]")


def _check_tiles(tiles):
    """A tile URL goes to folium as is (Leaflet needs its ``{z}/{x}/{y}``)."""
    if tiles and _TEMPLATE_SYNTAX.search(str(tiles)):
        raise ValueError(
            f"The tile URL {str(tiles)[:120]!r} contains '{{{{', '{{%' or '{{#'; a tile URL "
            "uses single braces only, as in https://tiles.example/{z}/{x}/{y}.png.")


def _number(value, digits=1):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "–"
    if not math.isfinite(value):
        return "–"
    return f"{value:.{digits}f}"


def _probability(value):
    """A false-alarm probability to 3 decimals; below 0.001 (the simulations' floor) as "< 0.001"."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "–"
    if math.isfinite(value) and value < 0.001:
        return "< 0.001"
    return _number(value, 3)


def _with_range(row, key, lo_key, hi_key, digits=1):
    centre = _number(row.get(key), digits)
    lo, hi = _number(row.get(lo_key), digits), _number(row.get(hi_key), digits)
    if lo == "–" and hi == "–":
        return centre
    return f"{centre} ({lo} to {hi})"


def colour_range(stations, grid, sp_range_mv="auto"):
    """Half-range (mV) of the SP colour scale: ``sp_range_mv``, or from the data when "auto"."""
    return _colour_scale(stations, grid) if sp_range_mv == "auto" else float(sp_range_mv)


def _colour_scale(stations, grid):
    values = []
    if stations is not None and len(stations) and "sp_mv" in stations:
        values.append(np.asarray(stations["sp_mv"], dtype=float))
    if grid is not None:
        values.append(np.asarray(grid.values, dtype=float).ravel())
    values = np.concatenate(values) if values else np.array([])
    values = values[np.isfinite(values)]
    return _nice_ceiling(np.percentile(np.abs(values), 98)) if values.size else 1.0


def _hex_colour(cmap, amplitude, value):
    from matplotlib.colors import to_hex

    try:
        value = float(value)
    except (TypeError, ValueError):
        return "#888888"
    if not math.isfinite(value):
        return "#888888"
    return to_hex(cmap(0.5 + 0.5 * np.clip(value / amplitude, -1, 1)))


# --------------------------------------------------------------------------
# Layers
# --------------------------------------------------------------------------

def _to_wgs84(frame):
    if frame is None or len(frame) == 0:
        return frame
    if frame.crs is None:
        raise ValueError("A layer for the web map has no CRS; set the working CRS first.")
    return frame.to_crs("EPSG:4326")


def _feature_collection(frame, properties):
    from shapely.geometry import mapping

    features = []
    for i, (geom, props) in enumerate(zip(frame.geometry, properties)):
        if geom is None or geom.is_empty:
            continue
        features.append({"type": "Feature", "id": str(i), "properties": props,
                         "geometry": mapping(geom)})
    return {"type": "FeatureCollection", "features": features}


def _station_properties(row, cmap, amplitude):
    return {
        "Station": _text(row.get("station_id")),
        "Line": _text(row.get("line_id")),
        "SP (mV)": _number(row.get("sp_mv")),
        "Model (mV)": _number(row.get("model_mv")),
        "Residual (mV)": _number(row.get("residual_mv")),
        "Flag": _text(row.get("flag")) or "–",
        "_colour": _hex_colour(cmap, amplitude, row.get("sp_mv")),
    }


#: Fault segment styles by decision: colours kept apart from the SP ramp.
_SEGMENT_STYLE = {
    "detected": ("#000000", 5, None),
    "marginal": ("#1b7837", 3, "8 5"),
    "cultural": ("#8c510a", 3, "2 5"),
    "no": ("#7f7f7f", 2, "6 6"),
}


def _segment_decision(row):
    if int(row.get("detected", 0) or 0):
        return "detected"
    if int(row.get("cultural", 0) or 0):
        return "cultural"
    if int(row.get("marginal", 0) or 0):
        return "marginal"
    return "no"


def _segment_properties(row):
    decision = _segment_decision(row)
    polarity = row.get("polarity", 0)
    try:
        polarity = int(polarity)
    except (TypeError, ValueError):
        polarity = 0
    colour, weight, dash = _SEGMENT_STYLE[decision]
    words = {"detected": "yes: a source was found", "marginal": "marginal: below the threshold, "
             "within a few times the false-alarm rate", "cultural": "explained by a cultural source",
             "no": "no"}
    return {
        "Fault": _text(row.get("fault_id")),
        "Segment": _text(row.get("segment_id")),
        "Score": _number(row.get("score"), 2),
        "Threshold": _number(row.get("threshold"), 2),
        "False-alarm probability": _probability(row.get("false_alarm_p")),
        "Detected": words[decision],
        "Polarity": {1: "+1", -1: "−1"}.get(polarity, "–"),
        "Stations": _text(row.get("n_stations")),
        "Note": _text(row.get("note")) or "–",
        "_colour": colour,
        "_weight": weight,
        "_dash": dash,
    }


#: Source footprint styles by status.
_SOURCE_STYLE = {"target": ("#7b3294", 2.5, None, 0.15), "uncertain": ("#7b3294", 1.5, "5 5", 0.04),
                 "cultural": ("#8c510a", 1.5, "2 4", 0.08)}


def _source_properties(row):
    model = str(row.get("model", ""))
    status = str(row.get("status") or ("cultural" if model in ("pole_pair", "buried_line") else "target"))
    colour, weight, dash, fill = _SOURCE_STYLE.get(status, _SOURCE_STYLE["target"])
    props = {
        "Source": _text(row.get("source_id")),
        "Status": {"target": "target", "uncertain": "uncertain (a depth or its position is not "
                   "resolved: not a target)", "cultural": "likely cultural"}.get(status, _text(status)),
        "Model": _text(model),
        "Fault / segment": f"{_text(row.get('fault_id'))} / {_text(row.get('segment_id'))}",
    }
    if model == "buried_line":
        props.update({
            "Centre E / N (m)": f"{_number(row.get('top_x'), 0)} / {_number(row.get('top_y'), 0)}",
            "Direction (°)": _number(row.get("strike_deg"), 0),
            "Length (m)": _number(row.get("length_m"), 0),
            "Depth (m)": _number(row.get("top_depth_m")),
            "Strength per unit length (mV)": _number(row.get("line_k_mv"), 1),
        })
    elif model == "pole_pair":
        props.update({
            "Positive pole depth (m)": _with_range(row, "top_depth_m", "top_depth_lo_m",
                                                   "top_depth_hi_m"),
            "Negative pole depth (m)": _number(row.get("neg_depth_m")),
            "Pole strength (mV·m)": _number(row.get("pole_k_mv_m"), 0),
        })
    else:
        geo = _number(row.get("geo_mean_depth_m"), 0)
        if _number(row.get("geo_mean_depth_sd_m"), 0) != "–":
            geo += f" ± {_number(row.get('geo_mean_depth_sd_m'), 0)}"
        props.update({
            "Top depth (m)": _with_range(row, "top_depth_m", "top_depth_lo_m", "top_depth_hi_m"),
            "Top edge centre E / N (m)": f"{_number(row.get('top_x'), 0)} / {_number(row.get('top_y'), 0)}",
            "Top elevation (m above sea level)": _number(_difference(row.get("ground_m"),
                                                                     row.get("top_depth_m")), 0),
            "√(top·bottom) depth (m, best resolved)": geo,
            "Bottom depth (m)": _number(row.get("bottom_depth_m")),
            "Jump (mV)": _with_range(row, "jump_mv", "jump_lo_mv", "jump_hi_mv"),
            "Strike / dip / dip direction (°)": f"{_number(row.get('strike_deg'), 0)} / "
                                                f"{_number(row.get('dip_deg'), 0)} / "
                                                f"{_number(row.get('dip_dir_deg'), 0)}",
            "Length (m)": _number(row.get("length_m"), 0),
            "σ ratio": _number(row.get("sigma_ratio"), 2),
        })
    props.update({
        "RMS (mV)": _number(row.get("rms_mv"), 2),
        "χ² (reduced)": _number(row.get("chi2_red"), 2),
        "BIC gain": _number(row.get("bic_gain"), 1),
        "Cautions": _flag_words(row.get("flags")),
        "_colour": colour, "_weight": weight, "_dash": dash, "_fill": fill,
    })
    return props


def _difference(a, b):
    try:
        return float(a) - float(b)
    except (TypeError, ValueError):
        return float("nan")


_PARAMETER_WORDS = {"top_depth_m": "top depth", "height_m": "height", "bottom_depth_m": "bottom depth",
                    "length_m": "length", "dip_deg": "dip", "sigma_ratio": "conductivity ratio",
                    "strength": "strength", "jump_mv": "jump", "pole_depth_m": "pole depth",
                    "neg_depth_m": "negative pole depth", "log_casing_length": "casing length",
                    "line_azimuth_deg": "line direction", "line_depth_m": "line depth"}


def _flag_words(flags):
    """The ``flags`` codes (docs/outputs.md) in words for the popup."""
    words = []
    for code in str(flags or "").split(";"):
        code = code.strip()
        if not code or code == "nan":
            continue
        if code.startswith("bound:"):
            name = code[6:]
            words.append(f"{_PARAMETER_WORDS.get(name, name)} at its limit (not resolved)")
        elif code.startswith("corr:"):
            a, _, b = code[5:].partition("/")
            words.append(f"{_PARAMETER_WORDS.get(a, a)} and {_PARAMETER_WORDS.get(b, b)} trade off")
        elif code == "terrain":
            words.append("uneven ground above the source")
        elif code == "dip-contrast approximation":
            words.append("conductivity contrast approximate (dip below 80°)")
        else:
            words.append(code)
    return _text("; ".join(words)) or "–"


_RANGE_NOTE = "Values in brackets: 16th to 84th percentile."

#: The map draws at most this many station circles (every flagged station, then an even
#: sample along the lines); every station is in the GeoPackage.
MAP_MAX_STATIONS = 5000
#: The stations layer starts ticked only up to this many stations, so that the circles do not
#: hide the SP grid and the sources; above it, tick "Stations (SP)" in the layer list.
MAP_STATIONS_SHOWN = 1500
#: Above this many vector features, Leaflet draws on a canvas instead of one SVG element each.
_CANVAS_FROM = 2000


def thin_stations(frame, limit=MAP_MAX_STATIONS):
    """
    The stations the map draws: all when at most ``limit``; else every flagged
    station (up to a fifth of ``limit``) and every k-th of the others in file
    order (stations come line by line), k the smallest that fits ``limit``.
    Returns (frame, note) with the note None when nothing was left out.
    """
    n = len(frame)
    if n <= limit:
        return frame, None
    flag = frame["flag"].fillna("").astype(str).to_numpy() if "flag" in frame else np.full(n, "")
    flagged = np.flatnonzero(flag != "")[: limit // 5]
    others = np.setdiff1d(np.arange(n), flagged)
    step = int(np.ceil(len(others) / max(limit - len(flagged), 1)))
    keep = np.sort(np.concatenate([flagged, others[::step]]))
    note = (f"Stations: {len(keep):,} of {n:,} drawn (every flagged station and every {step}th of the "
            "others along the lines); all are in interpretation.gpkg.")
    return frame.iloc[keep], note


#: Popups pan clear of the title box (top left) and the layer list (top right).
_POPUP_PADDING = {"autoPanPaddingTopLeft": [70, 60], "autoPanPaddingBottomRight": [20, 20]}


def _add_geojson(folium, group, frame, properties, *, style, marker=None, tooltip_field=None,
                 click_width=None):
    collection = _feature_collection(frame, properties)
    if not collection["features"]:
        return
    fields = [k for k in properties[0] if not k.startswith("_")]

    def popup():
        return folium.GeoJsonPopup(fields=fields, aliases=fields, labels=True, **_POPUP_PADDING)

    def tooltip():
        return folium.GeoJsonTooltip(fields=[tooltip_field], labels=False) if tooltip_field else None

    if click_width:
        # An invisible wide copy underneath, so that a dashed line can be clicked in its gaps too.
        folium.GeoJson(collection, style_function=lambda f: {"weight": click_width, "opacity": 0.0},
                       highlight_function=None, popup=popup(), tooltip=tooltip()).add_to(group)
    kwargs = {}
    if marker is not None:
        kwargs["marker"] = marker
    if tooltip_field:
        kwargs["tooltip"] = tooltip()
    folium.GeoJson(
        collection,
        style_function=style,
        highlight_function=None,
        popup=popup(),
        **kwargs,
    ).add_to(group)


# --------------------------------------------------------------------------
# Grid overlay
# --------------------------------------------------------------------------

def _grid_overlay(grid, cmap, amplitude):
    """RGBA image (uint8) of the grid in Web Mercator and its lat/lon bounds."""
    destination, bounds = _to_web_mercator(grid)
    rgba = cmap(0.5 + 0.5 * np.clip(np.nan_to_num(destination) / amplitude, -1, 1))
    rgba[..., 3] = np.where(np.isfinite(destination), 1.0, 0.0)
    return (rgba * 255).round().astype(np.uint8), bounds


#: Sun for the relief shading: from the north-west, 45° above the horizon (the usual choice of
#: cartographers, which makes relief read the right way round).
SUN_AZIMUTH_DEG, SUN_ALTITUDE_DEG = 315.0, 45.0
#: The shaded relief is at most this many cells on its longer side (the DEM is averaged down).
RELIEF_MAX_CELLS = 1200


def hillshade(values, d_north, d_east, *, azimuth_deg=SUN_AZIMUTH_DEG, altitude_deg=SUN_ALTITUDE_DEG):
    """
    Shaded relief (0 to 1) of an elevation grid whose row 0 is the southernmost.

    The cosine of the angle between the surface normal and the direction of
    the sun; 0 in the shadow. A flat surface gives sin(altitude).
    """
    dz_dn, dz_de = np.gradient(np.asarray(values, dtype=float), d_north, d_east)
    az, alt = math.radians(azimuth_deg), math.radians(altitude_deg)
    sun = np.array([math.sin(az) * math.cos(alt), math.cos(az) * math.cos(alt), math.sin(alt)])  # E, N, up
    norm = np.sqrt(dz_de**2 + dz_dn**2 + 1.0)
    return np.clip((-dz_de * sun[0] - dz_dn * sun[1] + sun[2]) / norm, 0.0, 1.0)


def _dem_window(dem, bounds_xy, max_cells=RELIEF_MAX_CELLS):
    """The DEM around ``bounds_xy`` (10 % margin), averaged down to ``max_cells`` on its longer side."""
    west, south, east, north = bounds_xy
    pad = 0.1 * max(east - west, north - south, 1.0)
    cols = np.flatnonzero((dem.easting >= west - pad) & (dem.easting <= east + pad))
    rows = np.flatnonzero((dem.northing >= south - pad) & (dem.northing <= north + pad))
    if cols.size < 3 or rows.size < 3:
        return None
    step = max(1, int(math.ceil(max(cols.size, rows.size) / max_cells)))
    values = np.asarray(dem.values, dtype=float)[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    n_r, n_c = (values.shape[0] // step) * step, (values.shape[1] // step) * step
    values = values[:n_r, :n_c].reshape(n_r // step, step, n_c // step, step).mean(axis=(1, 3))
    easting = dem.easting[cols[0]:cols[0] + n_c].reshape(-1, step).mean(axis=1)
    northing = dem.northing[rows[0]:rows[0] + n_r].reshape(-1, step).mean(axis=1)
    return easting, northing, values


def _contours(dem, bounds_xy, crs):
    """Elevation contours around ``bounds_xy`` at a round interval (about ten levels), in WGS 84."""
    from matplotlib.figure import Figure
    from pyproj import Transformer

    window = _dem_window(dem, bounds_xy, max_cells=400)
    if window is None:
        return [], None
    easting, northing, values = window
    finite = values[np.isfinite(values)]
    if finite.size < 4 or np.ptp(finite) <= 0:
        return [], None
    interval = _nice_ceiling(np.ptp(finite) / 10.0)
    levels = np.arange(np.ceil(finite.min() / interval), np.floor(finite.max() / interval) + 1) * interval
    if levels.size == 0:
        return [], None
    contour_set = Figure().add_subplot().contour(easting, northing, np.ma.masked_invalid(values), levels=levels)
    to_wgs = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lines = []
    for level, segments in zip(contour_set.levels, contour_set.allsegs):
        for seg in segments:
            if len(seg) >= 2:
                lon, lat = to_wgs.transform(seg[:, 0], seg[:, 1])
                lines.append((float(level), np.column_stack([lat, lon]).tolist()))
    return lines, interval


def _relief_overlay(dem, bounds_xy):
    """Grey RGBA image of the DEM's shaded relief around ``bounds_xy`` (working CRS), in Web Mercator."""
    from .models import Raster

    window = _dem_window(dem, bounds_xy)
    if window is None:
        return None
    easting, northing, values = window
    d_north, d_east = abs(northing[1] - northing[0]), abs(easting[1] - easting[0])
    shade = hillshade(values, d_north, d_east)
    shade[~np.isfinite(values)] = np.nan
    destination, image_bounds = _to_web_mercator(Raster(easting, northing, shade, dem.crs, units=""))
    grey = np.nan_to_num(destination, nan=0.0)
    rgba = np.stack([grey, grey, grey, np.where(np.isfinite(destination), 1.0, 0.0)], axis=-1)
    return (rgba * 255).round().astype(np.uint8), image_bounds


def _to_web_mercator(grid):
    """The grid's values reprojected to Web Mercator (north-up rows) and their lat/lon bounds."""
    import rasterio.transform
    import rasterio.warp
    from pyproj import Transformer
    from rasterio.enums import Resampling

    values = np.asarray(grid.values, dtype=float)
    d_north, d_east = grid.spacing
    west = grid.easting[0] - d_east / 2
    north = grid.northing[-1] + d_north / 2
    n_north, n_east = values.shape
    src_transform = rasterio.transform.from_origin(west, north, d_east, d_north)
    east, south = west + n_east * d_east, north - n_north * d_north
    dst_transform, width, height = rasterio.warp.calculate_default_transform(
        grid.crs, "EPSG:3857", n_east, n_north, left=west, bottom=south, right=east, top=north)
    band = np.flipud(values).astype("float32")  # row 0 south -> north-up
    destination = np.full((height, width), np.nan, dtype="float32")
    rasterio.warp.reproject(
        band, destination, src_transform=src_transform, src_crs=grid.crs,
        src_nodata=np.nan, dst_transform=dst_transform, dst_crs="EPSG:3857",
        dst_nodata=np.nan, resampling=Resampling.bilinear)
    left, bottom, right, top = rasterio.transform.array_bounds(height, width, dst_transform)
    to_wgs = Transformer.from_crs("EPSG:3857", "EPSG:4326", always_xy=True)
    lon0, lat0 = to_wgs.transform(left, bottom)
    lon1, lat1 = to_wgs.transform(right, top)
    return destination, [[lat0, lon0], [lat1, lon1]]


def _png_uri(image):
    from matplotlib import image as mimage

    buffer = io.BytesIO()
    mimage.imsave(buffer, image, format="png")
    return _data_uri(buffer.getvalue())


# --------------------------------------------------------------------------
# Page furniture (title, colour bar, cautions)
# --------------------------------------------------------------------------

def _colour_bar_html(cmap, amplitude, label):
    from matplotlib.colors import to_hex

    stops = ", ".join(f"{to_hex(cmap(t))} {100 * t:.0f}%" for t in np.linspace(0, 1, 11))
    ticks = "".join(
        f'<span style="position:absolute;left:{100 * t:.0f}%;transform:translateX(-50%)">'
        f"{v:g}</span>"
        for t, v in ((0.0, -amplitude), (0.25, -amplitude / 2), (0.5, 0.0),
                     (0.75, amplitude / 2), (1.0, amplitude)))
    return (
        '<div id="geosp-colourbar" class="geosp-box" style="bottom:28px;right:10px;width:230px">'
        f'<div style="font-weight:bold;margin-bottom:3px">{_text(label)}</div>'
        f'<div style="height:12px;border:1px solid #555;background:linear-gradient(to right, {stops})">'
        '</div><div style="position:relative;height:14px;margin:2px 8px 0 8px">'
        f"{ticks}</div></div>"
    )


def _legend_html():
    """What the line and outline styles mean (the colour bar explains the SP colours)."""
    def sample(colour, weight, dash, fill=0.0):
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        if fill:
            return (f'<svg width="30" height="12"><rect x="2" y="2" width="26" height="8" fill="{colour}" '
                    f'fill-opacity="{max(fill, 0.1)}" stroke="{colour}" stroke-width="{weight}"{dash_attr}/></svg>')
        return (f'<svg width="30" height="12"><line x1="1" y1="6" x2="29" y2="6" stroke="{colour}" '
                f'stroke-width="{weight}"{dash_attr}/></svg>')

    rows = [(sample(*_SEGMENT_STYLE["detected"]), "fault segment with a source"),
            (sample(*_SEGMENT_STYLE["marginal"]), "marginal: worth a second look"),
            (sample(*_SEGMENT_STYLE["cultural"]), "anomaly explained by a cultural source"),
            (sample(*_SEGMENT_STYLE["no"]), "no anomaly detected"),
            (sample(*_SOURCE_STYLE["target"]), "source footprint (model)"),
            (sample(*_SOURCE_STYLE["uncertain"]), "uncertain source: not a target"),
            (sample(*_SOURCE_STYLE["cultural"]), "likely cultural (pipe, casing)")]
    body = "".join(f'<div style="display:flex;align-items:center;gap:6px">{svg}<span>{text}</span></div>'
                   for svg, text in rows)
    return (f'<div id="geosp-legend" class="geosp-box" style="bottom:100px;right:10px;width:230px">'
            f'<div style="font-weight:bold;margin-bottom:3px">Legend</div>{body}'
            '<div style="color:#555;margin-top:3px">Click a feature for its values.</div></div>')


def _furniture(title, cautions, colour_bar, note):
    items = "".join(f"<li>{_text(c)}</li>" for c in cautions)
    heading = (f'<div id="geosp-title" class="geosp-box" style="top:10px;left:60px">'
               f"<b>{_text(title)}</b></div>") if title else ""
    return f"""
<style>
.geosp-box {{position:fixed;z-index:1000;background:rgba(255,255,255,0.93);padding:6px 9px;
  border:1px solid #888;border-radius:4px;font:12px/1.35 sans-serif;color:#222;}}
#geosp-cautions ul {{margin:3px 0 0 0;padding-left:16px}}
.leaflet-popup-content table th {{text-align:left;padding-right:8px;font-weight:600}}
</style>
{heading}
<div id="geosp-cautions" class="geosp-box" role="note" style="bottom:64px;left:10px;max-width:330px">
<b>Caution</b><ul>{items}</ul><div style="margin-top:3px;color:#555">{_text(note)}</div></div>
{colour_bar}
{_legend_html()}
"""


# --------------------------------------------------------------------------
# Public
# --------------------------------------------------------------------------

def make_webmap(*, stations, segments, sources, grid=None, title="", tiles=None,
                tiles_attribution="", cautions=CAUTIONS, sp_range_mv="auto", dem=None):
    """
    Build the offline interactive map as one self-contained HTML document.

    Parameters
    ----------
    stations : GeoDataFrame
        ``stations`` layer (:func:`geosp.tables.stations_frame`) in the
        working CRS; circle markers coloured by ``sp_mv``, at most
        ``MAP_MAX_STATIONS`` of them (:func:`thin_stations`), the layer
        ticked only up to ``MAP_STATIONS_SHOWN`` stations.
    segments : GeoDataFrame
        ``fault_segments`` layer; lines coloured by ``score``, detected
        segments bold.
    sources : GeoDataFrame
        ``sources`` layer (footprint polygons).
    grid : Raster or None
        Gridded SP in mV (NaN = no data), shown as an image overlay after
        reprojection to Web Mercator.
    title : str
        Shown at the top of the map and as the page title (escaped).
    tiles : str or None
        Basemap: a tile URL template (``https://.../{z}/{x}/{y}.png``) or a
        folium tile name. Default None: no basemap, nothing loads from the
        network.
    tiles_attribution : str
        Attribution text for ``tiles`` (escaped).
    cautions : sequence of str
        Statements shown in the caution box. Default :data:`CAUTIONS`.
    sp_range_mv : float or "auto"
        Half-range of the SP colour scale (mV); "auto": the 98th percentile
        of |SP| rounded up to a round number.
    dem : Raster or None
        Elevations (m, working CRS): drawn as an offline shaded relief
        under the SP grid, over the survey area (:func:`hillshade`).

    Returns
    -------
    str
        The HTML document.

    Raises
    ------
    RuntimeError
        If the document would load anything from the network other than the
        requested tiles (a bug).

    Notes
    -----
    Stations and grid share one diverging colour scale centred on 0 mV,
    from minus to plus the 98th percentile of ``|SP|`` rounded up to a
    "nice" number (1, 2, 2.5 or 5 times a power of ten).
    """
    import folium
    from matplotlib import colormaps

    cmap = colormaps[_CMAP]
    amplitude = colour_range(stations, grid, sp_range_mv)
    n_stations = len(stations) if stations is not None else 0
    thinned_note = None
    if stations is not None:
        stations, thinned_note = thin_stations(stations)
    layers = {"stations": _to_wgs84(stations), "segments": _to_wgs84(segments),
              "sources": _to_wgs84(sources)}
    n_features = sum(len(f) for f in layers.values() if f is not None)

    bounds = []
    for frame in layers.values():
        if frame is not None and len(frame):
            bounds.append(frame.total_bounds)
    overlay = None
    if grid is not None and np.isfinite(np.asarray(grid.values, dtype=float)).any():
        image, image_bounds = _grid_overlay(grid, cmap, amplitude)
        overlay = (image, image_bounds)
        (lat0, lon0), (lat1, lon1) = image_bounds
        bounds.append(np.array([lon0, lat0, lon1, lat1]))
    if bounds:
        b = np.vstack(bounds)
        west, south, east, north = b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max()
    else:
        west, south, east, north = -1.0, -1.0, 1.0, 1.0

    fmap = folium.Map(location=[(south + north) / 2, (west + east) / 2], zoom_start=13,
                      tiles=None, control_scale=True, prefer_canvas=n_features > _CANVAS_FROM)
    # Nothing from CDNs: Leaflet is inlined below; jQuery, Bootstrap and the
    # marker-icon fonts are not needed by anything on this map.
    fmap.default_js = []
    fmap.default_css = []
    figure = fmap.get_root()
    figure.title = _text(title) or "geosp map"
    figure.header.add_child(folium.Element(f"<style>{_leaflet_css()}</style>"),
                            name="leaflet_css")
    figure.header.add_child(
        folium.Element(f"<script>{_asset('leaflet', 'leaflet.js')}\n{_leaflet_icons_js()}"
                       "</script>"), name="leaflet_js")

    _check_tiles(tiles)
    if tiles:
        folium.TileLayer(tiles=tiles, attr=_text(tiles_attribution) or "Basemap (user tiles)",
                         name="Basemap", overlay=False, control=True).add_to(fmap)

    if dem is not None and stations is not None and len(stations):
        relief = _relief_overlay(dem, stations.total_bounds)
        if relief is not None:
            folium.raster_layers.ImageOverlay(
                image=_png_uri(relief[0]), bounds=relief[1], opacity=1.0,
                name="Relief (shaded from the DEM)", interactive=False, cross_origin=False, zindex=0,
            ).add_to(fmap)
        lines, interval = _contours(dem, stations.total_bounds, dem.crs)
        if lines:
            group = folium.FeatureGroup(name=f"Elevation contours ({interval:g} m)", show=False).add_to(fmap)
            for level, coords in lines:
                folium.PolyLine(coords, color="#5a3d1e", weight=1, opacity=0.7,
                                tooltip=f"{level:g} m above sea level").add_to(group)
    if overlay is not None:
        folium.raster_layers.ImageOverlay(
            image=_png_uri(overlay[0]), bounds=overlay[1], opacity=_GRID_OPACITY,
            name="SP grid (mV)", interactive=False, cross_origin=False, zindex=1,
        ).add_to(fmap)

    groups = {}
    for key, label in (("sources", "Source footprints (models)"),
                       ("segments", "Fault segments (detection)"),
                       ("stations", "Stations (SP)")):
        show = key != "stations" or n_stations <= MAP_STATIONS_SHOWN
        groups[key] = folium.FeatureGroup(name=label, show=show).add_to(fmap)

    frame = layers["sources"]
    if frame is not None and len(frame):
        props = [_source_properties(r) for r in frame.to_dict("records")]
        _add_geojson(folium, groups["sources"], frame, props, tooltip_field="Source",
                     style=lambda f: {"color": f["properties"]["_colour"],
                                      "weight": f["properties"]["_weight"],
                                      "dashArray": f["properties"]["_dash"],
                                      "fillColor": f["properties"]["_colour"],
                                      "fillOpacity": f["properties"]["_fill"]})
    frame = layers["segments"]
    if frame is not None and len(frame):
        props = [_segment_properties(r) for r in frame.to_dict("records")]
        _add_geojson(folium, groups["segments"], frame, props, tooltip_field="Segment", click_width=14,
                     style=lambda f: {"color": f["properties"]["_colour"],
                                      "weight": f["properties"]["_weight"],
                                      "dashArray": f["properties"]["_dash"], "opacity": 0.95})
    frame = layers["stations"]
    if frame is not None and len(frame):
        props = [_station_properties(r, cmap, amplitude) for r in frame.to_dict("records")]
        _add_geojson(folium, groups["stations"], frame, props, tooltip_field="Station",
                     marker=folium.CircleMarker(radius=5, fill=True),
                     style=lambda f: {"fillColor": f["properties"]["_colour"], "color": "#333333",
                                      "weight": 1, "fillOpacity": 0.95})

    folium.LayerControl(collapsed=False, position="topright").add_to(fmap)
    fmap.fit_bounds([[south, west], [north, east]])

    colour_bar = _colour_bar_html(cmap, amplitude, "SP (mV)")
    note = _RANGE_NOTE + (f" {thinned_note}" if thinned_note else "")
    if n_stations > MAP_STATIONS_SHOWN:
        note += " Tick “Stations (SP)” in the layer list to show the stations."
    figure.html.add_child(folium.Element(_furniture(title, cautions, colour_bar, note)))
    document = figure.render()
    check_offline(document)
    return document
