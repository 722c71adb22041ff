"""Tests of the sparse network adjustment (geosp._network) against dense least squares."""

import numpy as np
import numpy.testing as npt
import pytest

from geosp._network import adjust_network


def random_network(seed, n=40, extra=8):
    """A chain through all nodes plus random cross ties and one repeated leg (multigraph)."""
    rng = np.random.default_rng(seed)
    f = list(range(n - 1))
    t = list(range(1, n))
    for _ in range(extra):
        a, b = rng.choice(n, 2, replace=False)
        f.append(int(a))
        t.append(int(b))
    f.append(3)
    t.append(4)
    f, t = np.array(f), np.array(t)
    obs = rng.normal(0.0, 5.0, len(f))
    var = rng.uniform(0.5, 3.0, len(f))
    return n, f, t, obs, var


def dense_solution(n, f, t, obs, var, ref):
    """Independent reference: numpy.linalg.lstsq on the same weighted system, dense inverse."""
    m = len(f)
    a = np.zeros((m, n))
    a[np.arange(m), f] = -1.0
    a[np.arange(m), t] = 1.0
    a = np.delete(a, ref, axis=1)
    sw = 1.0 / np.sqrt(var)
    x = np.linalg.lstsq(a * sw[:, None], obs * sw, rcond=None)[0]
    q = np.linalg.inv(a.T @ (a / var[:, None]))
    qv = np.diag(var) - a @ q @ a.T
    x = np.insert(x, ref, 0.0)
    sigma = np.insert(np.sqrt(np.diag(q)), ref, 0.0)
    resid = obs - (x[t] - x[f])
    return x, sigma, resid, np.diag(qv)


@pytest.mark.parametrize("seed, ref", [(1, 7), (2, 0), (3, 39)])
def test_adjustment_matches_dense_lstsq(seed, ref):
    # Reference: dense weighted least squares (numpy.linalg.lstsq) and the dense inverse of the
    # normal matrix for covariances [Ghilani2010]. Both are exact, so the tolerance is a few
    # hundred float64 ulps of the mV-sized values.
    n, f, t, obs, var = random_network(seed)
    res = adjust_network(n, f, t, obs, var, ref)
    x, sigma, resid, qvv = dense_solution(n, f, t, obs, var, ref)
    npt.assert_allclose(res["potential"], x, atol=1e-10)
    npt.assert_allclose(res["sigma"], sigma, atol=1e-10)
    npt.assert_allclose(res["residual"], resid, atol=1e-10)
    npt.assert_allclose(res["chi2"], np.sum(resid**2 / var), rtol=1e-10)
    assert res["dof"] == len(f) - n + 1 == len(res["loops"])
    redundant = qvv > 1e-9 * var
    npt.assert_allclose(res["std_residual"][redundant],
                        resid[redundant] / np.sqrt(qvv[redundant]), atol=1e-8)
    assert np.all(np.isnan(res["std_residual"][~redundant]))
    # Redundancy numbers sum to the degrees of freedom (trace of the redundancy matrix).
    npt.assert_allclose(res["redundancy"].sum(), res["dof"], rtol=1e-10)
    assert res["covariance"] == "exact"


@pytest.mark.parametrize("seed, ref", [(1, 7), (2, 0), (4, 20)])
def test_covariance_between_any_nodes_matches_the_dense_inverse(seed, ref):
    # Reference: the dense inverse of the normal matrix (numpy.linalg.inv), the
    # covariance of least-squares potentials [Ghilani2010]. Series reduction into
    # junctions plus Brownian bridges is exact, so the tolerance is round-off.
    n, f, t, obs, var = random_network(seed, n=60, extra=6)
    res = adjust_network(n, f, t, obs, var, ref)
    m = len(f)
    a = np.zeros((m, n))
    a[np.arange(m), f] = -1.0
    a[np.arange(m), t] = 1.0
    keep = np.delete(np.arange(n), ref)
    dense = np.zeros((n, n))
    dense[np.ix_(keep, keep)] = np.linalg.inv(a[:, keep].T @ (a[:, keep] / var[:, None]))
    rng = np.random.default_rng(seed)
    nodes = rng.choice(n, 25, replace=False)
    npt.assert_allclose(res["covariance_model"].block(nodes), dense[np.ix_(nodes, nodes)],
                        atol=1e-10 * dense.max())
    # Through a station map with stations outside the network (-1) and a variance factor.
    station_node = np.array([5, -1, 17, 5, 40])
    cov = res["covariance_model"].for_stations(station_node, factor=0.5)
    expected = 0.5 * dense[np.ix_(np.maximum(station_node, 0), np.maximum(station_node, 0))]
    expected[1, :] = expected[:, 1] = 0.0
    npt.assert_allclose(cov.block(np.arange(5)), expected, atol=1e-10 * dense.max())


