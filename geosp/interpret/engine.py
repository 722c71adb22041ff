"""
One model of the whole survey: sources are selected one at a time where the
joint likelihood gains most, against a false-alarm threshold calibrated on
the fitted noise model, and fitted together with the regional, the terrain
coefficient and each other.

The model (docs/concepts.md, the survey model):

    V = c + regional(x, y) + k·(elevation − e₀) + Σ sources + noise,

noise covariance = the reduction's network covariance + white station noise
+ a short-range correlated part (:mod:`geosp.interpret.noise`). All fits are
generalised least squares: data and columns are whitened by the Cholesky
factor of that covariance.

Selection. Every candidate window along the faults
(:mod:`geosp.interpret.candidates`) is scored with its templates against
the whitened residual of the current model (matched filter, each score
N(0, 1) under the noise model). The null distribution of the largest score
over the whole survey comes from a parametric bootstrap of the noise model
in whitened space (independent unit normals projected like the data), so it
never reuses the data's own anomalies. While the best window's score exceeds
the null's (1 − false_alarm_rate) quantile, a fault patch is fitted there
(several starts across depth families and both dip directions, interacting
sources re-fitted with it), a shallow pole, pole pair and buried line
(pipeline, cable) compete for the same anomaly, and the winner is kept if
its likelihood gain also clears the threshold. The noise model is then re-estimated from the residuals and the
selection checked again, until it is stable.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from ..sources.buried_line import BuriedLine
from ..sources.fault_patch import MIN_DIP_DEG, FaultPatch
from ..sources.pole_pair import PolePair
from . import candidates as cand
from .linear import TERRAIN, Frame, Projector, match_scores, nuisance_columns, solve
from .noise import NoiseModel, Whitener, estimate_noise

log = logging.getLogger(__name__)

#: Outer rounds of (select, re-estimate noise).
MAX_ROUNDS = 4
#: Δχ² by which a pole or pole pair must beat a fault patch to take an anomaly
#: (as a ΔBIC, strong evidence on the Kass & Raftery scale [Kass1995]_, from memory).
CULTURAL_DELTA = 6.0
#: Local refinements per new source (from the best distinct starts).
N_LOCAL = 5
#: A source interacts with another when their windows come this close,
#: in multiples of the larger top depth plus the corridor.
INTERACTION_FACTOR = 1.0


@dataclass
class Source:
    """A source of the current model: its model object, parameters and field."""

    model: object  # FaultPatch or PolePair
    p: np.ndarray
    window: cand.Window
    kind: str  # "fault" or "cultural"
    window_index: int = -1
    column: np.ndarray = None  # unit field at the valid stations
    score: float = np.nan  # matched-filter score when accepted
    p_value: float = np.nan
    gain: float = np.nan  # Δχ² when accepted
    template: dict = field(default_factory=dict)

    def refresh(self):
        self.column = np.asarray(self.model.field(self.p), dtype=float)


@dataclass
class Selection:
    """What the selection leaves for the rest of the pipeline."""

    sources: list
    noise: NoiseModel
    coef: np.ndarray  # nuisance coefficients then source strengths
    covariance: np.ndarray  # of coef (linear part, geometry fixed)
    chi2: float
    n: int
    valid_index: np.ndarray
    frame: Frame
    windows: list
    window_scores: np.ndarray  # final |score| per window
    window_signs: np.ndarray
    window_best: list  # best template per window
    window_p: np.ndarray  # survey-wide false-alarm probability of each window's final score
    threshold: float
    null_max: np.ndarray
    model_mv: np.ndarray  # at the valid stations: nuisance (no terrain) + sources
    terrain_mv: np.ndarray  # k̂ (e − e₀) at the valid stations
    data: np.ndarray
    history: list
    segments: tuple = ()
    terrain: bool = True  # the terrain coefficient is a parameter of the model
    nuisance: np.ndarray = None  # the nuisance design at the valid stations
    weight: np.ndarray = None  # station weights used

    def whitener(self, easting, northing, network=None):
        """
        The final noise model's whitener at the valid stations (one
        Cholesky factorisation; not kept, it is as large as the covariance).
        ``easting``, ``northing`` are those of the valid stations; ``network``
        the reduction's network covariance (or None).
        """
        net = network.block(self.valid_index) if network is not None else None
        return Whitener(self.noise.covariance(easting, northing, self.weight, net))


class _Survey:
    """The valid stations as arrays, the nuisance design and the network block."""

    def __init__(self, stations, network, *, terrain):
        sp = np.asarray(stations.sp_mv, float) + np.asarray(stations.terrain_mv, float)
        weight = np.asarray(stations.weight, float)
        ok = np.isfinite(sp) & np.isfinite(stations.easting) & np.isfinite(stations.northing) \
            & (weight > 0)
        self.index = np.flatnonzero(ok)
        self.x = np.asarray(stations.easting, float)[ok]
        self.y = np.asarray(stations.northing, float)[ok]
        elev = np.asarray(stations.upward, float)[ok]
        self.has_elevation = bool(np.isfinite(elev).any())
        fill = float(np.nanmedian(elev)) if self.has_elevation else 0.0
        self.elev = np.where(np.isfinite(elev), elev, fill)
        self.d = sp[ok]
        self.w = np.clip(weight[ok], 1e-3, 1.0)
        self.n = self.index.size
        self.frame = Frame.of(self.x, self.y, self.elev)
        self.terrain = bool(terrain) and self.has_elevation
        self.B = nuisance_columns(self.x, self.y, self.elev, self.frame, terrain=self.terrain)
        self.network = network.block(self.index) if network is not None else None
        from scipy.spatial import cKDTree

        tree = cKDTree(np.column_stack([self.x, self.y]))
        dist, _ = tree.query(np.column_stack([self.x, self.y]), k=2)
        near = dist[:, 1][dist[:, 1] > 0]
        self.spacing = float(np.median(near)) if near.size else 25.0
        self.tree = tree
        self.line_spacing = _line_spacing(self.x, self.y, self.spacing)


def _first_noise(survey):
    coef, *_ = np.linalg.lstsq(survey.B, survey.d, rcond=None)
    return estimate_noise(survey.x, survey.y, survey.d - survey.B @ coef, survey.w,
                          spacing=survey.spacing, line_spacing=survey.line_spacing,
                          network=survey.network)


def _neighbour_sd(survey):
    """Robust sd of a station's value about its nearest neighbour's, over √2 (mV)."""
    _, nearest = survey.tree.query(np.column_stack([survey.x, survey.y]), k=2)
    diff = (survey.d - survey.d[nearest[:, 1]]) / math.sqrt(2.0)
    if survey.network is not None:
        var_net = np.diag(survey.network)
        diff = diff / np.sqrt(1.0 + var_net / max(float(np.median(diff**2)), 1e-6))
    return max(1.4826 * float(np.median(np.abs(diff - np.median(diff)))), 0.5)


def _line_spacing(x, y, spacing):
    """Hull area per station over the station spacing (m): the line spacing of a line survey."""
    from scipy.spatial import ConvexHull, QhullError

    try:
        area = ConvexHull(np.column_stack([x, y])).volume
    except (QhullError, ValueError):
        return 4.0 * spacing
    return float(np.clip(area / x.size / spacing, spacing, 50.0 * spacing))


class _State:
    """Whitened arrays of the current noise model."""

    def __init__(self, survey, noise, columns):
        cov = noise.covariance(survey.x, survey.y, survey.w, survey.network)
        self.white = Whitener(cov)
        self.dw = self.white(survey.d)
        self.Bw = self.white(survey.B)
        self.Gw = self.white(columns) if columns.shape[1] else columns
        self.g_norm2 = np.sum(self.Gw**2, axis=0)
        self.noise = noise


def _datum(survey, frame, spacing):
    """Median elevation of the stations within two spacings (≥ 50 m) of a frame's trace."""
    if not survey.terrain:
        return math.nan, np.zeros(survey.n)
    along, across = frame.to_local(survey.x, survey.y)
    near = (np.abs(across) <= max(2.0 * spacing, 50.0)) & (along >= 0) & (along <= frame.length_m)
    ground = float(np.median(survey.elev[near])) if near.any() else float(np.median(survey.elev))
    return ground, survey.elev - ground


