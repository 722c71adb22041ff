"""
Read any GDAL raster into a :class:`~geosp.models.Raster` and write rasters as
Cloud-Optimized GeoTIFFs.

The row flip (GeoTIFF rows run north to south, ``Raster.values`` rows run
south to north) and the half-cell shift (GeoTIFF transforms address cell
edges, ``Raster`` coordinates are cell centres) live in this module alone.
"""

from __future__ import annotations

import logging
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np

from geosp.errors import InputError
from geosp.models import Raster

logger = logging.getLogger(__name__)

__all__ = ["read_raster", "write_geotiff"]


def read_raster(path, *, crs=None, band=1):
    """
    Read one band of any GDAL raster (for example a DEM) into a Raster.

    Parameters
    ----------
    path : str or os.PathLike
        Raster file (GeoTIFF or any other format GDAL reads).
    crs : str or None, optional
        Working CRS (for example ``"EPSG:32611"``). When given and different
        from the file's CRS, the band is reprojected to it with bilinear
        resampling (``rasterio.warp.reproject``). Default None keeps the
        file's CRS.
    band : int, optional
        Band number, counting from 1. Default 1.

    Returns
    -------
    raster : Raster
        Values as float64 with NaN for nodata, row 0 the southernmost row,
        ``easting``/``northing`` the cell-centre coordinates in the CRS units
        (m for a projected CRS). ``units`` comes from the band's unit or a
        ``units`` tag, else ``""``; ``tags`` holds the file's dataset tags.

    Raises
    ------
    InputError
        If the file is missing or unreadable, has no CRS, lacks ``band``, or
        holds nodata only (after reprojection).
    """
    import rasterio
    from rasterio.crs import CRS
    from rasterio.errors import RasterioIOError

    path = Path(path)
    if not path.exists():
        raise InputError(path, "file not found.", "Check the path (relative paths are read from the project folder).")
    try:
        src = rasterio.open(path)
    except RasterioIOError as err:
        raise InputError(
            path, f"cannot be read as a raster ({err}).",
            "Export it as a GeoTIFF (with its CRS) and point the project file at that.",
        ) from None
    with src:
        if src.crs is None:
            raise InputError(
                path, "has no coordinate reference system.",
                "Assign its CRS in a GIS (for example EPSG:32611) and save it again.",
            )
        if not 1 <= band <= src.count:
            raise InputError(path, f"has {src.count} band(s); band {band} was asked for.",
                             f"Pick a band between 1 and {src.count}.")
        units = (src.units[band - 1] if src.units else None) or src.tags().get("units", "") or ""
        tags = dict(src.tags())
        target = CRS.from_user_input(crs) if crs is not None else src.crs
        transform = src.transform
        north_up = transform.b == 0 and transform.d == 0 and transform.a > 0 and transform.e < 0
        if target == src.crs and north_up:
            data = src.read(band, masked=True).astype("float64").filled(np.nan)
            out_crs = crs if crs is not None else src.crs.to_string()
        else:
            data, transform = _warp_band(src, band, target)
            out_crs = crs if crs is not None else src.crs.to_string()
    data[~np.isfinite(data)] = np.nan
    if not np.isfinite(data).any():
        raise InputError(path, "holds nodata only" + (" where it overlaps the working CRS." if crs else "."),
                         "Check the nodata value and that the raster covers the survey.")
    n_rows, n_cols = data.shape
    easting = transform.c + (np.arange(n_cols) + 0.5) * transform.a
    northing_top_down = transform.f + (np.arange(n_rows) + 0.5) * transform.e
    return Raster(
        easting=easting,
        northing=northing_top_down[::-1].copy(),
        values=np.ascontiguousarray(data[::-1]),
        crs=str(out_crs),
        units=units,
        tags=tags,
    )


