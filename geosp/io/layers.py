"""
Write and read the interpretation GeoPackage (``interpretation.gpkg``).

The layers open already styled in a desktop GIS: :func:`write_layers` adds a
``layer_styles`` table (the desktop-GIS convention for default styles, with
QML and SLD text per layer) and registers it in ``gpkg_contents`` as an
attributes table, so the file stays a valid GeoPackage.
"""

from __future__ import annotations

import datetime as _dt
import sqlite3
from html import escape
from pathlib import Path

import numpy as np
import pyogrio

from geosp.io.atomic import atomic_path
from .._numbers import nice_ceiling as _nice_ceiling

__all__ = ["write_layers", "read_layers", "station_ramp", "STYLE_TABLE"]

STYLE_TABLE = "layer_styles"

# Diverging ramp, negative (blue) -> 0 (near white) -> positive (red): 8 classes.
_DIVERGING = ["#2166ac", "#4393c3", "#92c5de", "#d1e5f0",
              "#fddbc7", "#f4a582", "#d6604d", "#b2182b"]
# Sequential ramp for segment scores, low -> high.
_SCORE_COLOURS = ["#bdbdbd", "#fdae61", "#f46d43", "#a50026"]
_SCORE_EDGES = [2.0, 3.0, 5.0]


def _rgba(hex_colour, alpha=255):
    h = hex_colour.lstrip("#")
    return f"{int(h[0:2], 16)},{int(h[2:4], 16)},{int(h[4:6], 16)},{alpha}"


def station_ramp(values, *, n_classes=8):
    """
    Class edges (mV) of a diverging colour ramp centred on 0 mV.

    The ramp is symmetric, ``[-A, A]`` with ``A`` the 98th percentile of
    ``|values|`` rounded up to a "nice" number, split into ``n_classes``
    equal classes (0 mV is always an edge).

    Parameters
    ----------
    values : array
        SP values in mV (NaN ignored).
    n_classes : int, optional
        Even number of classes. Default 8.

    Returns
    -------
    edges : ndarray, shape (n_classes + 1,)
    """
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    amplitude = _nice_ceiling(np.percentile(np.abs(values), 98)) if values.size else 1.0
    return np.linspace(-amplitude, amplitude, n_classes + 1)


def _marker_symbol(name, colour):
    return f"""<symbol type="marker" name="{name}" alpha="1" clip_to_extent="1" force_rhr="0">
  <layer class="SimpleMarker" enabled="1" pass="0" locked="0">
   <Option type="Map">
    <Option name="color" type="QString" value="{_rgba(colour)}"/>
    <Option name="name" type="QString" value="circle"/>
    <Option name="outline_color" type="QString" value="60,60,60,255"/>
    <Option name="outline_style" type="QString" value="solid"/>
    <Option name="outline_width" type="QString" value="0.2"/>
    <Option name="outline_width_unit" type="QString" value="MM"/>
    <Option name="size" type="QString" value="2.4"/>
    <Option name="size_unit" type="QString" value="MM"/>
   </Option>
  </layer>
 </symbol>"""


def _line_symbol(name, colour, width_mm, style="solid"):
    return f"""<symbol type="line" name="{name}" alpha="1" clip_to_extent="1" force_rhr="0">
  <layer class="SimpleLine" enabled="1" pass="0" locked="0">
   <Option type="Map">
    <Option name="capstyle" type="QString" value="round"/>
    <Option name="joinstyle" type="QString" value="round"/>
    <Option name="line_color" type="QString" value="{_rgba(colour)}"/>
    <Option name="line_style" type="QString" value="{style}"/>
    <Option name="line_width" type="QString" value="{width_mm}"/>
    <Option name="line_width_unit" type="QString" value="MM"/>
   </Option>
  </layer>
 </symbol>"""


def _fill_symbol(name, colour, width_mm):
    return f"""<symbol type="fill" name="{name}" alpha="1" clip_to_extent="1" force_rhr="0">
  <layer class="SimpleFill" enabled="1" pass="0" locked="0">
   <Option type="Map">
    <Option name="color" type="QString" value="{_rgba(colour, 40)}"/>
    <Option name="outline_color" type="QString" value="{_rgba(colour)}"/>
    <Option name="outline_style" type="QString" value="solid"/>
    <Option name="outline_width" type="QString" value="{width_mm}"/>
    <Option name="outline_width_unit" type="QString" value="MM"/>
    <Option name="style" type="QString" value="solid"/>
   </Option>
  </layer>
 </symbol>"""


