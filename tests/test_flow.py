"""
Primary-flow forward modelling (geosp.flow) against outside references.

References: the method of images for a line source under a surface held at
zero (Telford et al. 1990 for the point-source analogue; Kellogg 1929 for
potential theory), the double-layer integral of a vertical contact evaluated
by scipy quadrature [Kellogg1929], the closed-form 2-D and 3-D fault-patch
potentials of geosp.physics.forward (verified separately against
physics.md §9 rows 6, 7, 11, 12), the contrast factor 2σj/(σ1+σ2) (physics
§2.3) and the consequences in physics §1 items 1–3 and §9 rows 17–18.
"""

import numpy as np
import numpy.testing as npt
import pytest
from scipy import integrate

from geosp import flow
from geosp.errors import InputError
from geosp.models import FlowFixed, FlowModel, FlowRegion, FlowSource
from geosp.physics.forward import patch_sp_local, strip_2d_sp


def line_source_pressure(x, z, xs, zs, q=1.0, mobility=1.0):
    """Analytic pressure of a line source under a surface held at P = 0 (images)."""
    return q / (4 * np.pi * mobility) * np.log(((x - xs) ** 2 + (z + zs) ** 2)
                                               / ((x - xs) ** 2 + (z - zs) ** 2))


def contact_quadrature(x, xs, zs, jump_per_pa=1.0):
    """V(x) = (1/π)∫₀^∞ f(z)·x/(x²+z²)dz with f = jump_per_pa·P(0, z), by scipy quad."""
    def integrand(z):
        return jump_per_pa * line_source_pressure(0.0, z, xs, zs) * x / (x * x + z * z) / np.pi
    breaks = [0.0, zs, 10 * zs, np.inf]
    return sum(integrate.quad(integrand, a, b, limit=200, epsabs=1e-13)[0]
               for a, b in zip(breaks[:-1], breaks[1:]))


def test_mesh_has_uniform_core_and_growing_padding():
    # Geometry bookkeeping, checked against the definition of the mesh.
    mesh = flow.make_mesh([(-100.0, 100.0)], 50.0, 10.0, padding_factor=1.3, padding_m=2000.0)
    x, z = mesh.edges
    assert z[0] == 0.0
    core = (x >= -100) & (x <= 100)
    npt.assert_allclose(np.diff(x[core]), 10.0)
    pad = np.diff(x[x >= 100])
    npt.assert_allclose(pad[1:] / pad[:-1], 1.3)
    assert x[-1] - 100 >= 2000 and -100 - x[0] >= 2000 and z[-1] - 50 >= 2000
    npt.assert_allclose(mesh.volumes.sum(), (x[-1] - x[0]) * z[-1])


def test_pressure_line_source_matches_image_solution():
    # Reference: method of images, P = q/(4π k/η)·ln(r_img²/r²) [Kellogg1929]. The FV
    # source is spread over the four nearest cells, so compare beyond 3 cells from it;
    # the far boundary (P = 0 at 50 core widths) and O(h²) discretisation leave < 1 %
    # of the peak compared value there.
    mesh = flow.make_mesh([(-5.0, 5.0)], 5.0, 0.1, padding_m=250.0)
    source = FlowSource("q", "pressure", "point", np.array([0.3, 1.0]), 2.0)
    p = flow.solve_pressure(mesh, 4.0, source=flow._source_vector(mesh, [source]))
    x, z = mesh.grid()
    reference = line_source_pressure(x, z, 0.3, 1.0, q=2.0, mobility=4.0)
    compare = (np.hypot(x - 0.3, z - 1.0) > 0.3) & (np.abs(x) < 5) & (z < 5)
    error = np.abs(p - reference)[compare].max()
    assert error < 0.01 * np.abs(reference[compare]).max()