def select_sources(stations, segments, *, network=None, false_alarm_rate=0.05, n_null=1000,
                   template_top_depths_m=(50.0, 100.0, 200.0, 400.0, 800.0),
                   template_height_ratios=(3.0,), template_sigma_ratios=(0.25, 4.0),
                   n_starts=32, terrain=True, cultural=True, max_sources=40, seed=0, workers=1,
                   scheduler=None, progress=None):
    """
    Select and fit the sources of a survey (see the module notes).

    Parameters
    ----------
    stations : Stations
        Reduced stations; ``sp_mv + terrain_mv`` is modelled (the terrain
        coefficient is estimated here, with the sources present).
    segments : sequence of FaultSegment
    network : NetworkCovariance or None
        The reduction's network covariance (gradient surveys).
    false_alarm_rate : float
        Probability that a survey with no source anywhere gets one: the
        quantile of the bootstrap null of the survey's largest score.
    n_null : int
        Bootstrap draws of the null.
    template_top_depths_m, template_height_ratios, template_sigma_ratios
        The template family of every window.
    n_starts : int
        Quasi-random starts scored for every new source (besides the depth
        family starts).
    terrain : bool
        Estimate the SP-elevation coefficient in the model.
    cultural : bool
        Let a shallow pole or pole pair compete for every anomaly.
    max_sources : int
        Most sources in one survey.
    seed : int
    workers, scheduler
        Where the fits from several starts run (see
        :func:`geosp.parallel.map_segments`).
    progress : callable or None
        Called as ``progress(step, total, note)`` at each milestone (``total``
        None until the last call, where it equals ``step``).

    Returns
    -------
    Selection
    """
    rng = np.random.default_rng(seed)
    survey = _Survey(stations, network, terrain=terrain)
    if survey.n < 20:
        raise ValueError(f"only {survey.n} usable stations")
    depths = np.asarray(template_top_depths_m, float)
    corridor = float(np.clip(2.0 * np.max(depths), 2.0 * survey.line_spacing, 6.0 * survey.line_spacing))
    windows, _ = cand.make_windows(segments, survey.x, survey.y, corridor_m=corridor)
    templates, columns, owner_of_column, offsets = [], [], [], []
    for j, window in enumerate(windows):
        ground, offset = _datum(survey, window.frame, survey.spacing)
        offsets.append((ground, offset))
        family = cand.templates_for(window, depths, template_height_ratios, template_sigma_ratios)
        templates.append(family)
        columns.append(cand.template_columns(window, family, survey.x, survey.y, offset))
        owner_of_column += [j] * len(family)
    columns = np.hstack(columns) if columns else np.zeros((survey.n, 0))
    owner_of_column = np.asarray(owner_of_column, dtype=int)
    centres = [cand.point_at(np.asarray(w.frame.coords, float), 0.5 * w.frame.length_m) for w in windows]
    context = _Context(survey, windows, templates, offsets, columns, owner_of_column, corridor,
                       depths, rng, n_starts, cultural, false_alarm_rate, n_null, workers, scheduler)

    # First noise model: from the residual of the nuisances alone, which still
    # holds the sources (so it errs toward more correlated noise, and fewer
    # detections); later rounds fit the residuals of the model with its
    # sources, find more, and drop what no longer passes.
    steps = [0]

    def report(note, *, last=False):
        """Progress: a step count with what is happening (the total is known only at the end)."""
        if progress is not None:
            steps[0] += 1
            progress(steps[0], steps[0] if last else None, note)

    noise = _first_noise(survey)
    report("first noise model fitted")
    sources, history = [], []
    for round_ in range(MAX_ROUNDS):
        state = _State(survey, noise, columns)
        null = _null(context, state, sources)
        report(f"round {round_ + 1}: threshold {null['threshold']:.2f}, {len(sources)} sources")
        history.append(f"round {round_ + 1}: noise {noise.describe()}; threshold {null['threshold']:.2f}")
        sources = _validate(context, state, sources, null["threshold"], history)
        rejected = set()
        while len(sources) < max_sources:
            taken = {s.window_index for s in sources}
            scan = _scan(context, state, sources, null, exclude=rejected | taken | _covered(windows, centres, sources))
            if scan["best"] is None or scan["p"] > false_alarm_rate:
                break
            new, outcome = _try_source(context, state, sources, scan, null["threshold"])
            history.append(outcome)
            if new is None:
                rejected.add(scan["best"])
                continue
            sources = sources + [new]
            report(f"round {round_ + 1}: {len(sources)} sources")
        residual = _residual(survey, state, sources)
        updated = estimate_noise(survey.x, survey.y, residual, survey.w, spacing=survey.spacing,
                                 line_spacing=survey.line_spacing, network=survey.network)
        stable = _close(updated, noise)
        noise = updated
        if stable:
            break
    state = _State(survey, noise, columns)
    null = _null(context, state, sources)
    sources = _validate(context, state, sources, null["threshold"], history)
    _refine_all(context, state, sources)
    report(f"{len(sources)} sources", last=True)
    final = _scan(context, state, sources, null, exclude=set())
    design = np.hstack([state.Bw] + [state.white(s.column)[:, None] for s in sources])
    coef, cov, chi2 = solve(design, state.dw)
    n_b = survey.B.shape[1]
    terrain_coef = coef[TERRAIN] if survey.terrain else 0.0
    terrain_mv = terrain_coef * (survey.elev - survey.frame.elev0) if survey.terrain else np.zeros(survey.n)
    regional = survey.B.copy()
    regional[:, TERRAIN] = 0.0
    model = regional @ coef[:n_b] + sum(coef[n_b + i] * s.column for i, s in enumerate(sources))
    return Selection(
        sources=sources, noise=noise, coef=coef, covariance=cov, chi2=chi2, n=survey.n,
        valid_index=survey.index, frame=survey.frame, windows=windows,
        window_scores=final["scores"], window_signs=final["signs"],
        window_best=[templates[j][final["template"][j]] for j in range(len(windows))],
        window_p=final["p_each"], threshold=null["threshold"], null_max=null["max"],
        model_mv=np.asarray(model, float), terrain_mv=terrain_mv, data=survey.d, history=history,
        segments=tuple(segments), terrain=survey.terrain, nuisance=survey.B,
        weight=survey.w)


