"""Tests for geosp.grid: spline kernels, spacings, gridding accuracy, CV, mask, sampling."""

import math

import numpy as np
import numpy.testing as npt
import pytest
from scipy import special
from scipy.interpolate import RegularGridInterpolator, griddata

from geosp import grid as grid_module
from geosp.errors import InputError, OptionError
from geosp.grid import grid_like, grid_stations, line_spacing, sample_grid, station_spacing
from geosp.models import Raster, Stations

LINE_SPACING = 100.0
STATION_SPACING = 10.0


def smooth_field(x, y):
    """Invented smooth SP field (mV): two Gaussians wider than the line spacing plus a gradient."""
    return (50 * np.exp(-((x - 500) ** 2 + (y - 450) ** 2) / (2 * 250.0**2))
            - 30 * np.exp(-((x - 1050) ** 2 + (y - 600) ** 2) / (2 * 200.0**2)) + 0.01 * x)


def narrow_field(x, y):
    """Invented field with anomalies narrower than the line spacing across lines (aliased between lines)."""
    return (40 * np.exp(-((x - 600) ** 2 + (y - 430) ** 2) / (2 * 90.0**2))
            - 30 * np.exp(-((x - 1000) ** 2 + (y - 640) ** 2) / (2 * 70.0**2)))


def line_survey(field=smooth_field, *, n_lines=11, angle_deg=0.0, noise=0.0, line_ids=True, seed=1):
    """East-west lines 100 m apart, stations every 10 m over 1.5 km, optionally rotated."""
    rng = np.random.default_rng(seed)
    along = np.arange(0, 1501, STATION_SPACING)
    u = np.concatenate([along] * n_lines)
    w = np.repeat(np.arange(n_lines) * LINE_SPACING, along.size)
    a = math.radians(angle_deg)
    x, y = u * math.cos(a) - w * math.sin(a), u * math.sin(a) + w * math.cos(a)
    line = np.repeat([f"L{i:02d}" for i in range(n_lines)], along.size) if line_ids else None
    values = field(x, y) + (rng.normal(0, noise, x.size) if noise else 0.0)
    return Stations(np.arange(x.size).astype(str), x, y, np.zeros(x.size), values, "EPSG:32611",
                    line_id=line)


def node_coordinates(raster):
    return np.meshgrid(raster.easting, raster.northing)


def distance_to_line(northing):
    """Distance (m) from a node to the nearest east-west survey line."""
    return np.abs((northing + LINE_SPACING / 2) % LINE_SPACING - LINE_SPACING / 2)


# --- Green's function and kernels -------------------------------------------------


def test_tension_green_function_finite_at_zero():
    # Reference: physics.md §9 row 16 (after [WesselBercovici1998]): g(0+) = ln 2 − γ
    # = 0.1159315 (value given to 7 digits, hence atol 1e-7; the series error at
    # p r = 1e-8 is ~1e-15).
    for p in (0.1, 1.0, 7.0):
        g = grid_module._green_tension(np.array([0.0, 1e-8 / p]), p)
        npt.assert_allclose(g, 0.1159315, atol=1e-7)
    npt.assert_allclose(grid_module._green_tension(np.array([0.0]), 1.0), math.log(2) - np.euler_gamma,
                        rtol=1e-15)


def test_tension_green_function_satisfies_its_pde():
    # Reference: for r > 0, ∇²g = p² K0(p r) (physics.md §5 [V]; [WesselBercovici1998]).
    # Independent check by the radial Laplacian g'' + g'/r with central finite
    # differences: step 1e-3 balances truncation (about h^2/12 times the 4th
    # derivative, ~1e-7) against round-off (~1e-16 |g| / h^2, ~1e-10), hence
    # rtol 1e-5 plus atol 1e-8.
    p, h = 1.7, 1e-3
    r = np.array([0.3, 1.0, 2.5, 4.0])

    def g(x):
        return grid_module._green_tension(x, p)

    laplacian = (g(r + h) - 2 * g(r) + g(r - h)) / h**2 + (g(r + h) - g(r - h)) / (2 * h) / r
    npt.assert_allclose(laplacian, p**2 * special.k0(p * r), rtol=1e-5, atol=1e-8)