@pytest.mark.parametrize("form", ["source", "jump"])
def test_uniform_coupling_gives_no_surface_sp(form):
    # Reference: physics §1 item 1 / §9 row 17 — with uniform C_P and C_T the total
    # potential is harmonic with zero data, so Φ ≡ 0 and V = 0 on the surface for any
    # P, T and σ structure. Only round-off remains: 1e-10 of max|C·P|.
    mesh = flow.make_mesh([(-4.0, 4.0)], 4.0, 0.2)
    x, z = mesh.grid()
    sigma = np.where((x > 0) & (z < 2), 10.0, 1.0)  # a σ contrast does not matter
    sources = [FlowSource("q", "pressure", "point", np.array([0.5, 1.5]), 1.0)]
    p = flow.solve_pressure(mesh, np.where(x > 1, 5.0, 1.0),
                            source=flow._source_vector(mesh, sources))
    t = line_source_pressure(x, z, -1.0, 2.0)
    c_p, c_t = -3e-7, 2e-4
    _, surface = flow.solve_sp(mesh, sigma, c_p=c_p, pressure=p, c_t=c_t, temperature=t,
                               form=form)
    scale = max(np.abs(c_p * p).max(), np.abs(c_t * t).max())
    assert np.abs(surface).max() <= 1e-10 * scale


@pytest.mark.parametrize("form", ["source", "jump"])
def test_potential_invariant_to_constant_pressure(form):
    # Reference: physics §1 item 2 — P → P + const adds uniform jumps −[C]·const, which
    # only shift Φ by a constant on each side, and the matching C·const to V − Φ, so V is
    # unchanged. In the jump form the right-hand side and Φ change (Φ → Φ − C·const);
    # V must not. Tolerance: round-off relative to the shift, 1e-9 of |C·const|.
    mesh = flow.make_mesh([(-4.0, 4.0)], 4.0, 0.2)
    x, z = mesh.grid()
    c_p = np.where(x > 0.1, -2.0, 0.5) + np.where(z > 2.5, 1.0, 0.0)
    sigma = np.where(x > 0.1, 4.0, 1.0)
    p = line_source_pressure(x, z, -0.6, 1.2)
    shift = 7.0
    v0, s0 = flow.solve_sp(mesh, sigma, c_p=c_p, pressure=p, form=form)
    v1, s1 = flow.solve_sp(mesh, sigma, c_p=c_p, pressure=p + shift,
                           pressure_reference_pa=shift, form=form)
    assert np.abs(s0).max() > 0.01  # there is an anomaly to keep
    npt.assert_allclose(s1, s0, rtol=0, atol=1e-9 * shift * np.abs(c_p).max())
    npt.assert_allclose(v1, v0, rtol=0, atol=1e-9 * shift * np.abs(c_p).max())


def test_source_and_jump_forms_agree():
    # Independent check: the two discretisations are algebraically equal (physics §8),
    # so they agree to solver round-off.
    mesh = flow.make_mesh([(-3.0, 3.0)], 3.0, 0.15)
    x, z = mesh.grid()
    c_p = np.where(x + 0.5 * z > 0.4, -1.0, 0.3)
    sigma = np.where(z > 1.0, 0.2, 1.0)
    p = line_source_pressure(x, z, 0.2, 0.8)
    t = line_source_pressure(x, z, -0.7, 1.4)
    a = flow.solve_sp(mesh, sigma, c_p=c_p, pressure=p, c_t=0.4 * c_p, temperature=t,
                      form="source")
    b = flow.solve_sp(mesh, sigma, c_p=c_p, pressure=p, c_t=0.4 * c_p, temperature=t,
                      form="jump")
    npt.assert_allclose(b[1], a[1], rtol=0, atol=1e-11 * np.abs(a[1]).max())


