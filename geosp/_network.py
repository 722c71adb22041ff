"""
Sparse weighted least-squares adjustment of a network of potential differences.

Plain numerics for :mod:`geosp.reduce`: integer node indices, observations in
mV, variances in mV². No options, no I/O, no messages.

Formulation (as for levelling networks, [Ghilani2010]_): every reading ``e``
is an observation ``x[to[e]] - x[from[e]] = observed[e]`` with variance
``variance[e]``; the unknowns are the node potentials ``x``; the reference
node is fixed at 0. The weighted least-squares solution is computed exactly
by series reduction: chains of degree-2 nodes between junctions (line ends,
intersections, the reference) collapse to one observation each (sum of the
observations, sum of the variances); the small junction system is solved with
a sparse LU factorisation; interior nodes then follow by spreading each
chain's misclosure in proportion to cumulative variance (linearly in the
cumulative reading count for equal weights). This is algebraically identical
to solving the full sparse normal equations; ``tests/test_network.py`` checks
it against a dense ``numpy.linalg.lstsq`` solution.

Covariances: the junction covariance entries that are needed (diagonal and
the two ends of each chain) are taken from the exact inverse of the junction
normal matrix: a dense inverse up to ``DENSE_MAX_JUNCTIONS`` free junctions,
then column block by column block with the sparse LU factors (exact up to
``EXACT_MAX_JUNCTIONS`` free junctions). Above that size a
random-projection estimate with ``N_PROBES`` probes is used (relative error
about sqrt(2 / N_PROBES), roughly 14 %). Interior-node variances add the
Brownian-bridge term ``c (C - c) / C`` of their chain, which is exact.

Full covariances between any nodes (for fits that weight the correlated
network error properly) come from :class:`NetworkCovariance`: an interior
node is ``(1 - λ) x_a + λ x_b + B`` with its chain's end junctions ``a``,
``b``, ``λ = c / C`` and a bridge term ``B`` that is uncorrelated with every
junction potential, so that
``cov(x_i, x_j) = u_iᵀ Q u_j + [same chain] (min(c_i, c_j) − c_i c_j / C)``
with ``Q`` the inverse junction normal matrix.
"""

from __future__ import annotations

from collections import deque

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu

DENSE_MAX_JUNCTIONS = 4000
EXACT_MAX_JUNCTIONS = 20000
N_PROBES = 100
_BLOCK = 256