def _qml(renderer):
    return ("<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n"
            '<qgis version="3.28.0" styleCategories="Symbology">\n'
            f"{renderer}\n</qgis>\n")


def _stations_qml(frame):
    edges = station_ramp(frame["sp_mv"] if "sp_mv" in frame else [])
    values = frame["sp_mv"].to_numpy(dtype=float) if "sp_mv" in frame else np.array([])
    values = values[np.isfinite(values)]
    lows, highs = edges[:-1].copy(), edges[1:].copy()
    if values.size:  # open-ended outer classes
        lows[0] = min(lows[0], float(values.min()))
        highs[-1] = max(highs[-1], float(values.max()))
    ranges, symbols = [], []
    for i, (lo, hi) in enumerate(zip(lows, highs)):
        label = f"{edges[i]:g} to {edges[i + 1]:g} mV"
        ranges.append(f'  <range lower="{lo:.6g}" upper="{hi:.6g}" symbol="{i}" '
                      f'label="{label}" render="true"/>')
        symbols.append(_marker_symbol(i, _DIVERGING[i % len(_DIVERGING)]))
    renderer = (
        '<renderer-v2 type="graduatedSymbol" attr="sp_mv" graduatedMethod="GraduatedColor" '
        'symbollevels="0" enableorderby="0" forceraster="0">\n <ranges>\n'
        + "\n".join(ranges) + "\n </ranges>\n <symbols>\n" + "\n".join(symbols)
        + "\n </symbols>\n</renderer-v2>"
    )
    return _qml(renderer)


def _segments_qml():
    bounds = [-np.inf] + _SCORE_EDGES + [np.inf]
    rules, symbols, k = [], [], 0
    for detected, width, style in ((1, 1.6, "solid"), (0, 0.5, "dash")):
        for i, colour in enumerate(_SCORE_COLOURS):
            lo, hi = bounds[i], bounds[i + 1]
            parts = [f'"detected" = {detected}']
            if np.isfinite(lo):
                parts.append(f'"score" >= {lo:g}')
            if np.isfinite(hi):
                parts.append(f'"score" < {hi:g}')
            if not np.isfinite(lo):
                span = f"score < {hi:g}"
            elif not np.isfinite(hi):
                span = f"score >= {lo:g}"
            else:
                span = f"score {lo:g} to {hi:g}"
            label = ("detected, " if detected else "not detected, ") + span
            rules.append(f'  <rule key="r{k}" symbol="{k}" label="{escape(label)}" '
                         f'filter="{escape(" AND ".join(parts))}"/>')
            symbols.append(_line_symbol(k, colour, width, style))
            k += 1
    renderer = ('<renderer-v2 type="RuleRenderer" symbollevels="0" enableorderby="0" '
                'forceraster="0">\n <rules key="root">\n' + "\n".join(rules)
                + "\n </rules>\n <symbols>\n" + "\n".join(symbols)
                + "\n </symbols>\n</renderer-v2>")
    return _qml(renderer)


def _sources_qml():
    renderer = ('<renderer-v2 type="singleSymbol" symbollevels="0" enableorderby="0" '
                'forceraster="0">\n <symbols>\n' + _fill_symbol(0, "#7b3294", 0.6)
                + "\n </symbols>\n</renderer-v2>")
    return _qml(renderer)


def _sld(name, kind, colour):
    symbolizer = {
        "point": ('<se:PointSymbolizer><se:Graphic><se:Mark><se:WellKnownName>circle'
                  '</se:WellKnownName><se:Fill><se:SvgParameter name="fill">'
                  f'{colour}</se:SvgParameter></se:Fill></se:Mark><se:Size>7</se:Size>'
                  '</se:Graphic></se:PointSymbolizer>'),
        "line": ('<se:LineSymbolizer><se:Stroke><se:SvgParameter name="stroke">'
                 f'{colour}</se:SvgParameter><se:SvgParameter name="stroke-width">2'
                 '</se:SvgParameter></se:Stroke></se:LineSymbolizer>'),
        "polygon": ('<se:PolygonSymbolizer><se:Stroke><se:SvgParameter name="stroke">'
                    f'{colour}</se:SvgParameter><se:SvgParameter name="stroke-width">2'
                    '</se:SvgParameter></se:Stroke></se:PolygonSymbolizer>'),
    }[kind]
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            '<StyledLayerDescriptor version="1.1.0" '
            'xmlns="http://www.opengis.net/sld" xmlns:se="http://www.opengis.net/se">'
            f'<NamedLayer><se:Name>{escape(name)}</se:Name><UserStyle><se:Name>{escape(name)}'
            f'</se:Name><se:FeatureTypeStyle><se:Rule>{symbolizer}</se:Rule>'
            '</se:FeatureTypeStyle></UserStyle></NamedLayer></StyledLayerDescriptor>')


