"""Open vector files (Shapefile, zipped Shapefile, GeoPackage, GeoJSON) with one clear error per problem."""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import pyogrio

from ..errors import InputError

VECTOR_SUFFIXES = {".shp", ".zip", ".gpkg", ".geojson", ".json"}


def _gdal_path(path):
    if path.suffix.lower() == ".zip":
        return f"zip://{path}"
    return str(path)


def read_vector(path, *, layer="", what="file"):
    """
    Read a vector layer into a GeoDataFrame.

    Raises InputError for a missing file, an unsupported format, a broken
    file, an unknown or ambiguous layer, or an empty layer.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(path, f"the {what} does not exist.", "Check the path (in the project file, or on the "
                         "command line for geosp forward).")
    suffix = path.suffix.lower()
    if suffix not in VECTOR_SUFFIXES:
        raise InputError(path, f"unsupported {what} format '{suffix}'.",
                         "Use a Shapefile (.shp or zipped .zip), GeoPackage (.gpkg) or GeoJSON (.geojson).")
    if suffix == ".shp":
        for part in (".shx", ".dbf"):
            if not path.with_suffix(part).exists() and not path.with_suffix(part.upper()).exists():
                raise InputError(path, f"the Shapefile is incomplete: {path.with_suffix(part).name} is missing.",
                                 "Copy all the Shapefile's parts (.shp, .shx, .dbf, .prj) into one folder, "
                                 "or export the layer as a GeoPackage.")
        _check_shapefile_length(path)
    source = _gdal_path(path)
    try:
        layers = pyogrio.list_layers(source)
    except Exception as err:  # pyogrio raises several DataSource errors
        raise InputError(path, f"cannot be opened as a {what} ({_short(err)}).",
                         "Check that the file is complete and not corrupted; re-export it from your GIS.") from None
    names = [str(name) for name, _ in layers]
    if not names:
        raise InputError(path, "contains no layers.", "Export the data again.")
    if layer:
        if layer not in names:
            raise InputError(path, f"has no layer '{layer}'.", f"Layers in the file: {', '.join(names)}.")
    elif len(names) > 1 and suffix == ".gpkg":
        raise InputError(path, f"has {len(names)} layers ({', '.join(names)}).",
                         "Name the one to use with layer = \"...\" in the project file.")
    else:
        layer = names[0]
    try:
        frame = gpd.read_file(source, layer=layer, engine="pyogrio")
    except Exception as err:
        raise InputError(path, f"layer '{layer}' cannot be read ({_short(err)}).",
                         "Check that the file is complete and not corrupted; re-export it from your GIS.") from None
    if len(frame) == 0:
        raise InputError(path, f"layer '{layer}' is empty.", "Export a layer that has features.")
    _check_degrees(frame, path, layer)
    return frame, layer


def _check_degrees(frame, path, layer):
    """A layer in geographic coordinates whose numbers cannot be degrees (a projected file without its CRS)."""
    if frame.crs is None or not frame.crs.is_geographic:
        return
    bounds = frame.geometry.dropna().total_bounds
    if len(bounds) == 4 and (abs(bounds[[0, 2]]).max() > 360.0 or abs(bounds[[1, 3]]).max() > 90.0):
        raise InputError(path, f"layer '{layer}' is in longitude and latitude ({frame.crs.name}), but its "
                         f"coordinates reach {bounds[2]:.0f}, {bounds[3]:.0f}, which cannot be degrees.",
                         "The coordinates are projected (metres). GeoJSON is always longitude/latitude "
                         "(RFC 7946): export the layer as a GeoPackage or a Shapefile with its CRS, or "
                         "reproject it to longitude/latitude.")


def _check_shapefile_length(path):
    """The .shp and .shx headers state their file length (16-bit words at byte 24, big-endian)."""
    for part in (path, path.with_suffix(".shx")):
        if not part.exists():
            continue
        size = part.stat().st_size
        with open(part, "rb") as handle:
            header = handle.read(28)
        stated = 2 * int.from_bytes(header[24:28], "big") if len(header) == 28 else None
        if size < 100 or (stated is not None and size < stated):
            raise InputError(path, f"the Shapefile is truncated: {part.name} has {size} bytes"
                             + (f" of the {stated} its header states." if stated else "."),
                             "Copy the file again (the copy or download stopped early) or re-export it.")


def _short(err):
    text = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
    return text[:200]