def adjust_network(n_nodes, from_index, to_index, observed, variance, reference):
    """
    Weighted least-squares node potentials of a connected difference network.

    Parameters
    ----------
    n_nodes : int
        Number of nodes; every node must be reached by at least one observation
        and the network must be connected (the caller checks).
    from_index, to_index : (m,) int arrays
        End nodes of each observation (``from != to``).
    observed : (m,) array
        ``x[to] - x[from]`` as observed, mV.
    variance : (m,) array
        Variance of each observation, mV², all > 0.
    reference : int
        Node held at 0 mV.

    Returns
    -------
    dict
        ``potential`` (n,) mV; ``sigma`` (n,) a-priori 1-sigma of each
        potential, mV; ``residual`` (m,) observed minus adjusted difference,
        mV; ``std_residual`` (m,) residual over its own standard deviation
        (NaN for legs without redundancy); ``redundancy`` (m,) redundancy
        numbers in [0, 1]; ``chi2`` (sum of squared weighted residuals);
        ``dof`` (m - n + 1, the number of independent loops); ``edge_chain``
        (m,) chain index of each observation; ``chains`` dict of chain arrays
        (``a``, ``b``, ``sum_mv``, ``var``, ``n``, ``misclosure_mv``,
        ``misclosure_var``); ``loops`` list of dicts (one per independent
        loop); ``covariance`` "exact" or "random-projection".
    """
    f = np.asarray(from_index, dtype=np.int64)
    t = np.asarray(to_index, dtype=np.int64)
    obs = np.asarray(observed, dtype=float)
    var = np.asarray(variance, dtype=float)
    n, m = int(n_nodes), len(f)
    degree = np.bincount(f, minlength=n) + np.bincount(t, minlength=n)
    junction = degree != 2
    junction[reference] = True
    chain = _series_chains(n, f, t, obs, var, junction)
    ca, cb, cs, cc = chain["a"], chain["b"], chain["sum_mv"], chain["var"]

    # Junction system, reference eliminated.
    junctions = np.flatnonzero(junction)
    free = junctions[junctions != reference]
    col = np.full(n, -1)
    col[free] = np.arange(len(free))
    xj = np.zeros(n)
    q_diag = np.zeros(n)  # junction variances (0 at the reference)
    q_ab = np.zeros(len(ca))  # covariance of the two chain ends
    method = "exact"
    proper = ca != cb
    if len(free):
        rows = np.flatnonzero(proper)
        k = len(rows)
        a_col, b_col = col[ca[rows]], col[cb[rows]]
        r_idx = np.concatenate([np.arange(k), np.arange(k)])
        c_idx = np.concatenate([a_col, b_col])
        vals = np.concatenate([-np.ones(k), np.ones(k)])
        keep = c_idx >= 0
        design = sp.csr_matrix((vals[keep], (r_idx[keep], c_idx[keep])), shape=(k, len(free)))
        w = 1.0 / cc[rows]
        normal = (design.T @ sp.diags(w) @ design).tocsc()
        lu = splu(normal)
        xj[free] = lu.solve(design.T @ (w * cs[rows]))
        if len(free) <= DENSE_MAX_JUNCTIONS:
            q = _dense_spd_inverse(normal.toarray())  # upper triangle valid
            q_diag[free] = np.diag(q)
            sel = (col[ca] >= 0) & (col[cb] >= 0)
            i, j = col[ca][sel], col[cb][sel]
            q_ab[sel] = q[np.minimum(i, j), np.maximum(i, j)]
        elif len(free) <= EXACT_MAX_JUNCTIONS:
            _selected_inverse(lu, len(free), free, col, ca, cb, q_diag, q_ab)
        else:
            method = "random-projection"
            rng = np.random.default_rng(0)
            probes = rng.choice([-1.0, 1.0], size=(N_PROBES, k)) / np.sqrt(N_PROBES)
            y = (sp.diags(np.sqrt(w)) @ design).T @ probes.T  # (J, p)
            z = lu.solve(np.ascontiguousarray(y))
            q_diag[free] = np.einsum("ij,ij->i", z, z)
            za = np.where((col[ca] >= 0)[:, None], z[np.maximum(col[ca], 0)], 0.0)
            zb = np.where((col[cb] >= 0)[:, None], z[np.maximum(col[cb], 0)], 0.0)
            q_ab = np.einsum("ij,ij->i", za, zb)

    # Chain misclosures (observed minus adjusted) and their variances.
    misclosure = cs - (xj[cb] - xj[ca])
    var_adj = q_diag[ca] + q_diag[cb] - 2 * q_ab
    var_adj[~proper] = 0.0
    mis_var = np.clip(cc - var_adj, 0.0, None)

    # Interior nodes: spread each chain's misclosure by cumulative variance.
    potential = xj.copy()
    sigma2 = q_diag.copy()
    inner = chain["node_chain"] >= 0
    kc = chain["node_chain"][inner]
    lam = chain["node_var"][inner] / cc[kc]
    a, b = ca[kc], cb[kc]
    potential[inner] = xj[a] + chain["node_sum"][inner] - lam * misclosure[kc]
    sigma2[inner] = ((1 - lam) ** 2 * q_diag[a] + lam**2 * q_diag[b]
                     + 2 * lam * (1 - lam) * q_ab[kc]
                     + chain["node_var"][inner] * (1 - lam))

    # Observation residuals (observed minus adjusted, own orientation).
    ec, es = chain["edge_chain"], chain["edge_sign"]
    residual = es * var / cc[ec] * misclosure[ec]
    redundancy = np.clip(var * mis_var[ec] / cc[ec] ** 2, 0.0, 1.0)
    has_red = mis_var > 1e-9 * cc
    std_residual = np.full(m, np.nan)
    ok = has_red[ec]
    std_residual[ok] = es[ok] * misclosure[ec][ok] / np.sqrt(mis_var[ec][ok])
    chi2 = float(np.sum(misclosure[has_red] ** 2 / cc[has_red]))
    dof = int(m - n + 1)
    chain.update(misclosure_mv=misclosure, misclosure_var=mis_var)
    return {
        "potential": potential,
        "sigma": np.sqrt(np.clip(sigma2, 0.0, None)),
        "residual": residual,
        "std_residual": std_residual,
        "redundancy": redundancy,
        "chi2": chi2,
        "dof": dof,
        "edge_chain": ec,
        "chains": chain,
        "loops": _fundamental_loops(chain, reference),
        "covariance": method,
        "covariance_model": NetworkCovariance(
            normal if len(free) else None, col, chain["node_chain"], chain["node_var"], ca, cb, cc),
    }