@pytest.mark.parametrize("sigma_ratio", [1.0, 5.0])
def test_contact_with_line_source_matches_double_layer_quadrature(sigma_ratio):
    # Reference: a vertical C_P contact at x = 0 (C_P = 0 for x < 0, −1 for x > 0) in
    # the analytic line-source pressure carries the double layer f(z) = −[C_P]·P(0, z);
    # its surface potential is (1/π)∫ f x/(x²+z²) dz (scipy quad) [Kellogg1929], scaled
    # on side i by 2σj/(σ1+σ2) (physics §2.3). Tolerance: 5e-3 of the peak at h = 0.05
    # z_s, from 5 cells off the contact (the x·ln x behaviour at the contact makes the
    # first cells O(h)); 2.2e-3 is observed, and it falls with h (next test).
    mesh = flow.make_mesh([(-5.0, 5.0)], 5.0, 0.05)
    x, z = mesh.grid()
    sigma = np.where(x > 0, sigma_ratio, 1.0)
    p = line_source_pressure(x, z, -0.5, 1.0)
    _, surface = flow.solve_sp(mesh, sigma, c_p=np.where(x > 0, -1.0, 0.0), pressure=p)
    xc = mesh.centres[0]
    keep = (np.abs(xc) < 5) & (np.abs(xc) > 0.25)
    factor = np.where(xc[keep] > 0, 2 / (1 + sigma_ratio), 2 * sigma_ratio / (1 + sigma_ratio))
    reference = factor * np.array([contact_quadrature(v, -0.5, 1.0) for v in xc[keep]])
    error = np.abs(surface[keep] - reference).max()
    assert error < 5e-3 * np.abs(reference).max()


def _strip_error(h, *, dip_deg=90.0, top=1.0, bottom=3.0, padding_factor=1.3):
    """Max and RMS surface error of a prescribed-jump strip (f = 1) against strip_2d_sp."""
    mesh = flow.make_mesh([(-6.0, 6.0)], 5.0, h, padding_factor=padding_factor,
                          padding_m=1000.0)
    x, z = mesh.grid()
    # Hanging wall: x > z·cot(dip). C_P = −1 there and P = 1 between top and bottom give
    # f = −[C_P]·P = +1 on the dip-direction side.
    # The hanging wall reaches past the far boundaries, so the only C_P contact that
    # meets P ≠ 0 is the fault.
    foot = 6.0 / np.tan(np.radians(dip_deg))
    hanging = FlowRegion("hw", np.array([[0.0, 0.0], [1e5, 0.0], [1e5, 6.0], [foot, 6.0]]), 1.0)
    index = flow.assign_regions(mesh, [hanging])
    c_p = np.where(index == 1, -1.0, 0.0)
    p = ((z > top) & (z < bottom)).astype(float)
    _, surface = flow.solve_sp(mesh, 1.0, c_p=c_p, pressure=p)
    xc = mesh.centres[0]
    keep = np.abs(xc) < 6
    reference = strip_2d_sp(xc[keep], depth_top_m=top, depth_bottom_m=bottom, dip_deg=dip_deg,
                            jump_mv=1.0)
    error = surface[keep] - reference
    peak = np.abs(reference).max()
    return np.abs(error).max() / peak, np.sqrt(np.mean(error**2)) / peak


def test_vertical_strip_matches_closed_form_and_converges():
    # Reference: (f/π)·(arctan(z_b/t) − arctan(z_t/t)) via geosp.physics.forward.strip_2d_sp
    # [Kellogg1929]; physics §9 row 11 (peak f/6 at t = √3). With faces on the contact
    # and on the strip ends the error is a few 1e-3 of the peak at h = z_t/10 (observed
    # 2.8e-3 max). Padding cells growing by 1.3 leave an error floor near 1e-3 of the peak
    # (the 2-D tail decays only as 1/t), so convergence is shown with growth 1.1: halving
    # h must cut the error at least by the O(h) factor 2 (×0.6 allowed; physics §8 says
    # staircases converge at least as O(h); observed ×0.3).
    coarse, _ = _strip_error(0.1)
    assert coarse < 5e-3
    coarse, _ = _strip_error(0.1, padding_factor=1.1)
    fine, _ = _strip_error(0.05, padding_factor=1.1)
    assert fine < 0.6 * coarse


