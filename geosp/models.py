"""
Small frozen dataclasses passed between the pipeline steps.

They hold numpy arrays and the CRS, never file handles. Every step takes
objects from here and returns new ones; nothing here does I/O.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np


def _array(values, dtype=float):
    return np.asarray(values, dtype=dtype)


@dataclass(frozen=True)
class Stations:
    """
    SP stations in the working CRS.

    ``sp_mv`` is the current best total-field value (raw on input, reduced
    after ``reduce``). The correction arrays hold what was removed, so that
    ``sp_mv = sp_raw_mv - drift_mv - tie_mv - terrain_mv`` (each in mV; a
    correction is what was subtracted). ``flag`` is empty, or says why a
    station was down-weighted; ``weight`` multiplies 1/sigma**2 in fits.
    """

    station_id: np.ndarray  # (n,) str
    easting: np.ndarray  # (n,) m
    northing: np.ndarray  # (n,) m
    upward: np.ndarray  # (n,) m, elevation; NaN where unknown
    sp_mv: np.ndarray  # (n,) mV; NaN where the value comes from readings not yet reduced
    crs: str
    line_id: np.ndarray | None = None  # (n,) str, "" where unknown
    time: np.ndarray | None = None  # (n,) datetime64[s] or NaT
    sigma_mv: np.ndarray | None = None  # (n,) 1-sigma uncertainty of sp_mv
    sp_raw_mv: np.ndarray | None = None
    drift_mv: np.ndarray | None = None
    tie_mv: np.ndarray | None = None
    terrain_mv: np.ndarray | None = None
    flag: np.ndarray | None = None  # (n,) str
    weight: np.ndarray | None = None  # (n,) in [0, 1]
    source_row: np.ndarray | None = None  # (n,) row or feature number in the input, for messages

    def __post_init__(self):
        n = len(self.station_id)
        set_ = object.__setattr__
        set_(self, "station_id", _array(self.station_id, str).astype(object))
        for name in ("easting", "northing", "upward", "sp_mv"):
            set_(self, name, _array(getattr(self, name)))
        defaults = {
            "line_id": lambda: np.full(n, "", dtype=object),
            "time": lambda: np.full(n, np.datetime64("NaT"), dtype="datetime64[s]"),
            "sigma_mv": lambda: np.full(n, np.nan),
            "sp_raw_mv": lambda: self.sp_mv.copy(),
            "drift_mv": lambda: np.zeros(n),
            "tie_mv": lambda: np.zeros(n),
            "terrain_mv": lambda: np.zeros(n),
            "flag": lambda: np.full(n, "", dtype=object),
            "weight": lambda: np.ones(n),
            "source_row": lambda: np.arange(n),
        }
        for name, make in defaults.items():
            value = getattr(self, name)
            set_(self, name, make() if value is None else np.asarray(value))
        for name in ("line_id", "flag"):
            set_(self, name, np.asarray(getattr(self, name), dtype=str).astype(object))
        for name in ("easting", "northing", "upward", "sp_mv", "line_id", "time",
                     "sigma_mv", "sp_raw_mv", "drift_mv", "tie_mv", "terrain_mv",
                     "flag", "weight", "source_row"):
            if len(getattr(self, name)) != n:
                raise ValueError(f"Stations.{name} has {len(getattr(self, name))} values for {n} stations.")

    def __len__(self):
        return len(self.station_id)

    @property
    def coordinates(self):
        """``(easting, northing, upward)`` arrays in metres."""
        return (self.easting, self.northing, self.upward)

    def replace(self, **changes):
        """A copy with some fields changed."""
        return replace(self, **changes)

    def subset(self, index):
        """The stations at ``index`` (integer or boolean array)."""
        changes = {}
        for name in self.__dataclass_fields__:
            value = getattr(self, name)
            if isinstance(value, np.ndarray) and value.ndim == 1 and len(value) == len(self):
                changes[name] = value[index]
        return replace(self, **changes)


@dataclass(frozen=True)
class Fault:
    """One mapped fault trace (a polyline) in the working CRS."""

    fault_id: str
    coords: np.ndarray  # (n, 2) easting, northing in m
    dip_deg: float = np.nan  # mapped dip, NaN when unknown (then fitted)
    dip_dir_deg: float = np.nan  # mapped dip direction, clockwise from grid north
    source_row: int = -1  # feature number in the input file


@dataclass(frozen=True)
class Raster:
    """
    A regular grid of values with nodes at cell centres.

    ``values`` has shape (n_north, n_east); row 0 is the southernmost row.
    Used for the DEM and for every SP grid.
    """

    easting: np.ndarray  # (n_east,) m, ascending, cell centres
    northing: np.ndarray  # (n_north,) m, ascending, cell centres
    values: np.ndarray  # (n_north, n_east), NaN where there is no value
    crs: str
    units: str = "mV"
    tags: dict = field(default_factory=dict)

    @property
    def spacing(self):
        """Node spacing as (north, east) in metres."""
        return (self.northing[1] - self.northing[0], self.easting[1] - self.easting[0])

    @property
    def region(self):
        """``(west, east, south, north)`` of the node centres."""
        return (self.easting[0], self.easting[-1], self.northing[0], self.northing[-1])


# Grid is the name the SP grids go by in the gridding step.
Grid = Raster


@dataclass(frozen=True)
class Readings:
    """
    Raw gradient (dipole) readings, in file order.

    ``dv_mv`` is the potential at ``to_id`` minus the potential at
    ``from_id``, as read (before any offset correction).
    """

    line_id: np.ndarray  # (m,) str
    from_id: np.ndarray  # (m,) str
    to_id: np.ndarray  # (m,) str
    time: np.ndarray  # (m,) datetime64[s]
    dv_mv: np.ndarray  # (m,) mV
    source_row: np.ndarray  # (m,) line number in the CSV (header = line 1)
    path: str = ""


@dataclass(frozen=True)
class ElectrodeChecks:
    """Electrode-pair offsets measured side by side (common practice: start and end of each day)."""

    time: np.ndarray  # (k,) datetime64[s]
    offset_mv: np.ndarray  # (k,) mV, "to" electrode minus "from" electrode
    source_row: np.ndarray
    path: str = ""


@dataclass(frozen=True)
class Survey:
    """Everything read from a project's inputs, validated and in the working CRS."""

    stations: Stations
    faults: tuple  # of Fault
    crs: str
    crs_note: str = ""  # how the working CRS was chosen
    dem: Raster | None = None
    readings: Readings | None = None
    electrode_checks: ElectrodeChecks | None = None
    reference_station: str = ""
    name: str = ""
    warnings: tuple = ()