def test_tension_kernel_tends_to_biharmonic():
    # Reference: as p -> 0 the tension kernel tends to r²(ln r − 1) [Sandwell1987] plus
    # c·r² (absorbed by the linear trend), so φ_t − r²(ln r − 1) must be ∝ r² with
    # error O(p²) (t = 1e-6 gives p² = 1e-6; tolerance 1e-4 relative).
    r = np.array([0.5, 1.0, 2.0, 3.0])
    diff = grid_module._kernel_exact(r, 1e-6) - grid_module._kernel_exact(r, 0.0)
    ratio = diff / r**2
    npt.assert_allclose(ratio, ratio[0], rtol=1e-4)


def test_kernel_table_matches_exact_kernel():
    # Reference: the exact kernel with scipy.special.k0; the table is linear
    # interpolation with step 2.5e-4, error <= h²/8 |φ''| ~ 1e-7.
    rng = np.random.default_rng(0)
    r = rng.uniform(0, 20, 5000)
    for t in (0.0, 0.3, 0.9):
        table = grid_module._KernelTable(t, 25.0)
        npt.assert_allclose(table(r.copy()), grid_module._kernel_exact(r, t), atol=1e-6)


def test_reduced_solve_matches_dense_bordered_system():
    # Reference: numpy.linalg.solve of the full bordered system
    # [[Φ + λW⁻¹, P], [Pᵀ, 0]] [c; a] = [v; 0] (an independent dense solve);
    # agreement limited by conditioning (~1e-9 relative).
    rng = np.random.default_rng(3)
    xy = rng.uniform(-4, 4, (150, 2))
    v = rng.normal(size=150)
    w = rng.uniform(0.3, 1.0, 150)
    phi = grid_module._kernel_exact(np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1)), 0.6)
    n = len(v)
    poly = np.column_stack([np.ones(n), xy])
    lhs = np.zeros((n + 3, n + 3))
    lhs[:n, :n] = phi + np.diag(1e-3 / w)
    lhs[:n, n:] = poly
    lhs[n:, :n] = poly.T
    dense = np.linalg.solve(lhs, np.concatenate([v, np.zeros(3)]))
    c, a = grid_module._LocalSpline.solve(phi, xy, v, w, 1e-3)
    npt.assert_allclose(c, dense[:n], atol=1e-9 * np.abs(dense).max())
    npt.assert_allclose(a, dense[n:], atol=1e-9 * np.abs(dense).max())


# --- Spacings ---------------------------------------------------------------------


@pytest.mark.parametrize("angle_deg", [0.0, 33.0])
@pytest.mark.parametrize("line_ids", [True, False])
def test_spacings_recovered_from_survey_pattern(angle_deg, line_ids):
    # Reference: the layout itself (10 m stations on lines 100 m apart). The
    # estimators are medians of nearest-neighbour distances, exact for a
    # regular layout up to round-off, so 1 %.
    stations = line_survey(angle_deg=angle_deg, line_ids=line_ids)
    assert station_spacing(stations) == pytest.approx(STATION_SPACING, rel=0.01)
    assert line_spacing(stations) == pytest.approx(LINE_SPACING, rel=0.01)


def test_line_spacing_is_not_shortened_by_tie_lines():
    # Reference: the layout. 11 east-west lines 290 m apart (stations every 25 m over 2 km) and
    # 4 north-south tie lines crossing them (stations every 25 m): a station near a crossing
    # has a tie-line station a few metres away, which is no measure of the line spacing.
    along = np.arange(0.0, 2001.0, 25.0)
    xs, ys, ids = [], [], []
    for i in range(11):
        xs.append(along)
        ys.append(np.full(along.size, 290.0 * i))
        ids += [f"L{i:02d}"] * along.size
    tie = np.arange(0.0, 2901.0, 25.0)
    for j, x0 in enumerate((110.0, 610.0, 1310.0, 1890.0)):
        xs.append(np.full(tie.size, x0))
        ys.append(tie)
        ids += [f"T{j}"] * tie.size
    x, y = np.concatenate(xs), np.concatenate(ys)
    stations = Stations(np.arange(x.size).astype(str), x, y, np.zeros(x.size), np.zeros(x.size),
                        "EPSG:32611", line_id=np.array(ids))
    assert line_spacing(stations) == pytest.approx(290.0, rel=0.03)