@pytest.mark.slow
def test_dipping_staircase_strip_converges():
    # Reference: strip_2d_sp for dip 60° [Kellogg1929]; physics §8 ladder item 6 gives an
    # RMS error of 2.4 / 1.2 / 0.37 % of the peak at h = 0.08 / 0.04 / 0.02 z_t for a
    # staircase 60° strip. Here the polygon region is rasterised on cell centres, so the
    # error depends on how the staircase falls on the grid and is not monotone step by
    # step (observed 1.5 / 0.10 / 0.22 % at h = 0.1 / 0.05 / 0.025 z_t). Require under
    # 3 % at h = 0.1 z_t and, over a factor 4 in h, at least the O(h) gain with margin
    # (error ratio below 0.5 rather than 0.25).
    _, rms_coarse = _strip_error(0.1, dip_deg=60.0, padding_factor=1.1)
    _, rms_fine = _strip_error(0.025, dip_deg=60.0, padding_factor=1.1)
    assert rms_coarse < 0.03
    assert rms_fine < 0.5 * rms_coarse


def test_anomaly_largest_with_source_at_contact():
    # Reference: physics §1 item 3 / §9 row 18 — peak-to-peak SP of a line source at
    # x_s/z_s = 0.25, 0.5, 1, 2, 4 from a vertical C contact is 0.82, 0.66, 0.45, 0.26,
    # 0.14 of its value at x_s = 0 (two-digit values: allow 0.015). Pressure from the FV
    # solver (point source split over the cells either side of the contact).
    mesh = flow.make_mesh([(-10.0, 10.0)], 10.0, 0.05)
    x, _ = mesh.grid()
    xc = mesh.centres[0]
    core = np.abs(xc) < 10
    c_p = np.where(x > 0, -1.0, 0.0)
    interior, boundary = flow._faces(mesh, 1.0)
    peak_to_peak = []
    for xs in (0.0, 0.25, 0.5, 1.0, 2.0, 4.0):
        source = FlowSource("q", "pressure", "point", np.array([-xs, 1.0]), 1.0)
        p = flow.solve_pressure(mesh, 1.0, source=flow._source_vector(mesh, [source]))
        _, surface = flow.solve_sp(mesh, 1.0, c_p=c_p, pressure=p)
        peak_to_peak.append(np.ptp(surface[core]))
    ratios = np.array(peak_to_peak[1:]) / peak_to_peak[0]
    npt.assert_allclose(ratios, [0.82, 0.66, 0.45, 0.26, 0.14], atol=0.015)
    assert np.all(np.diff(peak_to_peak) < 0)