@dataclass
class _Context:
    """What every step of one selection shares."""

    survey: _Survey
    windows: list
    templates: list
    offsets: list
    columns: np.ndarray
    owner_of_column: np.ndarray
    corridor: float
    depths: np.ndarray
    rng: np.random.Generator
    n_starts: int
    cultural: bool
    false_alarm_rate: float
    n_null: int
    workers: object = 1
    scheduler: object = None


def _covered(windows, centres, sources):
    """Windows on the fault of an accepted fault source whose centre lies along that source."""
    out = set()
    for s in sources:
        if s.kind != "fault":
            continue
        q = s.model.natural(s.p)
        frame = s.model.frame
        for j, (w, c) in enumerate(zip(windows, centres)):
            if w.frame.fault_id != frame.fault_id:
                continue
            along, across = frame.to_local(c[0], c[1])
            if abs(along - q["centre"]) <= 0.5 * q["length"] and abs(across) <= 0.25 * q["length"]:
                out.add(j)
    return out


def _close(a, b):
    def rel(u, v):
        return abs(u - v) / max(abs(v), 0.5)

    return (rel(a.white_sd_mv, b.white_sd_mv) < 0.1 and rel(a.correlated_sd_mv, b.correlated_sd_mv) < 0.2
            and rel(a.correlation_length_m, b.correlation_length_m) < 0.3)


