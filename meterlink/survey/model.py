"""Survey, site, source, point and result dataclasses (pure data, SI units)."""

from __future__ import annotations

from dataclasses import dataclass, field

MODES = ("spot", "sweep", "average", "spatial", "selective")


@dataclass(frozen=True)
class Site:
    """Where the survey is made; entered by the technician (invented in the examples)."""

    name: str
    address: str = ""
    operator: str = ""
    technician: str = ""
    latitude_deg: float | None = None
    longitude_deg: float | None = None
    notes: str = ""


@dataclass(frozen=True)
class Source:
    """A transmitter at the site; powers in W where known (for extrapolation to maximum power)."""

    name: str
    freq_hz: float
    technology: str = ""
    power_w: float | None = None        # during the measurement
    max_power_w: float | None = None    # the largest the licence or configuration allows
    notes: str = ""

    @property
    def extrapolation_factor(self) -> float | None:
        """Field factor sqrt(P_max / P_meas), or None if either power is unknown."""
        if self.power_w and self.max_power_w:
            return (self.max_power_w / self.power_w) ** 0.5
        return None


@dataclass(frozen=True)
class Scheme:
    """Heights of a spatial average (m above ground) and the name of the template they came from."""

    name: str
    heights_m: tuple[float, ...]


@dataclass(frozen=True)
class SelectiveSpec:
    """A frequency-selective point's chain (docs/selective.md): band file, antenna certificate and how the
    antenna is used, the analyser's VISA address (the command line's --analyser overrides), and per band
    the declared extrapolation ((band name, ((key, value), ...)), ...)."""

    bands_path: str
    antenna_cert: str
    antenna: str = "isotropic"
    analyser: str = ""
    extrapolation: tuple = ()
    analyser_level_db: float = 0.5
    sweep_time_s: float = 0.1


@dataclass(frozen=True)
class Photo:
    """A photo of a point: its file (a path-like, so code that only copies files takes it as a path),
    what it shows and the direction the camera looked, degrees clockwise from north."""

    path: str
    caption: str = ""
    direction_deg: float | None = None

    def __fspath__(self) -> str:
        return self.path


@dataclass(frozen=True)
class Point:
    """One measurement point of the plan; x/y are local site metres, lat/lon optional."""

    label: str
    mode: str = "spot"
    height_m: float = 1.5
    x_m: float | None = None
    y_m: float | None = None
    lat_deg: float | None = None
    lon_deg: float | None = None
    notes: str = ""
    near_field: bool = False
    duration_s: float | None = None     # device seconds; None = mode default
    scheme: Scheme | None = None        # spatial mode only
    walk_m: tuple[tuple[float, float], ...] = ()   # sweep mode: x/y waypoints walked at height_m
    selective: SelectiveSpec | None = None         # selective mode only
    photos: tuple[str | Photo, ...] = ()   # image files (paths as resolved when the plan was read)

    def position_m(self, height_m: float | None = None) -> tuple[float, float, float] | None:
        """(x, y, z) of the probe at this point, or None without a local position."""
        if self.x_m is None or self.y_m is None:
            return None
        return (float(self.x_m), float(self.y_m), float(self.height_m if height_m is None else height_m))


@dataclass(frozen=True)
class FollowUp:
    """Threshold above which a broadband value asks for a frequency-selective measurement."""

    v_per_m: float | None = None
    percent_field: float | None = None   # percent of the (broadband) E reference level

    def threshold_v_per_m(self, e_ref_v_per_m: float) -> float | None:
        cands = [v for v in (self.v_per_m, None if self.percent_field is None
                             else self.percent_field / 100 * e_ref_v_per_m) if v is not None]
        return min(cands) if cands else None


@dataclass(frozen=True)
class SurveyPlan:
    """Everything fixed before measuring: site, sources, standard, tier, decision rule, points."""

    site: Site
    standard: str
    tier: str
    rule: str
    certificate: str
    points: tuple[Point, ...]
    sources: tuple[Source, ...] = ()
    title: str = ""
    interval_ms: int = 1000
    freq_hz: float | None = None
    band_hz: tuple[float, float] | None = None
    followup: FollowUp = field(default_factory=FollowUp)
    settle_s: float = 2.0
    spot_s: float = 5.0
    sweep_s: float = 60.0
    source_text: str = ""
    source_path: str = ""
    sources_file: str = ""          # declared sources (docs/sources.md) for the predicted values
    prediction_u_db: float = 3.0    # declared expanded uncertainty (k = 2) of a predicted field, dB
    gnss_output_delay_s: float | None = None   # GNSS receiver's output delay (fix epoch to its NMEA), s; None: not declared


@dataclass(frozen=True)
class Sample:
    """One sub-measurement: a height of a spatial average, or the whole of a single-position point."""

    height_m: float
    position_m: tuple[float, float, float] | None
    e_v_per_m: float          # RMS over time of the used readings (power domain)
    e_max_v_per_m: float
    axes_v_per_m: tuple[float, float, float]
    u_expanded_db: float
    n_readings: int
    coverage: float
    t_start_utc: float
    t_end_utc: float
    flags: int = 0
    emitters: tuple = ()      # (name, freq_hz, e_v_per_m) for frequency-selective data
    #: frequency-selective: each sweep's lines ((freq_hz, e_v_per_m), ...), for standards with no averaging time
    sweeps: tuple = ()
    #: lowest and highest meter temperature (degC) while measuring; None: none reported
    temp_span_c: tuple[float, float] | None = None
    #: GNSS position (meterlink.survey.capture.Geo) of the sample, None without a fix
    geo: object | None = None


@dataclass(frozen=True)
class Emitter:
    """One frequency of a frequency-selective result, with its share of the exposure ratio."""

    name: str
    freq_hz: float
    e_v_per_m: float
    e_extrapolated_v_per_m: float
    ratio: float = 0.0
    share: float = 0.0


@dataclass(frozen=True)
class PointResult:
    """The assessed value of one point: measured, extrapolated, against the limit, with a verdict."""

    point: Point
    scheme: str
    e_v_per_m: float
    e_max_v_per_m: float
    axes_v_per_m: tuple[float, float, float]
    u_expanded_db: float
    n_readings: int
    coverage: float
    complete: bool
    flags: int
    warnings: tuple[str, ...]
    samples: tuple[Sample, ...]
    e_limit_v_per_m: float
    percent_field: float
    percent_power: float
    verdict: str
    statement: str
    followup: bool
    e_extrapolated_v_per_m: float
    percent_power_extrapolated: float
    verdict_extrapolated: str
    exposure_ratio: float | None = None           # frequency-selective: total by the summation rule
    exposure_ratio_extrapolated: float | None = None
    emitters: tuple[Emitter, ...] = ()
    t_start_utc: float = 0.0
    t_end_utc: float = 0.0
    duration_s: float = 0.0
