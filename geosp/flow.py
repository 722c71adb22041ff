"""
Primary-flow forward modelling: solve for pressure and/or temperature, then SP.

Cell-centred finite volumes on a tensor mesh: 2-D cross-sections (x across,
z down, 1 m along strike) or 3-D boxes (x, y, z down). The ground surface is
the top of the mesh (z = 0); the uniform core is surrounded by padding cells
that grow by ``padding_factor`` toward distant boundaries.

Sign convention (laboratory sign, [RevilJardani2013]_): the streaming-potential
coefficient C_P = (ΔV/ΔP) at zero current (V/Pa, usually negative) and the
thermoelectric coefficient C_T = (ΔV/ΔT) at zero current (V/K), so the current
density is ``j = −σ∇V + σC_P∇P + σC_T∇T`` and the total potential
``Φ = V − C_P·P − C_T·T`` is harmonic where the properties are uniform
([Onsager1931]_ for the coupled flows). Many papers write Φ = V + C·P with
C = −C_P; the physics is the same.

Steps (docs/flow-modelling.md):

1. ``∇·((k/η)∇P) = −Q`` with P = 0 at the surface and far boundaries, and
   ``∇·(λ∇T) − ρ_f c_f q·∇T = −H`` with T = 0 (excess over the surface
   temperature) there; q = −(k/η)∇P is the Darcy flux.
2. ``∇·(σ∇V) = ∇·(σC_P∇P + σC_T∇T)`` with no current through the ground
   surface and V = 0 on the far boundaries.

Face conductivities are harmonic (series) means and face coupling
coefficients arithmetic means; this equals the jump-condition scheme
[Φ] = −[C_P]·P − [C_T]·T with P and T on the face taken as the mean of the
two neighbours, so contacts need no special treatment. Both forms are
available (``form="source"`` or ``"jump"``) and give the same V.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, replace

import numpy as np
import scipy.sparse as sparse
import scipy.sparse.linalg as spla

from .errors import InputError
from .models import FlowModel

logger = logging.getLogger(__name__)

__all__ = [
    "TensorMesh", "FlowResult", "make_mesh", "assign_regions", "solve_pressure", "solve_heat",
    "solve_sp", "compute_darcy_flux", "sample_surface_sp", "run_flow_model",
]


# --------------------------------------------------------------------------- mesh

@dataclass(frozen=True)
class TensorMesh:
    """
    Tensor-product mesh of cells.

    ``edges`` holds the cell edges per axis in m, ascending: ``(x, z)`` for a
    section or ``(x, y, z)`` in 3-D. The last axis is depth, positive down,
    with the ground surface at ``edges[-1][0] == 0``. Cell arrays have shape
    ``mesh.shape`` (x first, depth last).
    """

    edges: tuple

    @property
    def ndim(self):
        """Number of axes (2 or 3)."""
        return len(self.edges)

    @property
    def shape(self):
        """Number of cells along each axis."""
        return tuple(len(e) - 1 for e in self.edges)

    @property
    def n_cells(self):
        """Total number of cells."""
        return int(np.prod(self.shape))

    @property
    def centres(self):
        """Cell-centre coordinates per axis (m)."""
        return tuple(0.5 * (e[1:] + e[:-1]) for e in self.edges)

    @property
    def widths(self):
        """Cell widths per axis (m)."""
        return tuple(np.diff(e) for e in self.edges)

    @property
    def volumes(self):
        """Cell volumes (m³; m² per metre along strike in sections)."""
        out = np.ones(self.shape)
        for axis, w in enumerate(self.widths):
            out = out * _along(w, axis, self.ndim)
        return out

    def grid(self):
        """Cell-centre coordinates as full arrays (``indexing="ij"``)."""
        return np.meshgrid(*self.centres, indexing="ij")


def _along(vector, axis, ndim):
    """Reshape a 1-D array to broadcast along ``axis`` of an ``ndim`` array."""
    shape = [1] * ndim
    shape[axis] = -1
    return np.asarray(vector).reshape(shape)


def _padding(cell_m, factor, distance_m):
    """Widths of padding cells growing by ``factor`` until they span ``distance_m``."""
    widths = []
    width = cell_m
    while sum(widths) < distance_m:
        width *= factor
        widths.append(width)
    return np.array(widths)


def make_mesh(core, depth_m, cell_m, *, padding_factor=1.3, padding_m=None):
    """
    Build a padded tensor mesh with a uniform core.

    Parameters
    ----------
    core : sequence of (float, float)
        Horizontal extent of the uniform core per horizontal axis (m):
        ``[(x0, x1)]`` for a section, ``[(x0, x1), (y0, y1)]`` in 3-D.
    depth_m : float
        Depth of the core below the surface (m).
    cell_m : float
        Core cell size (m); each core axis gets a whole number of cells of
        about this size.
    padding_factor : float, optional
        Growth ratio of successive padding cells. Default 1.3.
    padding_m : float or None, optional
        Distance from the core to the far boundaries (m). Default ten times
        the largest core dimension.

    Returns
    -------
    mesh : TensorMesh
    """
    core = [tuple(map(float, c)) for c in core]
    size = max([hi - lo for lo, hi in core] + [float(depth_m)])
    if padding_m is None:
        padding_m = 10.0 * size
    edges = []
    for lo, hi in core:
        n = max(1, int(np.ceil((hi - lo) / cell_m - 1e-9)))
        h = (hi - lo) / n
        pad = _padding(h, padding_factor, padding_m)
        edges.append(np.concatenate([lo - np.cumsum(pad)[::-1], lo + h * np.arange(n + 1),
                                     hi + np.cumsum(pad)]))
    n = max(1, int(np.ceil(depth_m / cell_m - 1e-9)))
    h = depth_m / n
    pad = _padding(h, padding_factor, padding_m)
    edges.append(np.concatenate([h * np.arange(n + 1), depth_m + np.cumsum(pad)]))
    return TensorMesh(tuple(edges))


# --------------------------------------------------------------------------- geometry

def _inside(mesh, shape):
    """Boolean cell mask of a polygon (x, z) in a section or a box in 3-D."""
    centres = mesh.grid()
    shape = np.asarray(shape, dtype=float)
    if mesh.ndim == 2:
        import shapely

        polygon = shapely.Polygon(shape)
        return shapely.intersects_xy(polygon, centres[0], centres[1])
    x0, x1, y0, y1, z0, z1 = shape
    x, y, z = centres
    return (x >= x0) & (x <= x1) & (y >= y0) & (y <= y1) & (z >= z0) & (z <= z1)


def assign_regions(mesh, regions):
    """
    Index of the region that owns each cell.

    Parameters
    ----------
    mesh : TensorMesh
    regions : sequence of FlowRegion
        Later regions override earlier ones where they overlap.

    Returns
    -------
    index : int array, shape ``mesh.shape``
        0 for the background, i + 1 for ``regions[i]``.
    """
    index = np.zeros(mesh.shape, dtype=int)
    for i, region in enumerate(regions):
        index[_inside(mesh, region.shape)] = i + 1
    return index


def _point_weights(mesh, point):
    """Cloud-in-cell weights (flat indices, weights) of a point on cell centres."""
    flat_index = np.arange(mesh.n_cells).reshape(mesh.shape)
    per_axis = []
    for c, p in zip(mesh.centres, point):
        k = int(np.clip(np.searchsorted(c, p) - 1, 0, len(c) - 2))
        t = float(np.clip((p - c[k]) / (c[k + 1] - c[k]), 0.0, 1.0))
        per_axis.append(((k, 1.0 - t), (k + 1, t)))
    indices, weights = [], []
    for combo in np.ndindex(*(2,) * mesh.ndim):
        idx = tuple(per_axis[a][combo[a]][0] for a in range(mesh.ndim))
        w = np.prod([per_axis[a][combo[a]][1] for a in range(mesh.ndim)])
        if w > 0:
            indices.append(flat_index[idx])
            weights.append(w)
    return np.array(indices), np.array(weights)


def _source_vector(mesh, sources, where="flow model"):
    """Total source rate per cell (m³/s or W; per metre of strike in sections)."""
    out = np.zeros(mesh.n_cells)
    for source in sources:
        geometry = np.asarray(source.geometry, dtype=float)
        if source.kind == "point":
            idx, w = _point_weights(mesh, geometry)
            np.add.at(out, idx, source.strength * w)
        elif source.kind == "line":
            a, b = geometry
            length = float(np.linalg.norm(b - a))
            h = min(float(w.min()) for w in mesh.widths)
            n = max(1, int(np.ceil(4 * length / h)))
            for s in (np.arange(n) + 0.5) / n:
                idx, w = _point_weights(mesh, a + s * (b - a))
                np.add.at(out, idx, source.strength / n * w)
        elif source.kind == "region":
            mask = _inside(mesh, geometry).reshape(-1)
            if not mask.any():
                raise InputError(where, f"source '{source.name}' contains no cell centre.",
                                 "Enlarge the region or use a smaller cell_m.")
            volume = mesh.volumes.reshape(-1)
            out[mask] += source.strength * volume[mask] / volume[mask].sum()
        else:
            raise InputError(where, f"source '{source.name}' has unknown kind {source.kind!r}.",
                             "Use point, line or region.")
    return out


# --------------------------------------------------------------------------- operators

def _faces(mesh, coefficient):
    """
    Face conductances of a cell property.

    Returns ``interior`` as a list of (i, j, T) per axis with flat cell
    indices and T = A / (w_i/(2p_i) + w_j/(2p_j)) (series, i.e. harmonic,
    mean), and ``boundary`` as a dict {(axis, side): (i, T)} with
    T = A / (w_i/(2p_i)) from the centre to the boundary face.
    """
    ndim, shape = mesh.ndim, mesh.shape
    p = np.broadcast_to(np.asarray(coefficient, dtype=float), shape)
    flat = np.arange(mesh.n_cells).reshape(shape)
    widths = mesh.widths
    interior, boundary = [], {}
    for axis in range(ndim):
        area = np.ones(shape)
        for other in range(ndim):
            if other != axis:
                area = area * _along(widths[other], other, ndim)
        half = 0.5 * _along(widths[axis], axis, ndim) / p  # half-cell resistance per area
        n = shape[axis]
        lo = [slice(None)] * ndim
        hi = [slice(None)] * ndim
        lo[axis], hi[axis] = slice(0, n - 1), slice(1, n)
        lo, hi = tuple(lo), tuple(hi)
        t = area[lo] / (half[lo] + half[hi])
        interior.append((flat[lo].reshape(-1), flat[hi].reshape(-1), t.reshape(-1)))
        for side, k in (("low", 0), ("high", n - 1)):
            sel = [slice(None)] * ndim
            sel[axis] = k
            sel = tuple(sel)
            boundary[(axis, side)] = (flat[sel].reshape(-1), (area[sel] / half[sel]).reshape(-1))
    return interior, boundary


def _sides(ndim, *, top):
    """Boundary sides of the mesh; the ground surface is (last axis, "low")."""
    sides = [(a, s) for a in range(ndim) for s in ("low", "high")]
    return sides if top else [s for s in sides if s != (ndim - 1, "low")]


def _laplacian(n, interior, boundary, dirichlet_sides):
    """Symmetric positive (semi-)definite FV matrix Σ T (e_i − e_j)(e_i − e_j)ᵀ + Dirichlet terms."""
    rows, cols, vals = [], [], []
    for i, j, t in interior:
        rows += [i, j, i, j]
        cols += [i, j, j, i]
        vals += [t, t, -t, -t]
    for side in dirichlet_sides:
        i, t = boundary[side]
        rows.append(i)
        cols.append(i)
        vals.append(t)
    rows, cols, vals = (np.concatenate(v) for v in (rows, cols, vals))
    return sparse.csr_matrix((vals, (rows, cols)), shape=(n, n))


def _solve(matrix, rhs, *, symmetric, ndim, solver):
    """Solve a sparse system: direct in 2-D, preconditioned Krylov in 3-D."""
    if solver == "auto":
        solver = "direct" if ndim == 2 or matrix.shape[0] < 20_000 else "iterative"
    if solver == "direct":
        return spla.spsolve(matrix.tocsc(), rhs)
    scale = np.abs(rhs).max()
    if scale == 0:
        return np.zeros_like(rhs)
    try:
        import pyamg
    except ImportError:  # plain scipy fallback
        pyamg = None
    if pyamg is not None:
        # Classical (Ruge-Stüben) AMG copes with the stretched padding cells far better
        # than smoothed aggregation here (11 against 90 iterations at 1.3e5 cells).
        ml = pyamg.ruge_stuben_solver(matrix.tocsr())
        return ml.solve(rhs, tol=1e-10, accel="cg" if symmetric else "gmres", maxiter=500)
    diag = matrix.diagonal()
    jacobi = spla.LinearOperator(matrix.shape, matvec=lambda v: v / diag)
    method = spla.cg if symmetric else spla.bicgstab
    x, info = method(matrix, rhs, rtol=1e-10, atol=0.0, M=jacobi, maxiter=20 * matrix.shape[0])
    if info != 0:
        logger.warning("iterative solve did not converge (info=%s)", info)
    return x


def _solve_with_fixed(matrix, rhs, fixed_mask, fixed_values, **kwargs):
    """Solve with some unknowns held fixed (eliminated, which keeps symmetry)."""
    if fixed_mask is None or not np.any(fixed_mask):
        return _solve(matrix, rhs, **kwargs)
    fixed = np.asarray(fixed_mask, dtype=bool).reshape(-1)
    values = np.broadcast_to(np.asarray(fixed_values, dtype=float), fixed_mask.shape).reshape(-1)
    free = ~fixed
    x = np.where(fixed, values, 0.0)
    a = matrix.tocsr()
    reduced_rhs = rhs[free] - a[free][:, fixed] @ x[fixed]
    x[free] = _solve(a[free][:, free], reduced_rhs, **kwargs)
    return x


# --------------------------------------------------------------------------- flow solves

def solve_pressure(mesh, mobility, *, source=None, fixed_mask=None, fixed_values=0.0,
                   solver="auto"):
    """
    Steady Darcy pressure: ∇·((k/η)∇P) = −Q.

    Parameters
    ----------
    mesh : TensorMesh
    mobility : float or array, shape ``mesh.shape``
        Permeability over viscosity k/η (m²/(Pa·s)); a hydraulic
        conductivity K (m/s) gives k/η = K/(ρ_f g).
    source : array or None
        Fluid injection per cell (m³/s in total per cell, per metre of strike
        in sections; positive in). Default none.
    fixed_mask, fixed_values : array or None
        Cells whose pressure is held fixed, and their pressures (Pa).
    solver : {"auto", "direct", "iterative"}
        "auto" is direct (sparse LU) in 2-D and in small 3-D meshes, and
        classical-AMG-preconditioned CG (GMRES with advection) in larger
        3-D meshes when pyamg is installed (``pip install geosp[flow3d]``),
        else Jacobi-preconditioned CG (BiCGSTAB), which is much slower.

    Returns
    -------
    pressure : array, shape ``mesh.shape``
        Excess pressure P (Pa), 0 at the ground surface and far boundaries.

    Notes
    -----
    For a line source of q m²/s at depth z_s in a uniform section the result
    tends to P = q/(4π k/η)·ln(r_img²/r²) (method of images).
    """
    interior, boundary = _faces(mesh, mobility)
    matrix = _laplacian(mesh.n_cells, interior, boundary, _sides(mesh.ndim, top=True))
    rhs = np.zeros(mesh.n_cells) if source is None else np.asarray(source, float).reshape(-1)
    p = _solve_with_fixed(matrix, rhs, fixed_mask, fixed_values, symmetric=True,
                          ndim=mesh.ndim, solver=solver)
    return p.reshape(mesh.shape)


def compute_darcy_flux(mesh, mobility, pressure):
    """
    Darcy volume fluxes through the faces (m³/s; per metre of strike in sections).

    Returns
    -------
    interior : list of (i, j, F) per axis, F > 0 from cell i to cell j.
    boundary : dict {(axis, side): (i, F)}, F > 0 out of the mesh (P = 0 outside).
    """
    interior, boundary = _faces(mesh, mobility)
    p = np.asarray(pressure, float).reshape(-1)
    flux_in = [(i, j, t * (p[i] - p[j])) for i, j, t in interior]
    flux_b = {side: (i, t * p[i]) for side, (i, t) in boundary.items()}
    return flux_in, flux_b


def solve_heat(mesh, conductivity, *, source=None, fixed_mask=None, fixed_values=0.0,
               darcy_flux=None, inflow_temperature_k=0.0, heat_capacity_j_m3_k=4.18e6,
               solver="auto"):
    """
    Steady heat transport: ∇·(λ∇T) − ρ_f c_f q·∇T = −H.

    Parameters
    ----------
    mesh : TensorMesh
    conductivity : float or array
        Thermal conductivity λ (W/(m·K)).
    source : array or None
        Heat input per cell (W in total per cell, per metre of strike in
        sections).
    fixed_mask, fixed_values : array or None
        Cells held at a fixed temperature (K above the surface temperature).
    darcy_flux : tuple or None
        Face fluxes from :func:`compute_darcy_flux` for advection (first-order
        upwind); None for conduction only.
    inflow_temperature_k : float or array
        Temperature (K above the surface) of fluid entering the mesh where
        the Darcy flux diverges (fluid sources and fixed-pressure cells),
        per cell or one value. Default 0.
    heat_capacity_j_m3_k : float
        Volumetric heat capacity of the fluid ρ_f c_f (J/(m³·K)).
    solver : str
        As in :func:`solve_pressure`.

    Returns
    -------
    temperature : array, shape ``mesh.shape``
        T (K) above the surface temperature, 0 at the surface and far boundaries.
    """
    interior, boundary = _faces(mesh, conductivity)
    sides = _sides(mesh.ndim, top=True)
    matrix = _laplacian(mesh.n_cells, interior, boundary, sides)
    symmetric = darcy_flux is None
    if darcy_flux is not None:
        # q·∇T per cell ≈ Σ over inflow faces |F|(T_i − T_upstream) (upwind, non-conservative
        # form, consistent with ∇·(qT) − T∇·q).
        flux_in, flux_b = darcy_flux
        rows, cols, vals = [], [], []
        for i, j, f in flux_in:
            into_j = np.maximum(f, 0.0) * heat_capacity_j_m3_k  # flow i -> j enters j
            into_i = np.maximum(-f, 0.0) * heat_capacity_j_m3_k
            rows += [j, j, i, i]
            cols += [j, i, i, j]
            vals += [into_j, -into_j, into_i, -into_i]
        for side in sides:
            i, f = flux_b[side]
            rows.append(i)
            cols.append(i)
            vals.append(np.maximum(-f, 0.0) * heat_capacity_j_m3_k)  # inflow at T = 0
        # Where fluid enters (net outflow Q > 0 of a cell: a source or a fixed pressure),
        # it arrives at the inflow temperature: ρc·Q·(T_i − T_in), so that
        # ∇·(λ∇T) − ρc∇·(qT) = −H − ρc·Q·T_in (energy is conserved; without this term
        # fluid would be created at the local temperature and heat would run away).
        entering = np.zeros(mesh.n_cells)
        for i, j, f in flux_in:
            np.add.at(entering, i, f)
            np.add.at(entering, j, -f)
        for side, (i, f) in flux_b.items():
            np.add.at(entering, i, f)
        entering = np.maximum(entering, 0.0) * heat_capacity_j_m3_k
        rows.append(np.arange(mesh.n_cells))
        cols.append(np.arange(mesh.n_cells))
        vals.append(entering)
        rows, cols, vals = (np.concatenate(v) for v in (rows, cols, vals))
        matrix = matrix + sparse.csr_matrix((vals, (rows, cols)), shape=matrix.shape)
    rhs = np.zeros(mesh.n_cells) if source is None else np.asarray(source, float).reshape(-1)
    if darcy_flux is not None:
        inflow = np.broadcast_to(np.asarray(inflow_temperature_k, float), mesh.shape)
        rhs = rhs + entering * inflow.reshape(-1)
    t = _solve_with_fixed(matrix, rhs, fixed_mask, fixed_values, symmetric=symmetric,
                          ndim=mesh.ndim, solver=solver)
    return t.reshape(mesh.shape)


def solve_sp(mesh, sigma, *, c_p=0.0, pressure=None, c_t=0.0, temperature=None,
             pressure_reference_pa=0.0, temperature_reference_k=0.0, form="source",
             solver="auto"):
    """
    Self-potential of given pressure and temperature fields.

    Solves ∇·(σ∇V) = ∇·(σC_P∇P + σC_T∇T) with no current through the ground
    surface and V = 0 on the far boundaries.

    Parameters
    ----------
    mesh : TensorMesh
    sigma : float or array
        Electrical conductivity σ (S/m).
    c_p : float or array
        Streaming-potential coefficient C_P = (ΔV/ΔP) at zero current (V/Pa),
        laboratory sign (negative for most rocks): j = −σ∇V + σC_P∇P + σC_T∇T.
    pressure : array or None
        Excess pressure P per cell (Pa).
    c_t : float or array
        Thermoelectric coefficient C_T = (ΔV/ΔT) at zero current (V/K).
    temperature : array or None
        Temperature per cell (K), on the same reference as
        ``temperature_reference_k``.
    pressure_reference_pa, temperature_reference_k : float
        P and T on the ground surface and the far boundaries (0 for the
        fields of :func:`solve_pressure` and :func:`solve_heat`).
    form : {"source", "jump"}
        "source": solve for V with face source currents σ_f·C̄_f·ΔP.
        "jump": solve for the total potential Φ = V − C_P·P − C_T·T with the
        face jumps [Φ] = −[C_P]·P̄ − [C_T]·T̄, then V = Φ + C_P·P + C_T·T.
        The two are algebraically equal; "jump" makes the invariance of V
        under P → P + const a non-trivial check.
    solver : str
        As in :func:`solve_pressure`.

    Returns
    -------
    potential : array, shape ``mesh.shape``
        V per cell (V).
    surface : array, shape ``mesh.shape[:-1]``
        V on the ground surface above each column of cells (V): the total
        potential Φ, whose normal derivative vanishes there, taken from the
        top cell (error O(h²)), plus C_P·P + C_T·T at the surface.

    Notes
    -----
    σ on faces is the series (harmonic) mean and C_P, C_T the arithmetic
    mean, see the module notes.

    References
    ----------
    * [RevilJardani2013]_
    """
    if form not in ("source", "jump"):
        raise ValueError(f"form must be 'source' or 'jump', not {form!r}")
    shape = mesh.shape
    n = mesh.n_cells
    interior, boundary = _faces(mesh, sigma)
    sides = _sides(mesh.ndim, top=False)
    matrix = _laplacian(n, interior, boundary, sides)
    fields = []
    if pressure is not None:
        fields.append((np.broadcast_to(np.asarray(c_p, float), shape).reshape(-1),
                       np.asarray(pressure, float).reshape(-1), float(pressure_reference_pa)))
    if temperature is not None:
        fields.append((np.broadcast_to(np.asarray(c_t, float), shape).reshape(-1),
                       np.asarray(temperature, float).reshape(-1), float(temperature_reference_k)))
    rhs = np.zeros(n)
    coupled = np.zeros(n)  # C_P·P + C_T·T per cell
    for c, f, f_ref in fields:
        coupled += c * f
        for i, j, t in interior:
            if form == "source":
                current = t * 0.5 * (c[i] + c[j]) * (f[i] - f[j])  # source current i -> j
            else:
                current = -t * (c[i] - c[j]) * 0.5 * (f[i] + f[j])
            np.add.at(rhs, i, current)
            np.add.at(rhs, j, -current)
        for side in sides:
            i, t = boundary[side]
            if form == "source":
                np.add.at(rhs, i, t * c[i] * (f[i] - f_ref))
            else:
                np.add.at(rhs, i, -t * c[i] * f_ref)
    solution = _solve(matrix, rhs, symmetric=True, ndim=mesh.ndim, solver=solver)
    if form == "source":
        potential = solution
    else:
        potential = solution + coupled
    potential = potential.reshape(shape)
    phi_top = (potential - coupled.reshape(shape))[..., 0]
    surface_coupled = 0.0
    for c, _, f_ref in fields:
        surface_coupled = surface_coupled + c.reshape(shape)[..., 0] * f_ref
    return potential, phi_top + surface_coupled


# --------------------------------------------------------------------------- model

@dataclass(frozen=True)
class FlowResult:
    """
    Solution of a primary-flow model.

    Fields in SI units on the cells of ``mesh`` except potentials in mV.
    ``pressure_pa`` and ``temperature_k`` are None when the model has no
    pressure or heat part. ``surface_mv`` is SP on the ground surface above
    the cell columns ((n_x,) in a section, (n_x, n_y) in 3-D). Station
    arrays are None without stations; ``residual_mv`` is observed minus
    predicted, ``offset_mv`` the mean residual (SP is measured against a
    reference electrode, so a constant offset is common practice to allow)
    and ``rms_mv``/``rms_offset_mv`` the RMS residual without/with it removed.
    """

    model: FlowModel
    mesh: TensorMesh
    region_index: np.ndarray
    pressure_pa: np.ndarray | None
    temperature_k: np.ndarray | None
    potential_mv: np.ndarray
    surface_mv: np.ndarray
    profile_x_m: np.ndarray
    profile_mv: np.ndarray
    station_x_m: np.ndarray | None = None
    observed_mv: np.ndarray | None = None
    predicted_mv: np.ndarray | None = None
    residual_mv: np.ndarray | None = None
    offset_mv: float | None = None
    rms_mv: float | None = None
    rms_offset_mv: float | None = None
    seconds: float = 0.0


def _properties(mesh, model):
    regions = (model.background,) + tuple(model.regions)
    index = assign_regions(mesh, model.regions)
    props = {}
    for name in ("sigma_s_m", "c_p_v_pa", "c_t_v_k", "mobility_m2_pa_s",
                 "thermal_conductivity_w_m_k"):
        values = np.array([float(getattr(r, name)) for r in regions])
        props[name] = values[index]
    return index, props


def _fixed(mesh, model, equation):
    items = [f for f in model.fixed if f.equation == equation]
    if not items:
        return None, 0.0
    mask = np.zeros(mesh.shape, dtype=bool)
    values = np.zeros(mesh.shape)
    for item in items:
        inside = _inside(mesh, item.shape)
        if not inside.any():
            raise InputError(model.source_path or "flow model",
                             f"fixed region '{item.name}' contains no cell centre.",
                             "Enlarge the region or use a smaller cell_m.")
        mask |= inside
        values[inside] = item.value
    return mask, values


def sample_surface_sp(result, x_m, *, y_m=None):
    """
    Interpolate the surface SP of a :class:`FlowResult` (mV) at positions.

    Parameters
    ----------
    result : FlowResult
    x_m : array
        Positions along x (m).
    y_m : float or array or None
        3-D only: positions along y (m); default the model's ``profile_y_m``.

    Returns
    -------
    sp : array
        Surface SP (mV), linear interpolation between cell columns.
    """
    x_m = np.asarray(x_m, dtype=float)
    centres = result.mesh.centres
    if result.mesh.ndim == 2:
        return np.interp(x_m, centres[0], result.surface_mv)
    from scipy.interpolate import RegularGridInterpolator

    y = result.model.profile_y_m if y_m is None else y_m
    y = np.broadcast_to(np.asarray(y, dtype=float), x_m.shape)
    interp = RegularGridInterpolator(centres[:2], result.surface_mv, bounds_error=False,
                                     fill_value=None)
    return interp(np.stack([x_m, y], axis=-1))


def run_flow_model(model, *, stations=None, solver="auto"):
    """
    Solve a primary-flow model and predict the surface SP.

    Parameters
    ----------
    model : FlowModel
        Mesh, regions, sources and fixed values (see
        ``geosp.io.flowmodel.read_flow_model``).
    stations : tuple of arrays or None
        ``(x_m, observed_mv)``: station positions along the profile (m) and
        observed SP (mV). With them the result holds the predicted SP, the
        residuals and the RMS misfit.
    solver : {"auto", "direct", "iterative"}
        As in :func:`solve_pressure`.

    Returns
    -------
    result : FlowResult

    Raises
    ------
    InputError
        If a source or fixed region contains no cell, or the model has no
        source and no fixed value (nothing would flow).

    Notes
    -----
    Pressure is solved when the model has a pressure source or fixed
    pressure, heat when it has a heat source or fixed temperature; with
    ``heat_advection`` heat moves with the Darcy flux of the pressure
    solution. Then V follows from :func:`solve_sp`.

    References
    ----------
    * [RevilJardani2013]_
    """
    start = time.perf_counter()
    where = model.source_path or "flow model"
    core = [model.core_x_m] + ([model.core_y_m] if model.ndim == 3 else [])
    mesh = make_mesh(core, model.depth_m, model.cell_m, padding_factor=model.padding_factor,
                     padding_m=model.padding_m)
    index, props = _properties(mesh, model)
    has = {eq: any(s.equation == eq for s in model.sources)
           or any(f.equation == eq for f in model.fixed) for eq in ("pressure", "heat")}
    if not (has["pressure"] or has["heat"]):
        raise InputError(where, "the model has no source and no fixed pressure or temperature.",
                         "Add a [[source]] or a [[fixed]] table.")
    pressure = temperature = None
    if has["pressure"]:
        sources = [s for s in model.sources if s.equation == "pressure"]
        mask, values = _fixed(mesh, model, "pressure")
        pressure = solve_pressure(mesh, props["mobility_m2_pa_s"],
                                  source=_source_vector(mesh, sources, where),
                                  fixed_mask=mask, fixed_values=values, solver=solver)
    if has["heat"]:
        sources = [s for s in model.sources if s.equation == "heat"]
        mask, values = _fixed(mesh, model, "heat")
        flux = None
        inflow = 0.0
        if model.heat_advection and pressure is not None:
            flux = compute_darcy_flux(mesh, props["mobility_m2_pa_s"], pressure)
            fluid = [s for s in model.sources if s.equation == "pressure"]
            rate = _source_vector(mesh, fluid, where)
            warm = _source_vector(mesh, [replace(s, strength=s.strength * s.fluid_temperature_k)
                                         for s in fluid], where)
            inflow = np.divide(warm, rate, out=np.zeros_like(rate), where=rate > 0)
            inflow = inflow.reshape(mesh.shape)
        temperature = solve_heat(mesh, props["thermal_conductivity_w_m_k"],
                                 source=_source_vector(mesh, sources, where), fixed_mask=mask,
                                 fixed_values=values, darcy_flux=flux, inflow_temperature_k=inflow,
                                 heat_capacity_j_m3_k=model.fluid_heat_capacity_j_m3_k,
                                 solver=solver)
    potential, surface = solve_sp(mesh, props["sigma_s_m"], c_p=props["c_p_v_pa"],
                                  pressure=pressure, c_t=props["c_t_v_k"],
                                  temperature=temperature, solver=solver)
    x0, x1 = model.profile_x_m or model.core_x_m
    step = model.profile_spacing_m or model.cell_m
    n = max(2, int(round((x1 - x0) / step)) + 1)
    profile_x = np.linspace(x0, x1, n)
    partial = FlowResult(model=model, mesh=mesh, region_index=index, pressure_pa=pressure,
                         temperature_k=temperature, potential_mv=1e3 * potential,
                         surface_mv=1e3 * surface, profile_x_m=profile_x,
                         profile_mv=np.empty(0))
    extra = {"profile_mv": sample_surface_sp(partial, profile_x)}
    if stations is not None:
        sx, observed = (np.asarray(a, dtype=float) for a in stations)
        predicted = sample_surface_sp(partial, sx)
        residual = observed - predicted
        offset = float(np.mean(residual)) if residual.size else 0.0
        extra.update(station_x_m=sx, observed_mv=observed, predicted_mv=predicted,
                     residual_mv=residual, offset_mv=offset,
                     rms_mv=float(np.sqrt(np.mean(residual**2))) if residual.size else 0.0,
                     rms_offset_mv=float(np.sqrt(np.mean((residual - offset) ** 2)))
                     if residual.size else 0.0)
    return replace(partial, seconds=time.perf_counter() - start, **extra)