# --------------------------------------------------------------------------- scoring


def _fixed_projector(state, sources, skip=()):
    cols = [state.Bw] + [state.white(s.column)[:, None] for i, s in enumerate(sources) if i not in skip]
    return Projector(np.hstack(cols))


def _window_starts(owner_of_column):
    return np.flatnonzero(np.r_[True, np.diff(owner_of_column) != 0])


def _null(context, state, sources):
    """
    Bootstrap null of the survey's largest window score: unit normals (the
    whitened noise) projected like the data, scored with every template.
    Computed once per noise model (one more source barely changes it).
    """
    out = {"threshold": np.inf, "max": np.zeros(0), "gp": None}
    if context.owner_of_column.size == 0:
        return out
    project = _fixed_projector(state, sources)
    starts = _window_starts(context.owner_of_column)
    null = np.zeros((context.owner_of_column.max() + 1, context.n_null))
    for a in range(0, context.n_null, 250):
        b = min(a + 250, context.n_null)
        draws = context.rng.standard_normal((context.survey.n, b - a))
        z, _ = match_scores(state.Gw, draws, project, state.g_norm2)
        null[:, a:b] = np.maximum.reduceat(np.abs(z), starts, axis=0)
    survey_max = null.max(axis=0)
    out.update(threshold=float(np.quantile(survey_max, 1.0 - context.false_alarm_rate)), max=survey_max)
    return out