def test_heat_conduction_matches_image_solution_and_advection_lifts_plume():
    # Reference: for conduction only, T obeys the same equation as P: images
    # [Kellogg1929], tolerance as for pressure. Advection with upward Darcy flow must move
    # heat up: the temperature above the source rises and below it falls (physical
    # property of upwind transport; no closed form used).
    mesh = flow.make_mesh([(-5.0, 5.0)], 5.0, 0.1, padding_m=250.0)
    x, z = mesh.grid()
    heat = flow._source_vector(mesh, [FlowSource("h", "heat", "point", np.array([0.0, 2.0]),
                                                 10.0)])
    t = flow.solve_heat(mesh, 2.5, source=heat)
    reference = line_source_pressure(x, z, 0.0, 2.0, q=10.0, mobility=2.5)
    compare = (np.hypot(x, z - 2.0) > 0.3) & (np.abs(x) < 5) & (z < 5)
    assert np.abs(t - reference)[compare].max() < 0.01 * np.abs(reference[compare]).max()
    # Advection direction: in a uniform Darcy flow along +x (Péclet number
    # ρc·q·L/λ ≈ 3.3 at L = 2 m) heat is swept downstream, so T two metres downstream of
    # the source is far above T two metres upstream, while conduction alone is nearly
    # symmetric (physical property of upwind transport; no closed form used).
    interior, boundary = flow._faces(mesh, 1.0)
    area = np.broadcast_to(flow._along(mesh.widths[1], 1, 2), mesh.shape)[:-1, :].reshape(-1)
    uniform = ([(interior[0][0], interior[0][1], 1e-6 * area),
                (interior[1][0], interior[1][1], np.zeros_like(interior[1][2]))],
               {side: (i, np.zeros_like(t_b)) for side, (i, t_b) in boundary.items()})
    t_flow = flow.solve_heat(mesh, 2.5, source=heat, darcy_flux=uniform)
    depth = np.argmin(np.abs(mesh.centres[1] - 2.0))
    up, down = (np.argmin(np.abs(mesh.centres[0] - v)) for v in (-2.0, 2.0))
    assert t_flow[down, depth] > 5 * t_flow[up, depth]
    assert abs(t[down, depth] / t[up, depth] - 1) < 0.1
    # Divergent flow: fluid injected below the heat source escapes through the surface.
    fluid = flow._source_vector(mesh, [FlowSource("q", "pressure", "point",
                                                  np.array([0.0, 3.0]), 1e-6)])
    p = flow.solve_pressure(mesh, 1e-9, source=fluid)
    flux = flow.compute_darcy_flux(mesh, 1e-9, p)
    # Global energy balance (first law): conduction plus advection out through the
    # boundaries equals the heat input plus the enthalpy ρc·T_in·Q of the injected fluid.
    # Round-off (the pressure solve is exact to it too).
    _, boundary = flow._faces(mesh, 2.5)
    _, flux_b = flux
    for t_in in (0.0, 40.0):
        t_adv = flow.solve_heat(mesh, 2.5, source=heat, darcy_flux=flux,
                                inflow_temperature_k=t_in)
        flat = t_adv.reshape(-1)
        out = sum((t_b * flat[i]).sum()
                  + (4.18e6 * np.maximum(flux_b[side][1], 0) * flat[i]).sum()
                  for side, (i, t_b) in boundary.items())
        expected = heat.sum() + 4.18e6 * t_in * fluid.sum()
        assert out == pytest.approx(expected, rel=1e-8)


def _model(**kwargs):
    background = FlowRegion("host", None, 0.01, c_p_v_pa=-1e-8, mobility_m2_pa_s=1e-9)
    fault = FlowRegion("fault zone", np.array([[0, 0], [100, 0], [300, 1000], [200, 1000]]),
                       0.05, c_p_v_pa=-4e-8, mobility_m2_pa_s=1e-8)
    defaults = dict(ndim=2, core_x_m=(-1000.0, 1000.0), depth_m=1000.0, cell_m=25.0,
                    background=background, regions=(fault,),
                    sources=(FlowSource("upflow", "pressure", "point",
                                        np.array([250.0, 800.0]), 1e-5),),
                    profile_spacing_m=50.0)
    defaults.update(kwargs)
    return FlowModel(**defaults)


def test_run_flow_model_predicts_stations_and_misfit():
    # Reference: the prediction at stations equals linear interpolation of the returned
    # profile where stations sit on profile points (same surface values), and stations
    # built as prediction + 3 mV give residual 3 mV, offset 3 mV and offset-free RMS 0.
    model = _model()
    first = flow.run_flow_model(model)
    sx = first.profile_x_m[::5]
    observed = first.profile_mv[::5] + 3.0
    result = flow.run_flow_model(model, stations=(sx, observed))
    npt.assert_allclose(result.predicted_mv, first.profile_mv[::5], atol=1e-9)
    npt.assert_allclose(result.residual_mv, 3.0, atol=1e-9)
    assert result.offset_mv == pytest.approx(3.0) and result.rms_offset_mv < 1e-9
    # Sign (physics §1): fluid flowing up from the source toward the surface with
    # C_P < 0 carries positive charge up, so the SP above the upflow is positive
    # relative to far away; with a fault-zone contrast the anomaly stays of tens of mV.
    assert result.profile_mv.max() > 0.0
    assert result.pressure_pa.max() > 0 and result.temperature_k is None


