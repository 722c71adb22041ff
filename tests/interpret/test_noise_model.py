"""The survey model's noise: covariance, whitening and its estimation from residuals."""

import numpy as np
import numpy.testing as npt
import pytest

from geosp.interpret.noise import NoiseModel, Whitener, estimate_noise

from interpret_synthetic import E0, N0, exponential_noise


def test_covariance_is_network_plus_white_over_weight_plus_exponential():
    # Hand-built reference: C_ij = N_ij + δ_ij σ_w²/w_i + σ_c² exp(−d_ij/ℓ).
    x = np.array([0.0, 30.0, 100.0, 400.0])
    y = np.array([0.0, 40.0, 0.0, 0.0])
    w = np.array([1.0, 0.25, 1.0, 0.5])
    net = np.array([[4.0, 1.0, 0.0, 0.0], [1.0, 4.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.5],
                    [0.0, 0.0, 0.5, 1.0]])
    model = NoiseModel(3.0, 2.0, 100.0)
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    expected = net + np.diag(9.0 / w) + 4.0 * np.exp(-d / 100.0)
    npt.assert_allclose(model.covariance(x, y, w, net), expected, rtol=1e-14)


def test_whitener_turns_the_covariance_into_the_identity():
    # Reference: numpy's matrix products; W C Wᵀ = I to round-off.
    rng = np.random.default_rng(2)
    x, y = rng.uniform(0, 1000, 60), rng.uniform(0, 1000, 60)
    cov = NoiseModel(2.0, 3.0, 150.0).covariance(x, y, np.ones(60))
    white = Whitener(cov.copy())
    w = white(np.eye(60))
    npt.assert_allclose(w @ cov @ w.T, np.eye(60), atol=1e-10)
    # and colour() undoes it
    v = rng.normal(size=60)
    npt.assert_allclose(white.colour(white(v)), v, rtol=1e-10)


@pytest.mark.parametrize("seed", [0, 1])
def test_estimate_recovers_white_and_correlated_noise(seed):
    # Truth known by construction (an exact draw of the model); a single
    # realisation over a 3 km survey pins the white part to a few per cent
    # (thousands of station pairs at the shortest lags) but the correlated
    # part only to tens of per cent and its length to a factor of about 2
    # (only ~(3000/300)² independent correlation cells).
    rng = np.random.default_rng(seed)
    x, y = np.meshgrid(E0 + np.arange(0, 3000, 30.0), N0 + np.arange(0, 3000, 150.0))
    x, y = x.ravel(), y.ravel()
    field = rng.normal(0, 4.0, x.size) + exponential_noise(x, y, 3.0, 300.0, rng)
    model = estimate_noise(x, y, field - field.mean(), np.ones(x.size), spacing=30.0, line_spacing=150.0)
    assert model.white_sd_mv == pytest.approx(4.0, rel=0.08)
    assert model.correlated_sd_mv == pytest.approx(3.0, rel=0.4)
    assert 300.0 / 2.5 < model.correlation_length_m < 300.0 * 2.5


def test_estimate_finds_no_correlated_part_in_white_noise():
    rng = np.random.default_rng(4)
    x, y = np.meshgrid(E0 + np.arange(0, 3000, 30.0), N0 + np.arange(0, 3000, 150.0))
    x, y = x.ravel(), y.ravel()
    model = estimate_noise(x, y, rng.normal(0, 5.0, x.size), np.ones(x.size), spacing=30.0,
                           line_spacing=150.0)
    assert model.white_sd_mv == pytest.approx(5.0, rel=0.05)
    assert model.correlated_sd_mv < 1.0  # well below the white part (a small residual is a draw)