class NetworkCovariance:
    """
    Covariance of the adjusted node potentials (mV², for the observation
    variances given), between any nodes; see the module notes.

    ``station_node`` maps stations to nodes (-1: not in the network),
    ``factor`` scales the covariance (a variance factor) and
    ``independent_sigma_mv`` is the stations' own uncorrelated noise (mV,
    not part of :meth:`block`); all are set by :meth:`for_stations`.
    Pickles without its LU factors.
    """

    def __init__(self, normal, col, node_chain, node_var, chain_a, chain_b, chain_var,
                 station_node=None, factor=1.0, independent_sigma_mv=0.0):
        self.normal = normal
        self.col = np.asarray(col)
        self.node_chain = np.asarray(node_chain)
        self.node_var = np.asarray(node_var, dtype=float)
        self.chain_a, self.chain_b = np.asarray(chain_a), np.asarray(chain_b)
        self.chain_var = np.asarray(chain_var, dtype=float)
        self.station_node = station_node
        self.factor = float(factor)
        self.independent_sigma_mv = float(independent_sigma_mv)
        self._lu = None

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_lu"] = None
        return state

    def for_stations(self, station_node, factor=1.0, independent_sigma_mv=0.0):
        """A copy that takes station indices (``station_node[i]`` = node of station i)."""
        return NetworkCovariance(self.normal, self.col, self.node_chain, self.node_var,
                                 self.chain_a, self.chain_b, self.chain_var,
                                 np.asarray(station_node, dtype=np.int64), factor,
                                 independent_sigma_mv)

    def parts(self, index):
        """
        The covariance at ``index`` (station indices after :meth:`for_stations`,
        node indices before) as ``u q uᵀ`` plus within-chain bridges, scaled
        by ``factor``: a dict with ``u`` (k, J) junction weights, ``q`` (J, J)
        junction covariance, and per station ``chain`` (bridge id, -1 for none),
        ``c`` (cumulative variance along the chain) and ``total`` (the chain's
        variance); the bridge covariance of two stations on one chain is
        ``min(c_i, c_j) − c_i c_j / total``. Stations outside the network have
        zero rows.
        """
        index = np.asarray(index, dtype=np.int64)
        nodes = self.station_node[index] if self.station_node is not None else index
        k = nodes.size
        inside = nodes >= 0
        node = np.where(inside, nodes, 0)
        chain = np.where(inside, self.node_chain[node], -1)
        interior = chain >= 0
        ch = np.where(interior, chain, 0)
        lam = np.where(interior, self.node_var[node] / self.chain_var[ch], 0.0)
        ends = np.column_stack([np.where(interior, self.chain_a[ch], node),
                                np.where(interior, self.chain_b[ch], node)])
        weights = np.column_stack([1.0 - lam, lam]) * inside[:, None]
        cols = self.col[ends]  # -1 for the reference junction (potential fixed at 0)
        used = np.unique(cols[(cols >= 0) & (weights != 0.0)])
        u = np.zeros((k, used.size))
        q = np.zeros((used.size, used.size))
        if used.size:
            if self._lu is None:
                self._lu = splu(self.normal)
            rhs = np.zeros((self.normal.shape[0], used.size))
            rhs[used, np.arange(used.size)] = 1.0
            q = self._lu.solve(rhs)[used]  # (J, J) block of the inverse normal matrix
            q = 0.5 * (q + q.T)
            pos = np.searchsorted(used, np.maximum(cols, 0))
            for e in range(2):
                ok = cols[:, e] >= 0
                np.add.at(u, (np.flatnonzero(ok), pos[ok, e]), weights[ok, e])
        return {"u": u, "q": self.factor * q, "chain": chain,
                "c": self.factor * np.where(interior, self.node_var[node], 0.0),
                "total": self.factor * np.where(interior, self.chain_var[ch], 1.0)}

    def block(self, index):
        """Dense covariance (mV²) at ``index`` (see :meth:`parts`)."""
        return dense_covariance(self.parts(index))