@dataclass(frozen=True)
class Reduction:
    """Result of the field reduction (``geosp.reduce``)."""

    stations: Stations  # sp_mv reduced, corrections and flags filled
    qc: dict  # name -> pandas.DataFrame: "loops", "lines", "days", "legs", ...
    terrain: dict  # slope_mv_per_m, ci_lo, ci_hi, n_used, applied (bool)
    network: dict  # chi2, dof, p_value, sigma_mv, ... (empty without readings)
    profiles: dict  # line_id -> dict of arrays for before/after figures
    warnings: tuple = ()


@dataclass(frozen=True)
class GridResult:
    """Result of the gridding step."""

    grid: Raster  # SP in mV, NaN outside the mask
    distance: Raster  # distance to the nearest station in m (no mask)
    method: str
    params: dict  # chosen parameters (cell size, tension, damping, ...)
    cv_rmse_mv: float
    mask_distance_m: float
    cv_table: object = None  # pandas.DataFrame of the CV search, for the report


@dataclass(frozen=True)
class FaultSegment:
    """
    A straight-enough piece of a fault trace, the unit of detection and fitting.

    The local frame has its origin at ``origin`` (the first vertex of the
    trace), along-strike unit vector (sin(strike), cos(strike)) and
    across-fault unit vector (cos(strike), -sin(strike)), which points to the
    dip direction (strike + 90°, right-hand rule).
    """

    fault_id: str
    segment_id: str
    coords: np.ndarray  # (n, 2) trace vertices in m
    strike_deg: float  # of the chord, clockwise from grid north, 0-360
    length_m: float  # chord length
    dip_deg: float = np.nan  # mapped dip (0-90], NaN when unknown
    dip_known: bool = False  # True when the mapped dip direction fixed the strike sense
    junction_ends: tuple = ()  # indices (0 and/or 1) of ends at a junction

    @property
    def origin(self):
        return np.asarray(self.coords[0], dtype=float)

    def to_local(self, easting, northing):
        """Along-strike ``s`` and across (toward dip direction) ``t`` in metres."""
        phi = np.radians(self.strike_deg)
        de = np.asarray(easting) - self.origin[0]
        dn = np.asarray(northing) - self.origin[1]
        return de * np.sin(phi) + dn * np.cos(phi), de * np.cos(phi) - dn * np.sin(phi)

    def to_world(self, along, across):
        """Inverse of :meth:`to_local`."""
        phi = np.radians(self.strike_deg)
        along, across = np.asarray(along), np.asarray(across)
        return (self.origin[0] + along * np.sin(phi) + across * np.cos(phi),
                self.origin[1] + along * np.cos(phi) - across * np.sin(phi))


@dataclass(frozen=True)
class Detection:
    """Detection result for one segment (one row of the ``fault_segments`` layer)."""

    segment: FaultSegment
    station_index: np.ndarray  # indices into Stations of the stations in the corridor
    n_stations: int
    score: float  # matched-filter statistic, max |a/sigma_a| over templates
    polarity: int  # +1 / -1, sign of the best template amplitude (jump sign)
    detected: bool
    threshold: float  # calibrated score threshold used
    noise_mv: float  # noise level estimated from the data
    best_template: dict  # parameters of the best template
    cultural: bool = False  # better explained by a shallow pole pair
    note: str = ""
    false_alarm_p: float = np.nan  # probability that noise alone scores this high anywhere in the survey
    marginal: bool = False  # not detected, but within a few times the false-alarm rate