def _scan(context, state, sources, null, *, exclude):
    """Scores of every window against the current residual; p from the round's null."""
    n_windows = len(context.windows)
    out = {"best": None, "p": 1.0, "scores": np.zeros(n_windows), "signs": np.zeros(n_windows),
           "template": np.zeros(n_windows, dtype=int), "p_each": np.ones(n_windows)}
    if n_windows == 0:
        return out
    project = _fixed_projector(state, sources)
    z, _ = match_scores(state.Gw, state.dw, project, state.g_norm2)
    starts = _window_starts(context.owner_of_column)
    ends = np.r_[starts[1:], z.size]
    absz = np.abs(z)
    for j, (a, b) in enumerate(zip(starts, ends)):
        k = a + int(np.argmax(absz[a:b]))
        out["template"][j] = k - a
        out["scores"][j] = absz[k]
        out["signs"][j] = np.sign(z[k])
    survey_max = null["max"]
    out["p_each"] = (1.0 + np.sum(survey_max[None, :] >= out["scores"][:, None], axis=1)) / (1.0 + survey_max.size)
    allowed = np.array([j not in exclude for j in range(n_windows)])
    if allowed.any():
        j = int(np.flatnonzero(allowed)[np.argmax(out["scores"][allowed])])
        out["best"], out["p"] = j, float(out["p_each"][j])
    return out


def _residual(survey, state, sources):
    """Data minus the GLS model (all sources and nuisances), unwhitened (mV)."""
    coef = _strengths(state, sources)
    cols = np.column_stack([survey.B] + [s.column for s in sources]) if sources else survey.B
    return survey.d - cols @ coef


def _strengths(state, sources):
    """GLS coefficients of the nuisances then every source's strength."""
    design = np.column_stack([state.Bw] + [state.white(s.column) for s in sources]) if sources else state.Bw
    coef, *_ = solve(design, state.dw)
    return coef


# --------------------------------------------------------------------------- local problems


class _Local:
    """
    The stations near some windows, with everything else of the current model
    taken off: the other sources at their current strengths, the survey-wide
    regional and terrain term. A constant and a plane stay free (they absorb
    what the rest of the survey leaves locally); the noise is the noise
    model's exact marginal covariance of these stations.
    """

    def __init__(self, context, state, sources, frames, skip):
        survey = context.survey
        points = np.vstack([np.asarray(f.coords, float) for f in frames])
        radius = context.corridor + 0.5 * max(f.length_m for f in frames)
        from shapely.geometry import LineString, MultiLineString, Point  # noqa: F401
        import shapely

        lines = shapely.multilinestrings([shapely.linestrings(np.asarray(f.coords, float)) for f in frames])
        dist = shapely.distance(shapely.points(survey.x, survey.y), lines)
        self.index = np.flatnonzero(dist <= context.corridor)
        if self.index.size < 30:
            self.index = np.argsort(dist)[:30]
        del points, radius
        idx = self.index
        coef = _strengths(state, sources)
        n_b = survey.B.shape[1]
        background = survey.B[idx] @ coef[:n_b]
        for i, s in enumerate(sources):
            if i not in skip:
                background = background + coef[n_b + i] * s.column[idx]
        net = survey.network[np.ix_(idx, idx)] if survey.network is not None else None
        self.white = Whitener(state.noise.covariance(survey.x[idx], survey.y[idx], survey.w[idx], net))
        x = (survey.x[idx] - survey.x[idx].mean()) / 1000.0
        y = (survey.y[idx] - survey.y[idx].mean()) / 1000.0
        self.project = Projector(self.white(np.column_stack([np.ones_like(x), x, y])))
        self.target = self.project(self.white(survey.d[idx] - background))
        self.n = idx.size

    def columns(self, models, ps):
        return self.project(self.white(np.column_stack([m.field(p) for m, p in zip(models, ps)])))


def _whitened_residual(local, models, ps):
    a = local.columns(models, ps)
    x, *_ = np.linalg.lstsq(a, local.target, rcond=None)
    return local.target - a @ x, x, a