def test_loop_misclosures_are_sums_of_observations_around_each_loop():
    # A loop's misclosure is the signed sum of its observations and its sigma the square root
    # of the summed variances (levelling practice, Ghilani 2010 from memory). Ring 0-1-2-3-0
    # plus a diagonal 0-2: the spanning tree from node 0 keeps the first path 0-1-2, so the
    # independent loops are 0-1-2 + diagonal (3 legs, 1 + 2 - 3.2) and the outer ring
    # (4 legs, 1 + 2 + 3 - 4.5), sums done by hand.
    f = np.array([0, 1, 2, 3, 0])
    t = np.array([1, 2, 3, 0, 2])
    obs = np.array([1.0, 2.0, 3.0, -4.5, 3.2])
    res = adjust_network(4, f, t, obs, np.ones(5), 0)
    loops = sorted(res["loops"], key=lambda lp: lp["n_legs"])
    npt.assert_allclose([abs(lp["misclosure_mv"]) for lp in loops], [0.2, 1.5], atol=1e-12)
    npt.assert_allclose([lp["sigma_mv"] for lp in loops], [np.sqrt(3.0), 2.0], rtol=1e-12)
    assert [lp["n_legs"] for lp in loops] == [3, 4]


def test_random_projection_fallback_close_to_exact(monkeypatch):
    # The large-network covariance estimate (random projections) must agree with the exact
    # selected inverse to its stated accuracy: relative error ~ sqrt(2/100) = 14 % per entry;
    # the mean over all nodes is much tighter, so allow 35 % per node and 10 % on average.
    import geosp._network as net
    n, f, t, obs, var = random_network(5, n=60, extra=30)
    exact = adjust_network(n, f, t, obs, var, 0)
    monkeypatch.setattr(net, "DENSE_MAX_JUNCTIONS", 0)
    monkeypatch.setattr(net, "EXACT_MAX_JUNCTIONS", 0)
    approx = net.adjust_network(n, f, t, obs, var, 0)
    assert approx["covariance"] == "random-projection"
    npt.assert_allclose(approx["potential"], exact["potential"], atol=1e-10)
    ratio = approx["sigma"][1:] / exact["sigma"][1:]
    assert np.all(np.abs(ratio - 1) < 0.35)
    assert abs(np.mean(ratio**2) - 1) < 0.10


def test_blocked_selected_inverse_matches_dense(monkeypatch):
    # The column-block sparse-LU path for mid-size networks must give the same exact
    # covariances as the dense LAPACK path and the independent dense lstsq reference.
    import geosp._network as net
    n, f, t, obs, var = random_network(6, n=80, extra=25)
    monkeypatch.setattr(net, "DENSE_MAX_JUNCTIONS", 0)
    monkeypatch.setattr(net, "_BLOCK", 7)  # several blocks
    res = net.adjust_network(n, f, t, obs, var, 10)
    x, sigma, resid, _ = dense_solution(n, f, t, obs, var, 10)
    assert res["covariance"] == "exact"
    npt.assert_allclose(res["potential"], x, atol=1e-10)
    npt.assert_allclose(res["sigma"], sigma, atol=1e-10)
    npt.assert_allclose(res["residual"], resid, atol=1e-10)