def bridge_covariance(c, total):
    """Brownian-bridge covariance min(c_i, c_j) − c_i c_j / C of stations on one chain."""
    return np.minimum(c[:, None], c[None, :]) - c[:, None] * c[None, :] / total[:, None]


def dense_covariance(parts):
    """The dense matrix of :meth:`NetworkCovariance.parts`."""
    chain = parts["chain"]
    u = parts["u"]
    out = u @ parts["q"] @ u.T if u.shape[1] else np.zeros((chain.size, chain.size))
    # bridges only couple stations of one chain: fill those blocks alone
    on_chain = np.flatnonzero(chain >= 0)
    order = on_chain[np.argsort(chain[on_chain], kind="stable")]
    cuts = np.flatnonzero(np.diff(chain[order])) + 1
    c, total = parts["c"], parts["total"]
    for members in np.split(order, cuts):
        if members.size:
            out[np.ix_(members, members)] += bridge_covariance(c[members], total[members])
    return out


def _series_chains(n, f, t, obs, var, junction):
    """Collapse runs of degree-2 nodes between junctions into chains."""
    m = len(f)
    ends = np.concatenate([f, t])
    edge_of = np.concatenate([np.arange(m), np.arange(m)])
    order = np.argsort(ends, kind="stable")
    ptr = np.searchsorted(ends[order], np.arange(n + 1)).tolist()
    inc = edge_of[order].tolist()
    fl, tl, ol, vl = f.tolist(), t.tolist(), obs.tolist(), var.tolist()
    junc = junction.tolist()
    used = [False] * m
    edge_chain = np.full(m, -1)
    edge_sign = np.zeros(m)
    node_chain = np.full(n, -1)
    node_sum = np.zeros(n)
    node_var = np.zeros(n)
    ca, cb, cs, cc, cn = [], [], [], [], []
    for start in np.flatnonzero(junction).tolist():
        for p in range(ptr[start], ptr[start + 1]):
            e = inc[p]
            if used[e]:
                continue
            k = len(ca)
            cur, total, cvar, count = start, 0.0, 0.0, 0
            while True:
                used[e] = True
                if fl[e] == cur:
                    other, s = tl[e], 1.0
                else:
                    other, s = fl[e], -1.0
                total += s * ol[e]
                cvar += vl[e]
                count += 1
                edge_chain[e] = k
                edge_sign[e] = s
                if junc[other]:
                    break
                node_chain[other] = k
                node_sum[other] = total
                node_var[other] = cvar
                e1, e2 = inc[ptr[other]], inc[ptr[other] + 1]
                e = e2 if e1 == e else e1
                cur = other
            ca.append(start)
            cb.append(other)
            cs.append(total)
            cc.append(cvar)
            cn.append(count)
    if not all(used):  # a cycle without a junction: not connected to the reference
        raise ValueError("network is not connected to the reference")
    return {
        "a": np.array(ca, dtype=np.int64), "b": np.array(cb, dtype=np.int64),
        "sum_mv": np.array(cs), "var": np.array(cc), "n": np.array(cn, dtype=np.int64),
        "edge_chain": edge_chain, "edge_sign": edge_sign,
        "node_chain": node_chain, "node_sum": node_sum, "node_var": node_var,
    }