def test_scattered_stations_use_mean_spacing_and_grid_a_smooth_field():
    # Reference: for 400 uniformly scattered stations the mean spacing is
    # sqrt(area / n) by definition (area of their convex hull, from shapely as an
    # independent computation); the gridded field is compared with the analytic
    # one at masked nodes (smooth on the 60 m spacing: within 2 % of the range).
    from shapely.geometry import MultiPoint

    rng = np.random.default_rng(11)
    x, y = rng.uniform(0, 1500, 400), rng.uniform(0, 1000, 400)
    stations = Stations(np.arange(400).astype(str), x, y, np.zeros(400), smooth_field(x, y), "EPSG:32611")
    area = MultiPoint(np.column_stack([x, y])).convex_hull.area
    assert line_spacing(stations) == pytest.approx(math.sqrt(area / 400), rel=1e-9)
    result = grid_stations(stations)
    assert result.params["cv"] == "blocks"
    ge, gn = node_coordinates(result.grid)
    ok = np.isfinite(result.grid.values)
    assert ok.mean() > 0.5
    assert np.abs(result.grid.values[ok] - smooth_field(ge[ok], gn[ok])).max() < 1.6


# --- Gridding accuracy ----------------------------------------------------------------


@pytest.fixture(scope="module")
def smooth_result():
    stations = line_survey()
    return stations, grid_stations(stations)


def test_grid_reproduces_smooth_field_near_lines(smooth_result):
    # Reference: the analytic field sampled at the nodes. Noise-free data and a
    # field smooth on the line spacing, so a spline should reproduce it closely:
    # within 0.5 % of the 80 mV range (0.4 mV) at nodes within 10 m of a line,
    # and within 1 % (0.8 mV) everywhere in the mask.
    stations, result = smooth_result
    g = result.grid
    ge, gn = node_coordinates(g)
    ok = np.isfinite(g.values)
    err = g.values - smooth_field(ge, gn)
    near = ok & (distance_to_line(gn) <= 10)
    assert near.sum() > 500
    assert np.abs(err[near]).max() < 0.4
    assert np.abs(err[ok]).max() < 0.8


def test_grid_beats_linear_griddata_between_lines(smooth_result):
    # Reference: scipy.interpolate.griddata (linear Delaunay interpolation) on
    # the same stations, scored against the analytic field at nodes 40-50 m from
    # the nearest line. A spline should do much better than linear
    # interpolation for a smooth field; require at most half its RMSE.
    stations, result = smooth_result
    g = result.grid
    ge, gn = node_coordinates(g)
    mid = np.isfinite(g.values) & (distance_to_line(gn) >= 40)
    truth = smooth_field(ge[mid], gn[mid])
    # A 1 mm jitter spares scipy's point location the exactly regular layout,
    # where it falls back to a slow search; it moves values by < 1e-3 mV.
    jitter = np.random.default_rng(2).normal(0, 1e-3, (2, len(stations)))
    linear = griddata((stations.easting + jitter[0], stations.northing + jitter[1]), stations.sp_mv,
                      (ge[mid], gn[mid]))
    ok = np.isfinite(linear)
    rms_spline = np.sqrt(np.mean((g.values[mid][ok] - truth[ok]) ** 2))
    rms_linear = np.sqrt(np.mean((linear[ok] - truth[ok]) ** 2))
    assert rms_spline < 0.5 * rms_linear


def test_local_windows_agree_with_one_global_spline():
    # Reference: the same damped spline solved as one dense system over all
    # reduced points (max_points above their number). Blending local windows
    # with a two-line-spacing data margin should change interior nodes (150 m
    # from the edges) by under 0.2 % of the 80 mV range (0.15 mV) and keep their
    # RMS error against the analytic field within 1.5x of the global solve's;
    # the extrapolated corners differ most (about 0.5 mV, bounded at 1 mV).
    stations = line_survey()
    options = dict(tension=0.5, damping=1e-3, cv="none")
    global_ = grid_stations(stations, max_points=5000, **options)
    local = grid_stations(stations, max_points=150, **options)
    assert global_.params["windows"] == [1, 1]
    assert local.params["windows"][0] * local.params["windows"][1] >= 12
    ge, gn = node_coordinates(local.grid)
    interior = (ge > 150) & (ge < 1350) & (gn > 150) & (gn < 850)
    diff = np.abs(local.grid.values - global_.grid.values)
    assert np.nanmax(diff[interior]) < 0.15
    assert np.nanmax(diff) < 1.0
    truth = smooth_field(ge, gn)[interior]
    rms_local = np.sqrt(np.nanmean((local.grid.values[interior] - truth) ** 2))
    rms_global = np.sqrt(np.nanmean((global_.grid.values[interior] - truth) ** 2))
    assert rms_local < 1.5 * rms_global