def _fit_group(local, models, starts, *, max_nfev=100):
    """
    Variable projection over the nonlinear parameters of ``models`` (one
    start each), the strengths and the local plane solved for each
    evaluation; Kaufman's Jacobian [Golub1973]_, [Kaufman1975]_. Returns
    (ps, chi2, strengths).

    Each evaluation computes the fields and their derivatives together and
    whitens them in one triangular solve: the solve reads the whole factor
    whatever the number of columns, so the Jacobian the optimiser asks for
    next at the same point comes at no extra whitening cost.
    """
    sizes = [m.k for m in models]
    cuts = np.cumsum([0] + sizes)
    lower = np.concatenate([m.lower for m in models])
    upper = np.concatenate([m.upper for m in models])
    span = upper - lower
    x0 = np.clip(np.concatenate(starts), lower + 1e-6 * span, upper - 1e-6 * span)
    n_models = len(models)

    def split(theta):
        return [theta[cuts[i]:cuts[i + 1]] for i in range(n_models)]

    cache = {}

    def evaluate(theta):
        fields, jacs = zip(*(m.jacobian(p) for m, p in zip(models, split(theta))))
        both = local.project(local.white(np.column_stack(fields + jacs)))
        a, dj = both[:, :n_models], both[:, n_models:]
        x, *_ = np.linalg.lstsq(a, local.target, rcond=None)
        cache.update(theta=theta.copy(), r=local.target - a @ x, x=x, a=a, dj=dj)

    def residual(theta):
        if "theta" not in cache or not np.array_equal(cache["theta"], theta):
            evaluate(theta)
        return cache["r"]

    def jacobian(theta):
        if "theta" not in cache or not np.array_equal(cache["theta"], theta):
            evaluate(theta)
        x, a, dj = cache["x"], cache["a"], cache["dj"]
        q, _ = np.linalg.qr(a)
        dj = dj * np.repeat(x, sizes)
        return -(dj - q @ (q.T @ dj))

    try:
        sol = optimize.least_squares(residual, x0, jac=jacobian, bounds=(lower, upper), x_scale="jac",
                                     max_nfev=max_nfev, ftol=1e-6, xtol=1e-6, gtol=1e-8)
        theta = sol.x
    except (ValueError, np.linalg.LinAlgError):
        theta = x0
    r, x, _ = _whitened_residual(local, models, split(theta))
    return split(theta), float(r @ r), x


def _rank_starts(local, target, model, starts, keep):
    """The ``keep`` best distinct starts by the χ² gain of the model alone on ``target``."""
    cols = local.columns([model] * len(starts), starts)
    norm2 = np.sum(cols * cols, axis=0)
    gain = np.where(norm2 > 0, (cols.T @ target) ** 2 / np.where(norm2 > 0, norm2, 1.0), 0.0)
    chosen = []
    span = model.upper - model.lower
    for i in np.argsort(-gain):
        if all(np.max(np.abs(starts[i] - starts[c]) / span) > 0.05 for c in chosen):
            chosen.append(i)
        if len(chosen) >= keep:
            break
    return [starts[i] for i in chosen]


# --------------------------------------------------------------------------- new sources


def _fault_model(context, window, offset_info):
    survey = context.survey
    frame = window.frame
    ground, offset = offset_info
    along, across = frame.to_local(survey.x, survey.y)
    length = frame.length_m
    z_min = max(10.0, 0.5 * survey.spacing)
    z_max = max(min(2000.0, 2.0 * context.corridor), 4.0 * z_min)
    dip_hi = 90.0 if (frame.dip_known and np.isfinite(frame.dip_deg)) else 180.0 - MIN_DIP_DEG
    bounds = {"centre": (-0.5 * length, 1.5 * length),
              "length": (max(3.0 * survey.spacing, 100.0), max(3.0 * length, 3000.0)),
              "top": (z_min, z_max), "height": (z_min, 5000.0), "dip": (MIN_DIP_DEG, dip_hi)}
    return bounds, along, across, offset, ground


def _interacting(context, window, sources):
    """Indices of current sources whose windows come within a corridor of this one."""
    from shapely.geometry import LineString

    a = LineString(np.asarray(window.frame.coords, float))
    return [i for i, s in enumerate(sources)
            if a.distance(LineString(np.asarray(s.window.frame.coords, float)))
            <= INTERACTION_FACTOR * context.corridor]


def _starts(model, best_template, length, depths, rng, n_starts):
    """Depth-family starts (both dip senses when unknown), the template's own, and Sobol points."""
    from scipy.stats import qmc

    centre = 0.5 * length
    z_t, z_b, dip, ratio = best_template
    out = [model.pack(centre, length, z_t, z_b, dip, ratio)]
    dips = [dip, 90.0] if model.upper[4] <= 90.0 else [60.0, 90.0, 120.0]
    for z in depths:
        for d in dips:
            for r in (2.0, 5.0):
                out.append(model.pack(centre, length, z, z * r, d, ratio))
    if n_starts > 0:
        sobol = qmc.Sobol(model.k, scramble=True, seed=rng).random(n_starts)
        out += list(model.lower + sobol * (model.upper - model.lower))
    return out