@dataclass(frozen=True)
class SegmentFit:
    """
    Fit result for one segment.

    ``sources`` are rows of the ``sources`` layer (dicts keyed by the
    contract's field names plus ``geometry`` built later by io), empty when
    the no-source model wins.
    """

    segment: FaultSegment
    station_index: np.ndarray
    chosen: str  # "none", "fault_patch", "two_patches", "pole_pair", "buried_line"
    sources: tuple  # of dict
    predicted_mv: np.ndarray  # model at station_index (sources + regional)
    source_mv: np.ndarray  # sources only at station_index
    selection: object  # pandas.DataFrame: model, k, chi2, aic, bic
    profiles: dict  # profile-likelihood curves: name -> (values, delta_chi2)
    correlation: object  # pandas.DataFrame or None
    flags: tuple = ()
    n_forward: int = 0
    seconds: float = 0.0
    ambiguities: tuple = ()  # other minima within delta chi2 < 4
    weights: np.ndarray | None = None  # final robust weights at station_index
    params: np.ndarray | None = None  # nonlinear parameters of the chosen model (fit frame)


@dataclass(frozen=True)
class FitResult:
    """All segment fits plus the final joint solve of the accepted strengths."""

    fits: tuple  # of SegmentFit
    model_mv: np.ndarray  # (n_stations,) joint model at every station
    residual_mv: np.ndarray  # (n_stations,)
    regional: dict  # coefficients of the joint regional
    sources: tuple  # of dict: final rows with jump re-solved jointly


@dataclass(frozen=True)
class FlowRegion:
    """
    One region of a primary-flow model with its properties (SI units).

    ``shape`` is a polygon of (x, z) vertices in m with z positive down
    (sections), or a box ``(x0, x1, y0, y1, z0, z1)`` in m (3-D). C_P and
    C_T keep their laboratory sign: C_P = (ΔV/ΔP) and C_T = (ΔV/ΔT) at
    zero current, so the current density is j = −σ∇V + σC_P∇P + σC_T∇T.
    """

    name: str
    shape: np.ndarray | None  # None for the background
    sigma_s_m: float
    c_p_v_pa: float = 0.0
    c_t_v_k: float = 0.0
    mobility_m2_pa_s: float = 1e-9  # k/η, permeability over viscosity
    thermal_conductivity_w_m_k: float = 2.5


@dataclass(frozen=True)
class FlowSource:
    """
    A fluid (``equation="pressure"``, strength in m³/s) or heat
    (``equation="heat"``, strength in W) source; per metre along strike in
    sections. ``kind`` is "point" ((2,) or (3,) position), "line" ((2, d)
    end points) or "region" (polygon or box as in :class:`FlowRegion`).
    """

    name: str
    equation: str
    kind: str
    geometry: np.ndarray
    strength: float
    fluid_temperature_k: float = 0.0  # fluid sources: temperature of the entering fluid


@dataclass(frozen=True)
class FlowFixed:
    """Pressure (Pa) or temperature (K above the surface) held fixed in a region."""

    name: str
    equation: str  # "pressure" or "heat"
    shape: np.ndarray
    value: float


@dataclass(frozen=True)
class FlowModel:
    """
    A primary-flow model: mesh, regions, sources, fixed values and the
    surface profile on which SP is reported. Built by
    ``geosp.io.flowmodel.read_flow_model``; solved by
    ``geosp.flow.run_flow_model``.
    """

    ndim: int  # 2 (x, z section) or 3 (x, y, z)
    core_x_m: tuple  # (x0, x1) of the uniform core
    depth_m: float  # depth of the core below the surface
    cell_m: float  # core cell size
    background: FlowRegion
    core_y_m: tuple | None = None  # (y0, y1), 3-D only
    padding_factor: float = 1.3
    padding_m: float | None = None  # distance of the far boundaries beyond the core
    regions: tuple = ()  # of FlowRegion, later ones override earlier ones
    sources: tuple = ()  # of FlowSource
    fixed: tuple = ()  # of FlowFixed
    profile_x_m: tuple | None = None  # (x0, x1); default the core
    profile_spacing_m: float | None = None  # default the cell size
    profile_y_m: float = 0.0  # 3-D: the profile runs along x at this y
    heat_advection: bool = False  # advect heat with the Darcy flux of the pressure solution
    fluid_heat_capacity_j_m3_k: float = 4.18e6
    title: str = ""
    source_path: str = ""
    profile_origin_xy: tuple | None = None  # world (easting, northing) of profile x = 0
    profile_azimuth_deg: float = 90.0  # direction of +x, clockwise from grid north
    crs: str = ""  # projected CRS of profile_origin_xy, for map layers