def test_line_cv_is_honest_where_random_cv_is_not():
    # Reference: the true error between lines, from the analytic field (nodes at
    # least 25 m from a line). For anomalies narrower than the line spacing,
    # random K-fold keeps along-line neighbours in training and reports less
    # than the true between-line error; leaving lines out opens a two-line gap,
    # so it must report at least the true error (conservative). Same tension
    # and damping for both, so only the folds differ.
    stations = line_survey(narrow_field)
    options = dict(tension=0.5, damping=1e-3)
    by_lines = grid_stations(stations, cv="lines", **options)
    by_random = grid_stations(stations, cv="random", **options)
    g = by_lines.grid
    ge, gn = node_coordinates(g)
    mid = np.isfinite(g.values) & (distance_to_line(gn) >= 25)
    true_rmse = np.sqrt(np.mean((g.values[mid] - narrow_field(ge[mid], gn[mid])) ** 2))
    assert by_random.cv_rmse_mv < 0.7 * true_rmse
    assert by_lines.cv_rmse_mv > true_rmse
    assert by_lines.cv_rmse_mv > 3 * by_random.cv_rmse_mv
    npt.assert_array_equal(by_lines.grid.values, by_random.grid.values)  # same parameters, same grid
    assert by_lines.params["cv"] == "lines" and by_random.params["cv"] == "random"


def test_cv_chooses_among_candidates_and_records_table(smooth_result):
    _, result = smooth_result
    table = result.cv_table
    assert {"tension", "damping", "cv_rmse_mv", "n_test"} <= set(table.columns)
    best = table.loc[table["cv_rmse_mv"].idxmin()]
    assert result.params["tension"] == best["tension"]
    assert result.params["damping"] == best["damping"]
    assert result.cv_rmse_mv == pytest.approx(best["cv_rmse_mv"])
    assert (table["n_test"] > 100).all()


def test_grid_without_line_ids_uses_blocks_and_still_fits(smooth_result):
    # Reference: analytic field as above; block CV is used without line ids.
    stations = line_survey(line_ids=False, angle_deg=20.0)
    result = grid_stations(stations, tension=0.3, damping=1e-3)
    assert result.params["cv"] == "blocks"
    ge, gn = node_coordinates(result.grid)
    ok = np.isfinite(result.grid.values)
    assert np.abs(result.grid.values[ok] - smooth_field(ge[ok], gn[ok])).max() < 1.0


def test_weights_nan_and_zero_weight_stations_are_ignored():
    # Corrupt some stations with absurd values but zero weight or NaN: the grid
    # must equal the grid without them (same parameters, no CV).
    stations = line_survey()
    clean = grid_stations(stations, tension=0.5, damping=1e-3, cv="none")
    sp = stations.sp_mv.copy()
    weight = np.ones(len(stations))
    extra = Stations(["x1", "x2"], [700.0, 705.0], [300.0, 300.0], [0.0, 0.0], [1e4, np.nan],
                     "EPSG:32611", line_id=["L03", "L03"], weight=[0.0, 1.0])
    merged = Stations(
        np.concatenate([stations.station_id, extra.station_id]),
        np.concatenate([stations.easting, extra.easting]),
        np.concatenate([stations.northing, extra.northing]),
        np.zeros(len(sp) + 2), np.concatenate([sp, extra.sp_mv]), "EPSG:32611",
        line_id=np.concatenate([stations.line_id, extra.line_id]),
        weight=np.concatenate([weight, extra.weight]))
    dirty = grid_stations(merged, tension=0.5, damping=1e-3, cv="none")
    npt.assert_allclose(dirty.grid.values, clean.grid.values, equal_nan=True)
    assert math.isnan(dirty.cv_rmse_mv)