def test_advected_temperature_obeys_maximum_principle():
    # Reference: maximum principle for steady advection-diffusion without heat sources
    # (upwind FV keeps it discretely): T stays between the boundary value 0 and the
    # largest prescribed temperature (fixed region 150 K, entering fluid 120 K). Fluid
    # created at the local temperature instead would let T run away above both.
    hot = FlowFixed("hot", "heat", np.array([[150, 850], [250, 850], [250, 950], [150, 950]]),
                    150.0)
    inflow = FlowSource("upflow", "pressure", "point", np.array([250.0, 800.0]), 1e-4,
                        fluid_temperature_k=120.0)
    model = _model(sources=(inflow,), fixed=(hot,), heat_advection=True)
    result = flow.run_flow_model(model)
    conduction = flow.run_flow_model(_model(sources=(inflow,), fixed=(hot,)))
    assert result.temperature_k.min() >= -1e-9
    assert result.temperature_k.max() <= 150.0 + 1e-9
    # The rising hot fluid warms the shallow ground above it compared with conduction.
    column = np.argmin(np.abs(result.mesh.centres[0] - 0.0))
    shallow = np.argmin(np.abs(result.mesh.centres[1] - 100.0))
    assert result.temperature_k[column, shallow] > conduction.temperature_k[column, shallow]


def test_run_flow_model_fixed_temperature_and_errors():
    # Reference: cells of a fixed region keep their value exactly (Dirichlet elimination);
    # a source outside every cell centre is an input error naming it.
    hot = FlowFixed("hot", "heat", np.array([[100, 600], [250, 600], [250, 900], [100, 900]]),
                    150.0)
    model = _model(sources=(), fixed=(hot,))
    model = FlowModel(**{**model.__dict__, "background": FlowRegion(
        "host", None, 0.01, c_t_v_k=2e-4)})
    result = flow.run_flow_model(model)
    inside = flow._inside(result.mesh, hot.shape)
    npt.assert_allclose(result.temperature_k[inside], 150.0)
    assert result.pressure_pa is None
    tiny = FlowSource("tiny", "pressure", "region", np.array([[1, 1], [2, 1], [2, 2]]), 1.0)
    with pytest.raises(InputError, match="tiny"):
        flow.run_flow_model(_model(sources=(tiny,)))
    with pytest.raises(InputError, match="no source"):
        flow.run_flow_model(_model(sources=()))


def _patch_error_3d(h):
    """Max surface error (fraction of the peak) of a vertical 3-D patch against the closed form."""
    mesh = flow.make_mesh([(-4.0, 4.0), (-4.0, 4.0)], 4.0, h, padding_m=60.0)
    x, y, z = mesh.grid()
    p = ((z > 1) & (z < 3) & (np.abs(y) < 2)).astype(float)
    _, surface = flow.solve_sp(mesh, 1.0, c_p=np.where(x > 0, -1.0, 0.0), pressure=p)
    xc, yc = mesh.centres[0], mesh.centres[1]
    row = np.argmin(np.abs(yc))
    keep = np.abs(xc) < 4
    reference = patch_sp_local(np.full(keep.sum(), yc[row]), xc[keep], centre_m=0.0,
                               length_m=4.0, depth_top_m=1.0, depth_bottom_m=3.0,
                               dip_deg=90.0, jump_mv=1.0)
    return np.abs(surface[keep, row] - reference).max() / np.abs(reference).max(), mesh


