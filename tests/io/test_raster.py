"""Tests for geosp.io.raster: Cloud-Optimized GeoTIFF writing and raster reading."""

import os

import numpy as np
import numpy.testing as npt
import pyproj
import pytest
import rasterio

from geosp.errors import InputError
from geosp.io.raster import read_raster, write_geotiff
from geosp.models import Raster


def from_origin(west, north, d_east, d_north):
    """North-up transform from the outer north-west corner and the cell size."""
    return rasterio.Affine(d_east, 0.0, west, 0.0, -d_north, north)


def make_raster(n_north=300, n_east=420, *, spacing=(20.0, 25.0), crs="EPSG:32611"):
    """A grid whose value encodes position, so flips and shifts show up."""
    d_north, d_east = spacing
    easting = 512_000 + d_east * np.arange(n_east)
    northing = 4_180_000 + d_north * np.arange(n_north)
    ee, nn = np.meshgrid(easting, northing)
    values = 0.01 * (ee - 512_000) - 0.02 * (nn - 4_180_000) + 5 * np.sin(ee / 700.0)
    values[:7, :9] = np.nan  # south-west corner blank
    return Raster(easting, northing, values, crs, units="mV", tags={"method": "test", "cv_rmse_mv": 1.25})


def test_geotiff_sampled_at_node_centres_matches_grid(tmp_path):
    # Reference: rasterio's own point sampling (dataset.sample at world
    # coordinates), independent of read_raster. One check catches both the row
    # flip and the half-cell shift (common practice). Values are float32 on
    # disk, so rtol is float32 round-off.
    raster = make_raster()
    path = write_geotiff(raster, tmp_path / "sp_grid.tif")
    ee, nn = np.meshgrid(raster.easting, raster.northing)
    rng = np.random.default_rng(0)
    pick = rng.choice(ee.size, 3000, replace=False)
    pick = np.concatenate([pick, [0, ee.size - 1, raster.values.shape[1] - 1]])  # corners
    points = list(zip(ee.ravel()[pick], nn.ravel()[pick]))
    with rasterio.open(path) as src:
        sampled = np.array([v[0] for v in src.sample(points)], dtype=float)
        nodata = src.nodata
    expected = raster.values.ravel()[pick]
    blank = np.isnan(expected)
    assert blank.any()
    npt.assert_array_equal(sampled[blank], nodata)
    npt.assert_allclose(sampled[~blank], expected[~blank], rtol=1e-6, atol=1e-4)
    # index -> xy of the dataset transform gives the node coordinates back.
    with rasterio.open(path) as src:
        x, y = src.xy(0, 0)  # top-left pixel centre = northernmost row, westernmost column
    assert (x, y) == (raster.easting[0], raster.northing[-1])


def test_geotiff_is_a_cloud_optimized_float32_file_with_tags(tmp_path):
    # Reference: the GeoTIFF/COG layout as GDAL writes it: a "ghost" header with
    # LAYOUT=IFDS_BEFORE_DATA right after the TIFF signature (GDAL COG driver
    # documentation), tiling, internal overviews, deflate.
    raster = make_raster()
    path = write_geotiff(raster, tmp_path / "sp_grid.tif", tags={"reference_station": "A01"})
    head = path.read_bytes()[:1024]
    assert head[:4] in (b"II*\x00", b"MM\x00*")
    assert b"LAYOUT=IFDS_BEFORE_DATA" in head and b"BLOCK_ORDER=ROW_MAJOR" in head
    with rasterio.open(path) as src:
        assert src.driver == "GTiff"
        assert src.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG"
        assert src.dtypes == ("float32",)
        assert src.nodata == -9999.0
        assert src.profile["tiled"] and src.block_shapes[0] == (256, 256)
        assert src.compression.name.lower() == "deflate"
        assert src.overviews(1) == [2]
        assert src.crs == rasterio.crs.CRS.from_epsg(32611)
        assert src.transform.e < 0 and src.transform.b == 0 and src.transform.d == 0  # north-up
        assert src.res == (25.0, 20.0)
        tags = src.tags()
        assert tags["units"] == "mV" and src.units == ("mV",)
        assert tags["method"] == "test"
        assert float(tags["cv_rmse_mv"]) == 1.25
        assert tags["reference_station"] == "A01"
        overview = src.read(1, out_shape=(150, 210))
    assert np.isfinite(overview).all()