# --- Mask and distance --------------------------------------------------------------------


def test_mask_blanks_gaps_and_outside_hull_and_distance_is_exact():
    # Reference: brute-force distances from every node to every station.
    stations = line_survey()
    keep = ~np.isin(stations.line_id, ["L04", "L05", "L06"])  # a 400 m gap between lines
    stations = stations.subset(keep)
    result = grid_stations(stations, tension=0.5, damping=1e-3)
    g, dist = result.grid, result.distance
    ge, gn = node_coordinates(g)
    brute = np.sqrt((ge.ravel()[:, None] - stations.easting[None, :]) ** 2
                    + (gn.ravel()[:, None] - stations.northing[None, :]) ** 2).min(axis=1)
    npt.assert_allclose(dist.values.ravel(), brute, rtol=1e-12, atol=1e-9)
    assert result.mask_distance_m == pytest.approx(0.6 * LINE_SPACING, rel=0.01)
    far = dist.values > result.mask_distance_m
    assert far.any() and np.isnan(g.values[far]).all()
    gap = (gn > 360) & (gn < 640)
    assert np.isnan(g.values[gap]).all()
    outside = (ge < stations.easting.min()) | (ge > stations.easting.max())
    assert np.isnan(g.values[outside]).all()
    assert np.isfinite(g.values[~far & (ge > 0) & (ge < 1500)]).all()


# --- grid_like, tags, sampling, errors --------------------------------------------------


def test_grid_like_matches_grid_and_is_linear(smooth_result):
    # The spline is linear in the data: gridding the same values gives the same
    # grid, and 2v - 3 gives 2·grid - 3 (the trend absorbs constants), to round-off.
    stations, result = smooth_result
    same = grid_like(result, stations, stations.sp_mv)
    npt.assert_allclose(same.values, result.grid.values, rtol=1e-9, atol=1e-9, equal_nan=True)
    scaled = grid_like(result, stations, 2 * stations.sp_mv - 3)
    npt.assert_allclose(scaled.values, 2 * result.grid.values - 3, atol=1e-7, equal_nan=True)


def test_result_records_parameters_and_tags(smooth_result):
    _, result = smooth_result
    tags = result.grid.tags
    assert tags["units"] == "mV" and result.grid.units == "mV"
    assert tags["method"] == "tension_spline" == result.method
    assert tags["cv_rmse_mv"] == result.cv_rmse_mv
    assert tags["mask_distance_m"] == result.mask_distance_m
    assert "tension=" in tags["parameters"] and "damping=" in tags["parameters"]
    for key in ("cell_size_m", "block_size_m", "tension", "damping", "line_spacing_m"):
        assert key in result.params
    # Auto cell size: a quarter of the line spacing, rounded down to 1/2/2.5/5 × 10^k.
    assert result.params["cell_size_m"] == 25.0
    assert result.grid.spacing == (25.0, 25.0)
    assert result.distance.units == "m"


def test_sample_grid_matches_regular_grid_interpolator():
    # Reference: scipy.interpolate.RegularGridInterpolator (method "linear"),
    # an independent bilinear implementation; round-off agreement.
    rng = np.random.default_rng(5)
    easting = 500_000 + 30.0 * np.arange(40)
    northing = 4_100_000 + 20.0 * np.arange(25)
    values = rng.normal(size=(25, 40))
    raster = Raster(easting, northing, values, "EPSG:32611", units="m")
    e = rng.uniform(easting[0], easting[-1], 500)
    n = rng.uniform(northing[0], northing[-1], 500)
    e[:3], n[:3] = easting[[0, -1, 7]], northing[[0, -1, 3]]  # exactly on nodes and edges
    reference = RegularGridInterpolator((northing, easting), values, method="linear")(np.column_stack([n, e]))
    npt.assert_allclose(sample_grid(raster, e, n), reference, rtol=1e-12, atol=1e-12)
    outside = sample_grid(raster, [easting[0] - 1, easting[5]], [northing[3], northing[-1] + 1])
    assert np.isnan(outside).all()
    # Shape follows the input.
    assert sample_grid(raster, e.reshape(20, 25), n.reshape(20, 25)).shape == (20, 25)


