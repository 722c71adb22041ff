"""The linear part of the survey model: nuisances, projections, matched-filter scores."""

import numpy as np
import numpy.testing as npt
import pytest

from geosp.interpret.linear import Frame, Projector, match_scores, nuisance_columns, solve
from geosp.interpret.noise import NoiseModel, Whitener


def _points(n=300, seed=0):
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, 3000, n), rng.uniform(0, 3000, n)
    return x, y, 400.0 + 0.05 * x + rng.normal(0, 20, n)


def test_generalised_least_squares_matches_the_normal_equations():
    # Reference: β = (XᵀC⁻¹X)⁻¹ XᵀC⁻¹ d with C⁻¹ from numpy.linalg.inv, an
    # independent route to the same estimator (agreement to round-off).
    x, y, e = _points()
    design = np.column_stack([nuisance_columns(x, y, e, Frame.of(x, y, e)), np.sin(x / 300.0)])
    cov = NoiseModel(3.0, 2.0, 250.0).covariance(x, y, np.ones(x.size))
    rng = np.random.default_rng(1)
    data = design @ rng.normal(0, 5, design.shape[1]) + np.linalg.cholesky(cov) @ rng.normal(size=x.size)
    white = Whitener(cov.copy())
    coef, covariance, chi2 = solve(white(design), white(data))
    inv = np.linalg.inv(cov)
    normal = design.T @ inv @ design
    expected = np.linalg.solve(normal, design.T @ inv @ data)
    npt.assert_allclose(coef, expected, rtol=1e-7, atol=1e-9)
    npt.assert_allclose(covariance, np.linalg.inv(normal), rtol=1e-6)
    r = data - design @ expected
    assert chi2 == pytest.approx(float(r @ inv @ r), rel=1e-8)


def test_projector_is_orthogonal_to_its_columns_and_idempotent():
    x, y, e = _points()
    columns = nuisance_columns(x, y, e, Frame.of(x, y, e))
    project = Projector(np.column_stack([columns, columns[:, 1] + columns[:, 2]]))  # one redundant column
    assert project.rank == columns.shape[1]
    v = np.random.default_rng(3).normal(size=x.size)
    pv = project(v)
    npt.assert_allclose(columns.T @ pv, 0.0, atol=1e-9)
    npt.assert_allclose(project(pv), pv, atol=1e-12)


def test_scores_with_an_implicit_projection_match_the_explicit_projection():
    # Reference: each column and the data projected off the nuisance span as
    # least-squares residuals from numpy.linalg.lstsq, then z = gᵀr / ‖g‖
    # written out; the implicit form never builds the projected columns.
    x, y, e = _points(400)
    nuisance = nuisance_columns(x, y, e, Frame.of(x, y, e))
    rng = np.random.default_rng(7)
    columns = np.column_stack([np.exp(-((x - cx) ** 2 + (y - 1500) ** 2) / 300.0**2)
                               for cx in (500.0, 1500.0, 2500.0)] + [nuisance[:, 1]])  # last: inside the span
    data = rng.normal(size=(x.size, 3))

    def off_span(v):
        return v - nuisance @ np.linalg.lstsq(nuisance, v, rcond=None)[0]

    g, r = off_span(columns), off_span(data)
    norm = np.linalg.norm(g, axis=0)
    z, got_norm = match_scores(columns, data, Projector(nuisance))
    npt.assert_allclose(z[:3], (g[:, :3].T @ r) / norm[:3, None], rtol=1e-9, atol=1e-12)
    npt.assert_allclose(got_norm[:3], norm[:3], rtol=1e-9)
    assert got_norm[3] == 0.0 and np.all(z[3] == 0.0)  # no part outside the span: no score
    z1, _ = match_scores(columns, data[:, 0], Projector(nuisance), np.sum(columns**2, axis=0))
    npt.assert_allclose(z1, z[:, 0], rtol=1e-12)


def test_matched_filter_scores_are_standard_normal_under_the_noise_model():
    # Reference: for whitened noise w ~ N(0, I) and a fixed unit direction u,
    # uᵀPw ~ N(0, 1) exactly; 4000 draws pin the variance to ±5 % (3 sd).
    x, y, e = _points(200)
    project = Projector(nuisance_columns(x, y, e, Frame.of(x, y, e)))
    column = project(np.exp(-((x - 1500) ** 2 + (y - 1500) ** 2) / 400.0**2))[:, None]
    rng = np.random.default_rng(5)
    z = np.array([match_scores(column, project(rng.normal(size=x.size)))[0][0] for _ in range(4000)])
    assert abs(z.mean()) < 0.05
    assert z.var() == pytest.approx(1.0, abs=0.07)