def test_write_is_atomic_and_replaces_existing_file(tmp_path):
    path = tmp_path / "sp_grid.tif"
    path.write_bytes(b"old")
    write_geotiff(make_raster(40, 50), path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["sp_grid.tif"]  # no temporary left
    with rasterio.open(path) as src:
        assert src.shape == (40, 50)
    umask = os.umask(0)
    os.umask(umask)
    assert path.stat().st_mode & 0o777 == 0o666 & ~umask


def test_failed_write_leaves_no_temporary_file(tmp_path):
    raster = make_raster(20, 20)
    bad = Raster(raster.easting, raster.northing, raster.values, "not a crs")
    with pytest.raises(Exception):
        write_geotiff(bad, tmp_path / "x.tif")
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(InputError, match="folder does not exist"):
        write_geotiff(raster, tmp_path / "missing" / "x.tif")


def test_read_raster_round_trip_keeps_orientation_and_centres(tmp_path):
    # Reference: the Raster written (write/read are inverses up to float32).
    raster = make_raster()
    path = write_geotiff(raster, tmp_path / "g.tif")
    back = read_raster(path)
    npt.assert_array_equal(back.easting, raster.easting)
    npt.assert_array_equal(back.northing, raster.northing)
    assert back.northing[0] < back.northing[-1]  # row 0 is the southernmost
    npt.assert_array_equal(np.isnan(back.values), np.isnan(raster.values))
    npt.assert_allclose(back.values, raster.values, rtol=1e-6, atol=1e-4, equal_nan=True)
    assert back.crs == "EPSG:32611" and back.units == "mV" and back.tags["method"] == "test"


def test_read_raster_of_south_up_file(tmp_path):
    # A file stored south-up (positive y pixel size) reads the same as north-up.
    values = np.arange(12.0).reshape(3, 4)  # rows as stored: first row southernmost
    path = tmp_path / "south_up.tif"
    transform = rasterio.Affine(10, 0, 1000, 0, 10, 5000)
    with rasterio.open(path, "w", driver="GTiff", height=3, width=4, count=1, dtype="float64",
                       crs="EPSG:32611", transform=transform) as dst:
        dst.write(values, 1)
    back = read_raster(path)
    npt.assert_allclose(back.northing, [5005, 5015, 5025])
    npt.assert_allclose(back.easting, [1005, 1015, 1025, 1035])
    npt.assert_allclose(back.values, values)


def test_read_raster_reprojects_to_another_utm_zone(tmp_path):
    # Reference: pyproj (always_xy) maps each node of the zone-12 grid back to
    # zone 11, where the DEM is a plane, z = 1200 + 0.02 e' + 0.03 n'. Bilinear
    # resampling reproduces a plane exactly, so what remains is float32 storage
    # (~1e-4 m) and GDAL's approximate warp transformer (bounded by 0.125 pixel,
    # i.e. 0.14 m here, but far smaller over 4 km where the zone-to-zone map is
    # nearly affine; about 1e-3 m was seen); tolerance 0.01 m.
    west, north, cell = 740_000.0, 4_440_000.0, 30.0
    n_rows, n_cols = 120, 140
    ee = west + cell * (np.arange(n_cols) + 0.5)
    nn = north - cell * (np.arange(n_rows) + 0.5)
    e2, n2 = np.meshgrid(ee, nn)
    dem = 1200 + 0.02 * (e2 - west) + 0.03 * (n2 - north)
    path = tmp_path / "dem.tif"
    with rasterio.open(path, "w", driver="GTiff", height=n_rows, width=n_cols, count=1, dtype="float32",
                       crs="EPSG:32611", transform=from_origin(west, north, cell, cell), nodata=-32768) as dst:
        dst.write(dem.astype("float32"), 1)
    back = read_raster(path, crs="EPSG:32612")
    assert back.crs == "EPSG:32612"
    to_11 = pyproj.Transformer.from_crs("EPSG:32612", "EPSG:32611", always_xy=True)
    ge, gn = np.meshgrid(back.easting, back.northing)
    e11, n11 = to_11.transform(ge, gn)
    expected = 1200 + 0.02 * (e11 - west) + 0.03 * (n11 - north)
    interior = ((e11 > west + 2 * cell) & (e11 < west + (n_cols - 2) * cell)
                & (n11 < north - 2 * cell) & (n11 > north - (n_rows - 2) * cell))
    assert interior.sum() > 0.5 * n_rows * n_cols
    finite = np.isfinite(back.values)
    assert finite[interior].all()
    npt.assert_allclose(back.values[interior], expected[interior], atol=0.01)
    outside = ~((e11 > west - cell) & (e11 < west + (n_cols + 1) * cell)
                & (n11 < north + cell) & (n11 > north - (n_rows + 1) * cell))
    assert np.isnan(back.values[outside]).all()  # the rotated footprint leaves NaN corners


def test_read_raster_same_crs_given_does_not_resample(tmp_path):
    raster = make_raster(30, 40)
    path = write_geotiff(raster, tmp_path / "g.tif")
    back = read_raster(path, crs="EPSG:32611")
    npt.assert_array_equal(back.easting, raster.easting)
    npt.assert_allclose(back.values, raster.values, rtol=1e-6, atol=1e-4, equal_nan=True)


def test_read_raster_errors_name_the_file(tmp_path):
    with pytest.raises(InputError, match="not found") as err:
        read_raster(tmp_path / "nope.tif")
    assert "nope.tif" in str(err.value)

    junk = tmp_path / "junk.tif"
    junk.write_text("this is not a raster")
    with pytest.raises(InputError, match="cannot be read as a raster"):
        read_raster(junk)

    no_crs = tmp_path / "no_crs.tif"
    with rasterio.open(no_crs, "w", driver="GTiff", height=4, width=4, count=1, dtype="float32",
                       transform=from_origin(0, 40, 10, 10)) as dst:
        dst.write(np.ones((4, 4), "float32"), 1)
    with pytest.raises(InputError, match="no coordinate reference system"):
        read_raster(no_crs)

    empty = tmp_path / "empty.tif"
    with rasterio.open(empty, "w", driver="GTiff", height=4, width=4, count=1, dtype="float32",
                       crs="EPSG:32611", transform=from_origin(0, 40, 10, 10), nodata=-9999) as dst:
        dst.write(np.full((4, 4), -9999, "float32"), 1)
    with pytest.raises(InputError, match="nodata only"):
        read_raster(empty)
    with pytest.raises(InputError, match="band 2"):
        read_raster(no_crs.with_name("empty.tif"), band=2)