def test_too_few_or_collinear_stations_raise_input_error():
    one_line = line_survey(n_lines=1)
    with pytest.raises(InputError, match="one straight line"):
        grid_stations(one_line)
    few = line_survey().subset(np.arange(2))
    with pytest.raises(InputError, match="at least 3"):
        grid_stations(few)


@pytest.mark.parametrize("options, fragment", [
    (dict(method="kriging"), "method"),
    (dict(cv="leave_one_out"), "cv"),
    (dict(tension=1.2), "tension"),
    (dict(damping=-1.0), "damping"),
    (dict(cell_size_m="fine"), "cell_size_m"),
    (dict(cell_size_m=0.1), "max_nodes"),
    (dict(cv="none"), "single tension"),
])
def test_bad_options_raise_option_error(options, fragment):
    with pytest.raises(OptionError, match=fragment):
        grid_stations(line_survey(n_lines=3), **options)


# --- Figure ---------------------------------------------------------------------------------


def test_grid_figure_centred_colour_map_with_stations_and_faults(smooth_result):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from geosp.figures.grid import grid_figure
    from geosp.models import Fault

    stations, result = smooth_result
    faults = [np.array([[200.0, 0.0], [400.0, 1000.0]]), Fault("F1", np.array([[900.0, 0.0], [1200.0, 900.0]]))]
    fig = grid_figure(result, stations, faults, title="Test map")
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    image = ax.images[0]
    norm = image.norm
    assert norm.vcenter == 0.0 and norm.vmin == -norm.vmax
    assert image.get_cmap().name == "RdBu_r"
    assert fig.axes[1].get_ylabel() == "SP (mV)"
    assert ax.get_aspect() == 1.0
    assert len(ax.lines) >= 4  # stations, two faults, scale bar
    assert ax.get_title() == "Test map"
    assert not ax.xaxis.get_major_formatter().get_useOffset()
    FigureCanvasAgg(fig).draw()  # renders without a display


def test_a_lone_blank_node_among_kept_nodes_is_kept():
    # Stations every 10 m on a 200 m square, without the 3 x 3 stations around (100, 100): with a
    # mask distance of 18 m only the node at the centre of the gap is farther than that from
    # every station (20 m). It is a pinhole among kept nodes, so it is kept; its distance stays
    # the true 20 m.
    from scipy.spatial import ConvexHull

    g = np.arange(0.0, 201.0, 10.0)
    x, y = (a.ravel() for a in np.meshgrid(g, g))
    keep = ~((np.abs(x - 100.0) < 15.0) & (np.abs(y - 100.0) < 15.0))
    x, y = x[keep], y[keep]
    hull = ConvexHull(np.column_stack([x - x.mean(), y - y.mean()]))
    nodes = np.arange(0.0, 201.0, 5.0)
    distance, inside = grid_module._distance_and_mask(nodes, nodes, x, y, hull, 18.0)
    centre = (nodes == 100.0)
    assert distance[centre, centre][0] == pytest.approx(20.0)
    assert (distance[1:-1, 1:-1] > 18.0).sum() == 1  # the only node beyond the mask distance
    assert inside[centre, centre][0]
    assert inside[1:-1, 1:-1].all()


@pytest.mark.parametrize("angle_deg", [0.0, 33.0])
def test_grid_covers_every_station(angle_deg):
    # Every station lies inside the grid's extent, and the node nearest to it holds a value:
    # a grid that lost its last row or column, or masked a station's own node, fails here.
    stations = line_survey(angle_deg=angle_deg, n_lines=5)
    raster = grid_stations(stations, cv="none", tension=0.3, damping=1e-3).grid
    e, n = np.asarray(raster.easting), np.asarray(raster.northing)
    half = 0.5 * abs(e[1] - e[0])
    assert e.min() - half <= stations.easting.min() and stations.easting.max() <= e.max() + half
    assert n.min() - half <= stations.northing.min() and stations.northing.max() <= n.max() + half
    col = np.abs(e[None, :] - stations.easting[:, None]).argmin(axis=1)
    row = np.abs(n[None, :] - stations.northing[:, None]).argmin(axis=1)
    values = np.asarray(raster.values)[row, col]
    assert np.isfinite(values).all(), int((~np.isfinite(values)).sum())