def _warp_band(src, band, target):
    """Reproject one band to a north-up grid in ``target`` (bilinear); NaN for nodata."""
    from rasterio.warp import Resampling, calculate_default_transform, reproject

    with warnings.catch_warnings():
        # rasterio's own use of the affine package raises PendingDeprecationWarning.
        warnings.simplefilter("ignore", PendingDeprecationWarning)
        transform, width, height = calculate_default_transform(
            src.crs, target, src.width, src.height, *src.bounds)
        source = src.read(band, masked=True).astype("float64").filled(np.nan)
        destination = np.full((height, width), np.nan)
        reproject(
            source, destination, src_transform=src.transform, src_crs=src.crs,
            src_nodata=np.nan, dst_transform=transform, dst_crs=target, dst_nodata=np.nan,
            resampling=Resampling.bilinear,
        )
    return destination, transform


def write_geotiff(raster, path, *, nodata=-9999.0, tags=None):
    """
    Write a Raster as a single-band Cloud-Optimized GeoTIFF.

    The file is float32, north-up, deflate-compressed, tiled (256 × 256) with
    overviews whenever the grid is larger than one tile, and carries the CRS,
    the nodata value and the tags. It is written to a temporary file in the
    same folder and moved into place, so readers never see half a file.

    Parameters
    ----------
    raster : Raster
        Grid to write; NaN values become ``nodata``. ``raster.units`` is
        stored as the band unit and as a ``units`` tag.
    path : str or os.PathLike
        Output file; its folder must exist. An existing file is replaced.
    nodata : float, optional
        Value written where ``raster.values`` is NaN. Default -9999.0.
    tags : dict or None, optional
        Extra dataset tags (for example method, parameters, CV RMSE);
        merged over ``raster.tags``. Values are stored as text.

    Returns
    -------
    path : pathlib.Path
        The file written.

    Raises
    ------
    InputError
        If the folder does not exist or finite values equal ``nodata``.
    """
    import rasterio

    path = Path(path)
    if not path.parent.is_dir():
        raise InputError(path, "cannot be written: the folder does not exist.", "Create the output folder first.")
    values = np.asarray(raster.values, dtype="float64")
    if values.shape != (len(raster.northing), len(raster.easting)):
        raise ValueError(f"Raster values have shape {values.shape}, coordinates give "
                         f"{(len(raster.northing), len(raster.easting))}.")
    finite = np.isfinite(values)
    if np.any(values[finite].astype("float32") == np.float32(nodata)):
        raise InputError(path, f"the grid holds the nodata value {nodata} as data.",
                         "Pass another nodata value.")
    if len(raster.easting) > 1 and len(raster.northing) > 1:
        d_north, d_east = raster.spacing
    else:
        raise ValueError("A GeoTIFF needs at least 2 × 2 nodes.")
    # Half-cell shift: node centres -> outer edges; row flip: south-up -> north-up.
    west_edge = raster.easting[0] - d_east / 2
    north_edge = raster.northing[-1] + d_north / 2
    transform = rasterio.Affine(d_east, 0.0, west_edge, 0.0, -d_north, north_edge)
    band = np.flipud(np.where(finite, values, nodata)).astype("float32")

    all_tags = {str(k): _tag_text(v) for k, v in dict(raster.tags).items()}
    all_tags.update({str(k): _tag_text(v) for k, v in dict(tags or {}).items()})
    all_tags.setdefault("units", raster.units)

    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}-", suffix=".tif", dir=path.parent)
    os.close(fd)
    try:
        with rasterio.open(
            tmp, "w", driver="COG", height=band.shape[0], width=band.shape[1], count=1,
            dtype="float32", crs=raster.crs, transform=transform, nodata=nodata,
            compress="DEFLATE", predictor=3, blocksize=256, overview_resampling="average",
            BIGTIFF="IF_SAFER",
        ) as dst:
            dst.write(band, 1)
            dst.update_tags(**all_tags)
            dst.units = (raster.units,)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes the file private; use the usual mode
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise
    logger.debug("wrote %s (%d x %d)", path, band.shape[1], band.shape[0])
    return path


def _tag_text(value):
    """Tag value as text: floats with full precision, sequences joined by commas."""
    if isinstance(value, (list, tuple)):
        return ",".join(_tag_text(v) for v in value)
    if isinstance(value, (float, np.floating)):
        return repr(float(value))
    return str(value)