def _dense_spd_inverse(matrix):
    """Inverse of a symmetric positive-definite matrix by Cholesky (LAPACK potrf/potri)."""
    from scipy.linalg import lapack
    factor, info = lapack.dpotrf(matrix, lower=False, clean=True)
    if info != 0:
        return np.linalg.inv(matrix)
    inverse, info = lapack.dpotri(factor, lower=False)
    if info != 0:
        return np.linalg.inv(matrix)
    return inverse


def _selected_inverse(lu, n_free, free, col, ca, cb, q_diag, q_ab):
    """Exact diagonal and chain-end entries of the inverse normal matrix, by column blocks."""
    a_col, b_col = col[ca], col[cb]
    for c0 in range(0, n_free, _BLOCK):
        c1 = min(c0 + _BLOCK, n_free)
        rhs = np.zeros((n_free, c1 - c0))
        rhs[np.arange(c0, c1), np.arange(c1 - c0)] = 1.0
        x = lu.solve(rhs)
        q_diag[free[c0:c1]] = x[np.arange(c0, c1), np.arange(c1 - c0)]
        sel = (b_col >= c0) & (b_col < c1) & (a_col >= 0)
        q_ab[sel] = x[a_col[sel], b_col[sel] - c0]


def _fundamental_loops(chain, reference):
    """Independent loops: one per chain outside a breadth-first spanning tree of junctions."""
    ca, cb, cs, cc, cn = chain["a"], chain["b"], chain["sum_mv"], chain["var"], chain["n"]
    adjacency = {}
    for k, (a, b) in enumerate(zip(ca.tolist(), cb.tolist())):
        if a != b:
            adjacency.setdefault(a, []).append(k)
            adjacency.setdefault(b, []).append(k)
    parent = {reference: -1}  # junction -> chain to its parent
    pot, pvar, plen, depth = {reference: 0.0}, {reference: 0.0}, {reference: 0}, {reference: 0}
    tree = set()
    queue = deque([reference])
    while queue:
        u = queue.popleft()
        for k in adjacency.get(u, []):
            v, s = (int(cb[k]), 1.0) if ca[k] == u else (int(ca[k]), -1.0)
            if v in parent:
                continue
            parent[v] = k
            tree.add(k)
            pot[v] = pot[u] + s * cs[k]
            pvar[v] = pvar[u] + cc[k]
            plen[v] = plen[u] + cn[k]
            depth[v] = depth[u] + 1
            queue.append(v)

    def up(node):
        k = parent[node]
        return int(ca[k]) if cb[k] == node else int(cb[k]), k

    loops = []
    for k in range(len(ca)):
        if k in tree:
            continue
        a, b = int(ca[k]), int(cb[k])
        path = [k]
        u, v = a, b
        while depth[u] > depth[v]:
            u, kk = up(u)
            path.append(kk)
        while depth[v] > depth[u]:
            v, kk = up(v)
            path.append(kk)
        while u != v:
            u, k1 = up(u)
            v, k2 = up(v)
            path.extend([k1, k2])
        lca = u
        loops.append({
            "closing_chain": k,
            "chains": path,
            "misclosure_mv": float(cs[k] + pot[a] - pot[b]),
            "sigma_mv": float(np.sqrt(cc[k] + pvar[a] + pvar[b] - 2 * pvar[lca])),
            "n_legs": int(cn[k] + plen[a] + plen[b] - 2 * plen[lca]),
        })
    return loops