def _try_source(context, state, sources, scan, threshold):
    """
    Fit a fault patch (and cultural rivals) at the scan's best window with
    the interacting sources re-fitted; return (Source, note) when its gain
    clears the threshold, else (None, note).
    """
    j = scan["best"]
    window = context.windows[j]
    best_template = context.templates[j][scan["template"][j]]
    bounds, along, across, offset, ground = _fault_model(context, window, context.offsets[j])
    depths = [d for d in context.depths if bounds["top"][0] <= d <= bounds["top"][1]]
    model = FaultPatch(window.frame, along, across, offset, ground, bounds,
                       fit_ratio=best_template[3] != 1.0)
    near = _interacting(context, window, sources)
    local = _Local(context, state, sources, [window.frame] + [sources[i].window.frame for i in near],
                   skip=set(near))
    idx = local.index
    base_models = [sources[i].model.subset(idx) for i in near]
    base_ps = [sources[i].p for i in near]
    if near:
        base_ps, base_chi2, _ = _fit_group(local, base_models, base_ps, max_nfev=40)
        base_residual, _, _ = _whitened_residual(local, base_models, base_ps)
    else:
        base_chi2 = float(local.target @ local.target)
        base_residual = local.target
    sub = model.subset(idx)
    starts = _starts(model, best_template, window.frame.length_m, depths, context.rng, context.n_starts)
    jobs = [(local, base_models + [sub], base_ps + [start])
            for start in _rank_starts(local, base_residual, sub, starts, N_LOCAL)]
    rival_jobs = _cultural_jobs(context, local, base_residual, window, base_models, base_ps) \
        if context.cultural else []
    fitted = _fit_all(context, jobs + [job for _, job in rival_jobs])
    best = min(fitted[:len(jobs)], key=lambda f: f[1])
    gain = base_chi2 - best[1]
    kind, chosen_model, chosen = "fault", model, best
    note = (f"window {window.frame.segment_id}: score {scan['scores'][j]:.1f} (p {scan['p']:.3g}), "
            f"patch gain {gain:.1f}")
    if rival_jobs:
        rival, rival_best = _best_rival(context, rival_jobs, fitted[len(jobs):])
        if rival_best is not None:
            rival_gain = base_chi2 - rival_best[1]
            note += f", {rival.label} gain {rival_gain:.1f}"
            # The burden of proof is on the cultural rival: sources on mapped
            # faults are what the survey is for, so the rival must fit clearly
            # better, whatever its number of parameters.
            if rival_gain > gain + CULTURAL_DELTA:
                kind, chosen_model, chosen, gain = "cultural", rival, rival_best, rival_gain
    if gain < threshold**2:
        return None, note + f" < threshold {threshold**2:.1f}: rejected"
    ps = chosen[0]
    for i, p in zip(near, ps[:-1]):
        sources[i].p = p
        sources[i].refresh()
    new = Source(chosen_model, ps[-1], window, kind, window_index=j, score=float(scan["scores"][j]),
                 p_value=float(scan["p"]), gain=float(gain),
                 template=dict(zip(("depth_top_m", "depth_bottom_m", "dip_deg", "sigma_ratio"),
                                   best_template)))
    new.refresh()
    return new, note + f": accepted as {kind}"


def _fit_job(job):
    """One local fit (a work item for any executor)."""
    local, models, starts = job
    return _fit_group(local, models, starts)


def _fit_all(context, jobs):
    """Local fits of several (local, models, starts) jobs, in order, over the run's executor."""
    from ..parallel import map_segments

    workers = context.workers if len(jobs) > 1 else 1
    return map_segments(_fit_job, jobs, workers=workers, scheduler=context.scheduler)