def _style_for(name, frame):
    """(qml, sld, description) for a layer, or None when geosp has no style for it."""
    if name == "stations" and "sp_mv" in frame:
        return _stations_qml(frame), _sld(name, "point", "#d6604d"), \
            "SP (mV), diverging ramp centred on 0 mV"
    if name == "fault_segments":
        return _segments_qml(), _sld(name, "line", "#f46d43"), \
            "Fault segments by detection score; detected segments bold"
    if name in ("sources", "sources_3d"):
        return _sources_qml(), _sld(name, "polygon", "#7b3294"), "Source footprints, outlined"
    return None


def _geometry_type(frame):
    kind = frame.attrs.get("geometry_type")
    if kind:
        return kind
    if len(frame) == 0:
        return "Unknown"
    types = set(frame.geometry.geom_type.dropna())
    if len(types) == 1:
        kind = types.pop()
        if frame.geometry.has_z.any():
            kind += " Z"
        return kind
    return None


def _add_styles(path, layers):
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    con = sqlite3.connect(path)
    try:
        geometry_columns = dict(con.execute(
            "SELECT table_name, column_name FROM gpkg_geometry_columns").fetchall())
        con.execute(
            f"CREATE TABLE IF NOT EXISTS {STYLE_TABLE} ("
            "id INTEGER PRIMARY KEY AUTOINCREMENT, f_table_catalog TEXT(256), "
            "f_table_schema TEXT(256), f_table_name TEXT(256), f_geometry_column TEXT(256), "
            "styleName TEXT(30), styleQML TEXT, styleSLD TEXT, useAsDefault BOOLEAN, "
            "description TEXT, owner TEXT(30), ui TEXT(30), update_time DATETIME)")
        for name, frame in layers.items():
            style = _style_for(name, frame)
            if style is None or name not in geometry_columns:
                continue
            qml, sld, description = style
            con.execute(
                f"INSERT INTO {STYLE_TABLE} (f_table_catalog, f_table_schema, f_table_name, "
                "f_geometry_column, styleName, styleQML, styleSLD, useAsDefault, description, "
                "owner, ui, update_time) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                ("", "", name, geometry_columns[name], f"geosp {name}", qml, sld, 1,
                 description, "geosp", "", now))
        con.execute(
            "INSERT OR REPLACE INTO gpkg_contents (table_name, data_type, identifier, "
            "description, last_change) VALUES (?, 'attributes', ?, ?, ?)",
            (STYLE_TABLE, STYLE_TABLE, "Default display styles", now))
        con.commit()
    finally:
        con.close()


def write_layers(path, layers, *, styles=True):
    """
    Write GeoDataFrames as the layers of one GeoPackage, atomically.

    All layers go to a temporary GeoPackage in the same folder, which then
    replaces ``path``; on any error ``path`` is left as it was.

    Parameters
    ----------
    path : str or Path
        Output ``.gpkg`` file.
    layers : dict of str to GeoDataFrame
        Layer name to frame, in the order to write (``stations``,
        ``fault_segments``, ``sources``, ``sources_3d`` in geosp). Empty
        frames are written as empty layers; their geometry type comes from
        ``frame.attrs["geometry_type"]`` (set by :mod:`geosp.tables`).
    styles : bool, optional
        Add the ``layer_styles`` table with default display styles. Default
        True.

    Returns
    -------
    Path
        ``path``.
    """
    path = Path(path)
    with atomic_path(path) as tmp:
        for name, frame in layers.items():
            kwargs = {}
            kind = _geometry_type(frame)
            if kind:
                kwargs["geometry_type"] = kind
            pyogrio.write_dataframe(frame, tmp, layer=name, driver="GPKG", **kwargs)
        if not layers:
            raise ValueError("write_layers needs at least one layer.")
        if styles:
            _add_styles(tmp, layers)
    return path


def read_layers(path):
    """
    Read every data layer of a GeoPackage written by :func:`write_layers`.

    Parameters
    ----------
    path : str or Path
        GeoPackage file.

    Returns
    -------
    dict of str to GeoDataFrame
        Layer name to frame, in file order; the ``layer_styles`` table is
        left out.
    """
    names = [row[0] for row in pyogrio.list_layers(path)]
    return {name: pyogrio.read_dataframe(path, layer=name)
            for name in names if name != STYLE_TABLE}