@pytest.mark.slow
def test_3d_rectangle_matches_closed_form_patch():
    # Reference: a vertical rectangular patch with uniform jump f = 1 is the closed-form
    # solid angle of physics §2.2 (geosp.physics.forward.patch_sp_local, verified against
    # §9 row 6) [Kellogg1929]. Prescribed P = 1 on the patch's depth and strike range with
    # a C_P contrast across x = 0; AMG-CG solve. Observed 10.6 % and 2.6 % of the peak at
    # h = z_t/2 and z_t/4 (a patch only 4 and 8 cells tall): require < 4 % at z_t/4 and at
    # least the O(h) gain on halving h (ratio < 0.5).
    coarse, _ = _patch_error_3d(0.5)
    fine, mesh = _patch_error_3d(0.25)
    assert fine < 0.04
    assert fine < 0.5 * coarse
    # Uniform coupling in 3-D: no SP (physics §1 item 1), to the iterative tolerance.
    x, y, z = mesh.grid()
    _, flat = flow.solve_sp(mesh, np.where(z < 2, 1.0, 3.0), c_p=-1.0,
                            pressure=np.exp(-((x**2 + y**2 + (z - 2) ** 2))))
    assert np.abs(flat).max() < 1e-7


def test_3d_model_with_uniform_coupling_gives_no_sp():
    # Reference: physics §1 item 1 in 3-D, through run_flow_model with box regions of
    # different σ and mobility, a point fluid source and the iterative (AMG or Jacobi CG)
    # solver: surface SP vanishes to the solver tolerance (1e-10 relative residual), so
    # allow 1e-6 of max|C_P·P| in mV.
    background = FlowRegion("host", None, 0.01, c_p_v_pa=-2e-7, mobility_m2_pa_s=1e-10)
    block = FlowRegion("block", np.array([-200, 300, -250, 250, 0, 600]), 0.1,
                       c_p_v_pa=-2e-7, mobility_m2_pa_s=1e-9)
    model = FlowModel(ndim=3, core_x_m=(-600.0, 600.0), core_y_m=(-600.0, 600.0),
                      depth_m=800.0, cell_m=80.0, background=background, regions=(block,),
                      sources=(FlowSource("q", "pressure", "point",
                                          np.array([50.0, 20.0, 500.0]), 1e-2),))
    result = flow.run_flow_model(model, solver="iterative")
    assert result.mesh.ndim == 3 and result.surface_mv.shape == result.mesh.shape[:2]
    scale = 1e3 * np.abs(2e-7 * result.pressure_pa).max()
    assert scale > 1.0
    assert np.abs(result.profile_mv).max() < 1e-6 * scale
    # With the block's coupling changed there is an anomaly, and sources superpose:
    # doubling the rate doubles the SP (linearity of both solves).
    changed = FlowRegion("block", block.shape, 0.1, c_p_v_pa=-5e-8, mobility_m2_pa_s=1e-9)
    one = flow.run_flow_model(FlowModel(**{**model.__dict__, "regions": (changed,)}))
    src2 = FlowSource("q", "pressure", "point", np.array([50.0, 20.0, 500.0]), 2e-2)
    two = flow.run_flow_model(FlowModel(**{**model.__dict__, "regions": (changed,),
                                           "sources": (src2,)}))
    assert np.abs(one.profile_mv).max() > 0.05 * scale
    npt.assert_allclose(two.profile_mv, 2 * one.profile_mv, rtol=1e-6,
                        atol=1e-6 * np.abs(one.profile_mv).max())


def test_section_figure_draws_profile_section_and_stations():
    # Reference: the artists carry the data given (profile line, observed points, one
    # outline per region, depth axis pointing down).
    from geosp.figures.flow import section_figure

    model = _model()
    first = flow.run_flow_model(model)
    result = flow.run_flow_model(model, stations=(np.array([-500.0, 0.0, 500.0]),
                                                  np.array([1.0, 2.0, 3.0])))
    figure = section_figure(result)
    top, section = figure.axes[0], figure.axes[1]
    npt.assert_allclose(top.lines[0].get_ydata(), first.profile_mv)
    npt.assert_allclose(top.lines[1].get_ydata(), [1.0, 2.0, 3.0])
    lo, hi = section.get_ylim()
    assert lo > hi == 0.0
    assert any(t.get_text() == "fault zone" for t in section.texts)