def _cultural_jobs(context, local, base_residual, window, base_models, base_ps):
    """
    Fits of a single shallow pole, a shallow pole pair and a buried line
    near the window, from the best starts at the residual's extremes:
    [(model, job), ...].
    """
    survey = context.survey
    frame = window.frame
    along, across = frame.to_local(survey.x, survey.y)
    half = min(context.corridor, 0.5 * frame.length_m + 200.0)
    box = (-0.25 * frame.length_m, 1.25 * frame.length_m, -half, half)
    la, lc = along[local.index], across[local.index]
    inside = np.flatnonzero((la > box[0]) & (la < box[1]) & (lc > box[2]) & (lc < box[3]))
    if inside.size < 8:
        return []
    resid = local.white.colour(base_residual)
    hi = inside[np.argsort(resid[inside])[-3:]]
    lo = inside[np.argsort(resid[inside])[:3]]
    out = []
    for single in (True, False):
        model = PolePair(frame, along, across, box, single=single,
                         min_depth_m=max(5.0, 0.5 * survey.spacing))
        sub = model.subset(local.index)
        starts = []
        if single:
            for a in np.concatenate([hi, lo]):
                for z in (10.0, 40.0, 100.0):
                    for length in (300.0, 1500.0):
                        starts.append(np.clip([la[a], lc[a], math.log(z), math.log(length)],
                                              model.lower, model.upper))
        else:
            for a in hi:
                for b in lo:
                    for z in (5.0, 15.0, 40.0):
                        starts.append(np.clip([la[a], lc[a], math.log(z), la[b] - la[a], lc[b] - lc[a],
                                               math.log(z)], model.lower, model.upper))
        for start in _rank_starts(local, base_residual, sub, starts, 2):
            out.append((model, (local, base_models + [sub], base_ps + [start])))
    model = BuriedLine(frame, along, across, box, min_depth_m=max(2.0, 0.1 * survey.spacing),
                       min_length_m=max(3.0 * survey.spacing, 100.0))
    sub = model.subset(local.index)
    starts = []
    for extreme in (hi, lo):
        directions = _line_directions(la[extreme], lc[extreme])
        for a in extreme:
            for direction in directions:
                for z in (3.0, 15.0):
                    for length in (1000.0, 5000.0):
                        starts.append(np.clip([la[a], lc[a], direction, math.log(length), math.log(z)],
                                              model.lower, model.upper))
    for start in _rank_starts(local, base_residual, sub, starts, 2):
        out.append((model, (local, base_models + [sub], base_ps + [start])))
    return out


def _line_directions(s, t):
    """
    Start directions of a buried line (degrees from the frame's strike, in
    [−90°, 90°)): every 30°, and the principal axis of the residual's
    extreme stations, which a line of infrastructure strings out.
    """
    out = [-90.0, -60.0, -30.0, 0.0, 30.0, 60.0]
    if s.size >= 2 and np.ptp(s) + np.ptp(t) > 0:
        cov = np.cov(np.vstack([s, t]))
        _, v = np.linalg.eigh(cov)
        axis = math.degrees(math.atan2(v[1, -1], v[0, -1]))
        out.append((axis + 90.0) % 180.0 - 90.0)
    return out


def _best_rival(context, rival_jobs, fitted):
    """The better of the cultural fits by BIC, as (model, (ps, chi2, x)), or (None, None)."""
    best = (None, None)
    log_n = math.log(context.survey.n)
    for (model, _), fit in zip(rival_jobs, fitted):
        if best[0] is None or fit[1] + model.k * log_n < best[1][1] + best[0].k * log_n:
            best = (model, fit)
    return best


# --------------------------------------------------------------------------- pruning, refining


def _validate(context, state, sources, threshold, history):
    """Drop, one at a time, sources whose own gain (the rest re-solved) no longer clears the threshold."""
    kept = list(sources)
    while kept:
        full = _fixed_projector(state, kept)
        chi2_full = float(np.sum(full(state.dw) ** 2))
        gains = [float(np.sum(_fixed_projector(state, kept, skip={i})(state.dw) ** 2)) - chi2_full
                 for i in range(len(kept))]
        worst = int(np.argmin(gains))
        if gains[worst] >= threshold**2:
            break
        history.append(f"dropped {kept[worst].window.frame.segment_id} ({kept[worst].kind}): "
                       f"gain {gains[worst]:.1f} < {threshold**2:.1f} with the noise model now")
        kept.pop(worst)
    return kept


def _refine_all(context, state, sources, sweeps=1):
    """Re-fit every source's geometry on its own stations, the rest of the model fixed."""
    for _ in range(sweeps):
        for i, s in enumerate(sources):
            local = _Local(context, state, sources, [s.window.frame], skip={i})
            ps, _, _ = _fit_group(local, [s.model.subset(local.index)], [s.p], max_nfev=60)
            s.p = ps[0]
            s.refresh()
