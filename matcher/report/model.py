"""The per-event report as plain data: what the HTML page and the tables are made from.

Pure (no files, no store): :class:`EventReport` holds one event's summary, its
revision history, the ranked candidates of one revision, the top host
galaxies, the counterpart classes used, and the figures (PNG bytes). It is
built from the store by :func:`matcher.report.from_store.event_report_from_store`
and turned into HTML by :func:`matcher.report.html.render_event_html` and into
tables by :mod:`matcher.report.tables`; tests build it by hand.

Missing numbers are NaN (not None) in every float field, so that columns are
plain float arrays and round-trip through ECSV and VOTable unchanged; a
missing string is ``""``.

Units: degrees, deg², seconds, Mpc, per steradian, per second, per year, as
each field says.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

from matcher.errors import InputError

__all__ = [
    "RevisionSummary",
    "CandidateRow",
    "HostRow",
    "ClassRow",
    "ReportFigure",
    "EventReport",
    "CANDIDATE_FIELDS",
    "HOST_FIELDS",
    "PNG_SIGNATURE",
]

#: The first eight bytes of every PNG file (PNG specification, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

_NAN = math.nan


def _num(value, name: str, who: str, *, lo: float = -math.inf, hi: float = math.inf,
         allow_inf: bool = False) -> float:
    """A float in [lo, hi], NaN for "not known" (None is accepted as NaN)."""
    if value is None:
        return _NAN
    if isinstance(value, bool):
        raise InputError(f"{who}: {name}={value!r} is not a number")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{who}: {name}={value!r} is not a number") from None
    if math.isnan(v):
        return _NAN
    if math.isinf(v) and not allow_inf:
        raise InputError(f"{who}: {name}={v!r} is not finite")
    if v < lo or v > hi:
        raise InputError(f"{who}: {name}={v!r} is outside [{lo:g}, {hi:g}]")
    return v


def _text(value, name: str, who: str, *, required: bool = False) -> str:
    if value is None:
        value = ""
    if not isinstance(value, str):
        raise InputError(f"{who}: {name} must be a string, got {type(value).__name__} {value!r}")
    if required and not value:
        raise InputError(f"{who}: {name} must not be empty")
    return value


def _positive_int(value, name: str, who: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise InputError(f"{who}: {name}={value!r} must be a positive integer")
    return value


def _set(obj, name: str, value) -> None:
    object.__setattr__(obj, name, value)


@dataclass(frozen=True)
class RevisionSummary:
    """One stored revision of the GW event.

    Attributes
    ----------
    revision : int
    state : str
        ``issued``, ``revised`` or ``withdrawn``.
    merger_time_iso : str
        ISO-8601 UTC.
    received_at_iso : str
        When the store received the alert, ISO-8601 UTC (``""`` if not known).
    far_per_year : float, yr**-1
    p_astro : float
    source_probs : mapping of str to float
        ``bns``, ``nsbh``, ``bbh``, ``terrestrial`` (those given).
    area50_deg2, area90_deg2 : float, deg²
        50% and 90% credible areas (NaN without a localization).
    distance_mpc, distance_err_mpc : float, Mpc
        Sky-marginal distance, mean and standard deviation (NaN without distance layers).
    is_current : bool
        The event's current revision.
    n_results : int
        Results stored for this revision.
    """

    revision: int
    state: str
    merger_time_iso: str
    received_at_iso: str = ""
    far_per_year: float = _NAN
    p_astro: float = _NAN
    source_probs: Mapping[str, float] = field(default_factory=dict)
    area50_deg2: float = _NAN
    area90_deg2: float = _NAN
    distance_mpc: float = _NAN
    distance_err_mpc: float = _NAN
    is_current: bool = False
    n_results: int = 0

    def __post_init__(self):
        if isinstance(self.revision, bool) or not isinstance(self.revision, int) or self.revision < 0:
            raise InputError(f"revision: revision={self.revision!r} must be an integer >= 0")
        who = f"revision {self.revision}"
        _set(self, "state", _text(self.state, "state", who, required=True))
        _set(self, "merger_time_iso", _text(self.merger_time_iso, "merger_time_iso", who, required=True))
        _set(self, "received_at_iso", _text(self.received_at_iso, "received_at_iso", who))
        _set(self, "far_per_year", _num(self.far_per_year, "far_per_year", who, lo=0.0))
        _set(self, "p_astro", _num(self.p_astro, "p_astro", who, lo=0.0, hi=1.0))
        probs = {}
        for k, v in dict(self.source_probs or {}).items():
            probs[_text(k, "source_probs key", who, required=True)] = _num(v, f"source_probs.{k}", who, lo=0.0, hi=1.0)
        _set(self, "source_probs", MappingProxyType(probs))
        for name in ("area50_deg2", "area90_deg2"):
            _set(self, name, _num(getattr(self, name), name, who, lo=0.0, hi=41253.0))
        _set(self, "distance_mpc", _num(self.distance_mpc, "distance_mpc", who, lo=0.0))
        _set(self, "distance_err_mpc", _num(self.distance_err_mpc, "distance_err_mpc", who, lo=0.0))
        _set(self, "is_current", bool(self.is_current))
        if isinstance(self.n_results, bool) or not isinstance(self.n_results, int) or self.n_results < 0:
            raise InputError(f"{who}: n_results={self.n_results!r} must be an integer >= 0")

    @property
    def withdrawn(self) -> bool:
        return self.state == "withdrawn"


#: Column order of the candidate table (also the ECSV columns).
CANDIDATE_FIELDS = (
    "rank", "transient_id", "klass", "status", "p_assoc", "fap", "odds", "prior", "sky_per_sr", "time_per_s",
    "distance_factor", "rate_per_sr_per_s", "dt_s", "searched_area_deg2", "credible_level", "joint_far_per_year",
    "ra_deg", "dec_deg", "pos_err_deg", "distance_mpc", "distance_err_mpc", "best_host_id", "best_host_prob",
    "p_assoc_published", "rank_published", "revision", "key",
)


@dataclass(frozen=True)
class CandidateRow:
    """One ranked candidate of the report's revision.

    Attributes
    ----------
    rank : int
        1 = best.
    transient_id, klass, status : str
        The report, its counterpart class, and the result's status
        (``current``, ``superseded``, ``withdrawn``).
    p_assoc : float
        Association probability within its class.
    fap : float
        False-association probability.
    odds : float
        Posterior odds ``π/(1-π) · I · T · D / r``.
    prior : float
        ``π``.
    sky_per_sr : float, sr**-1
        Sky overlap ``I``.
    time_per_s : float, s**-1
        Time term ``T``.
    distance_factor : float
        Distance Bayes factor ``D``.
    rate_per_sr_per_s : float, sr**-1 s**-1
        The class's background rate ``r`` (from the configuration used).
    dt_s : float, s
        Report time minus merger time.
    searched_area_deg2 : float, deg²
    credible_level : float
    joint_far_per_year : float, yr**-1
    ra_deg, dec_deg, pos_err_deg : float, deg
    distance_mpc, distance_err_mpc : float, Mpc
        The distance the scoring used (or the report's own).
    best_host_id : str
    best_host_prob : float
    p_assoc_published, rank_published : float, int
        The values in the stored record, as the service published them (``p_assoc``
        rounded, ``rank`` only for the first few; NaN and 0 when absent).
    revision : int
    key : str
        The result's deterministic key.
    """

    rank: int
    transient_id: str
    klass: str
    status: str = "current"
    p_assoc: float = _NAN
    fap: float = _NAN
    odds: float = _NAN
    prior: float = _NAN
    sky_per_sr: float = _NAN
    time_per_s: float = _NAN
    distance_factor: float = _NAN
    rate_per_sr_per_s: float = _NAN
    dt_s: float = _NAN
    searched_area_deg2: float = _NAN
    credible_level: float = _NAN
    joint_far_per_year: float = _NAN
    ra_deg: float = _NAN
    dec_deg: float = _NAN
    pos_err_deg: float = _NAN
    distance_mpc: float = _NAN
    distance_err_mpc: float = _NAN
    best_host_id: str = ""
    best_host_prob: float = _NAN
    p_assoc_published: float = _NAN
    rank_published: int = 0
    revision: int = 0
    key: str = ""

    def __post_init__(self):
        tid = _text(self.transient_id, "transient_id", "candidate", required=True)
        who = f"candidate {tid}"
        _positive_int(self.rank, "rank", who)
        _set(self, "klass", _text(self.klass, "class", who, required=True))
        _set(self, "status", _text(self.status, "status", who, required=True))
        for name in ("p_assoc", "fap", "credible_level", "prior", "best_host_prob", "p_assoc_published"):
            _set(self, name, _num(getattr(self, name), name, who, lo=0.0, hi=1.0))
        for name in ("odds", "sky_per_sr", "time_per_s", "distance_factor", "rate_per_sr_per_s",
                     "joint_far_per_year", "pos_err_deg", "distance_mpc", "distance_err_mpc"):
            _set(self, name, _num(getattr(self, name), name, who, lo=0.0))
        _set(self, "dt_s", _num(self.dt_s, "dt_s", who))
        _set(self, "searched_area_deg2", _num(self.searched_area_deg2, "searched_area_deg2", who, lo=0.0, hi=41253.0))
        _set(self, "ra_deg", _num(self.ra_deg, "ra_deg", who, lo=0.0, hi=360.0))
        _set(self, "dec_deg", _num(self.dec_deg, "dec_deg", who, lo=-90.0, hi=90.0))
        _set(self, "best_host_id", _text(self.best_host_id, "best_host_id", who))
        _set(self, "key", _text(self.key, "key", who))
        if isinstance(self.revision, bool) or not isinstance(self.revision, int) or self.revision < 0:
            raise InputError(f"{who}: revision={self.revision!r} must be an integer >= 0")
        if isinstance(self.rank_published, bool) or not isinstance(self.rank_published, int) or self.rank_published < 0:
            raise InputError(f"{who}: rank_published={self.rank_published!r} must be an integer >= 0 (0: none)")


#: Column order of the host table (also the ECSV and VOTable columns).
HOST_FIELDS = ("rank", "galaxy_id", "ra_deg", "dec_deg", "distance_mpc", "distance_err_mpc", "p_host", "cum_prob")


@dataclass(frozen=True)
class HostRow:
    """One galaxy of the host ranking.

    Attributes
    ----------
    rank : int
    galaxy_id : str
    ra_deg, dec_deg : float, deg
    distance_mpc, distance_err_mpc : float, Mpc
    p_host : float
        Probability that this galaxy is the host.
    cum_prob : float
        Running sum of ``p_host`` down to this rank.
    """

    rank: int
    galaxy_id: str
    ra_deg: float
    dec_deg: float
    distance_mpc: float = _NAN
    distance_err_mpc: float = _NAN
    p_host: float = _NAN
    cum_prob: float = _NAN

    def __post_init__(self):
        gid = _text(self.galaxy_id, "galaxy_id", "host", required=True)
        who = f"host {gid}"
        _positive_int(self.rank, "rank", who)
        _set(self, "ra_deg", _num(self.ra_deg, "ra_deg", who, lo=0.0, hi=360.0))
        _set(self, "dec_deg", _num(self.dec_deg, "dec_deg", who, lo=-90.0, hi=90.0))
        if math.isnan(self.ra_deg) or math.isnan(self.dec_deg):
            raise InputError(f"{who}: ra_deg and dec_deg are required")
        _set(self, "distance_mpc", _num(self.distance_mpc, "distance_mpc", who, lo=0.0))
        _set(self, "distance_err_mpc", _num(self.distance_err_mpc, "distance_err_mpc", who, lo=0.0))
        _set(self, "p_host", _num(self.p_host, "p_host", who, lo=0.0, hi=1.0))
        # Rounding of a running sum can pass 1 by a few ulp.
        _set(self, "cum_prob", _num(self.cum_prob, "cum_prob", who, lo=0.0, hi=1.0 + 1e-9))


@dataclass(frozen=True)
class ClassRow:
    """A counterpart class as configured for the scoring.

    Attributes
    ----------
    name, description : str
    window_lo_s, window_hi_s : float, s
    rate_per_deg2_per_day : float, deg**-2 day**-1
    efficiency : float
    needs_neutron_star, sharp_time : bool
    reach_mpc : float, Mpc
    pos_err_deg : float, deg
    cadence_s : float, s (NaN: none)
    """

    name: str
    window_lo_s: float
    window_hi_s: float
    rate_per_deg2_per_day: float
    efficiency: float
    needs_neutron_star: bool
    sharp_time: bool
    reach_mpc: float = _NAN
    pos_err_deg: float = _NAN
    cadence_s: float = _NAN
    description: str = ""

    def __post_init__(self):
        name = _text(self.name, "name", "class", required=True)
        who = f"class {name}"
        _set(self, "window_lo_s", _num(self.window_lo_s, "window_lo_s", who))
        _set(self, "window_hi_s", _num(self.window_hi_s, "window_hi_s", who))
        if not self.window_lo_s < self.window_hi_s:
            raise InputError(f"{who}: window [{self.window_lo_s}, {self.window_hi_s}] s must have lo < hi")
        _set(self, "rate_per_deg2_per_day", _num(self.rate_per_deg2_per_day, "rate_per_deg2_per_day", who, lo=0.0))
        _set(self, "efficiency", _num(self.efficiency, "efficiency", who, lo=0.0, hi=1.0))
        _set(self, "needs_neutron_star", bool(self.needs_neutron_star))
        _set(self, "sharp_time", bool(self.sharp_time))
        for n in ("reach_mpc", "pos_err_deg", "cadence_s"):
            _set(self, n, _num(getattr(self, n), n, who, lo=0.0))
        _set(self, "description", _text(self.description, "description", who))

    @classmethod
    def from_class(cls, c) -> "ClassRow":
        """From a :class:`matcher.coincidence.CounterpartClass`."""
        return cls(c.name, c.window_lo_s, c.window_hi_s, c.rate_per_deg2_per_day, c.efficiency,
                   c.needs_neutron_star, c.sharp_time, c.reach_mpc, c.pos_err_deg,
                   _NAN if c.cadence_s is None else c.cadence_s, c.description or "")

    @property
    def rate_per_sr_per_s(self) -> float:
        """``r`` as the engine uses it (sr**-1 s**-1): per deg² per day × deg²/sr ÷ s/day."""
        return self.rate_per_deg2_per_day * (180.0 / math.pi) ** 2 / 86400.0


@dataclass(frozen=True)
class ReportFigure:
    """A PNG image shown in the report.

    Attributes
    ----------
    title : str
    png : bytes
        The whole PNG file.
    alt : str
        Text for readers who cannot see the image.
    caption : str
    width_px, height_px : int
        The image's size (from its header).
    """

    title: str
    png: bytes
    alt: str
    caption: str = ""
    width_px: int = field(init=False, default=0)
    height_px: int = field(init=False, default=0)

    def __post_init__(self):
        title = _text(self.title, "title", "figure", required=True)
        who = f"figure {title!r}"
        if not isinstance(self.png, (bytes, bytearray)) or not bytes(self.png[:8]) == PNG_SIGNATURE:
            raise InputError(f"{who}: png must be the bytes of a PNG file (signature \\x89PNG\\r\\n\\x1a\\n)")
        # IHDR is the first chunk: length (4), type (4), then width and height as big-endian uint32.
        if len(self.png) < 24 or self.png[12:16] != b"IHDR":
            raise InputError(f"{who}: png has no IHDR chunk where the PNG specification puts it")
        _set(self, "png", bytes(self.png))
        _set(self, "alt", _text(self.alt, "alt", who, required=True))
        _set(self, "caption", _text(self.caption, "caption", who))
        _set(self, "width_px", int.from_bytes(self.png[16:20], "big"))
        _set(self, "height_px", int.from_bytes(self.png[20:24], "big"))


@dataclass(frozen=True)
class EventReport:
    """Everything the per-event report shows.

    Attributes
    ----------
    event_id : str
    revision : int
        The revision whose candidates, hosts and plot are shown (the current one,
        or for a withdrawn event the last one that had a localization).
    revisions : tuple of RevisionSummary
        Oldest first; exactly one is current.
    candidates : tuple of CandidateRow
        Sorted by rank.
    hosts : tuple of HostRow
        Sorted by rank.
    classes : tuple of ClassRow
    figures : tuple of ReportFigure
    version : str
        ``matcher.__version__`` of the program that made the report.
    generated_at_iso : str
    config_source : str
        Where the classes came from (a configuration file, or the packaged defaults).
    p_outside_catalog : float
        Probability that the host is not in the catalogue (NaN: not assessed).
    host_note : str
        Where the host ranking came from, or why there is none.
    notes : tuple of str
        Anything else the reader should know (missing data, limits applied).
    n_candidates_total : int
        Candidates of the revision before any display limit (0: same as ``len(candidates)``).
    """

    event_id: str
    revision: int
    revisions: tuple[RevisionSummary, ...]
    candidates: tuple[CandidateRow, ...] = ()
    hosts: tuple[HostRow, ...] = ()
    classes: tuple[ClassRow, ...] = ()
    figures: tuple[ReportFigure, ...] = ()
    version: str = ""
    generated_at_iso: str = ""
    config_source: str = ""
    p_outside_catalog: float = _NAN
    host_note: str = ""
    notes: tuple[str, ...] = ()
    n_candidates_total: int = 0

    def __post_init__(self):
        eid = _text(self.event_id, "event_id", "event report", required=True)
        who = f"event report {eid}"
        revs = tuple(self.revisions)
        if not revs or not all(isinstance(r, RevisionSummary) for r in revs):
            raise InputError(f"{who}: revisions must be a non-empty sequence of RevisionSummary")
        numbers = [r.revision for r in revs]
        if numbers != sorted(set(numbers)):
            raise InputError(f"{who}: revisions must be distinct and oldest first, got {numbers}")
        if sum(r.is_current for r in revs) != 1:
            raise InputError(f"{who}: exactly one revision must be current")
        if self.revision not in numbers:
            raise InputError(f"{who}: revision {self.revision!r} is not among the revisions {numbers}")
        _set(self, "revisions", revs)
        cands = tuple(self.candidates)
        if not all(isinstance(c, CandidateRow) for c in cands):
            raise InputError(f"{who}: candidates must be CandidateRow objects")
        ranks = [c.rank for c in cands]
        if ranks != sorted(set(ranks)):
            raise InputError(f"{who}: candidate ranks must be distinct and in order, got {ranks}")
        ids = [c.transient_id for c in cands]
        if len(set(ids)) != len(ids):
            raise InputError(f"{who}: a transient appears twice among the candidates")
        _set(self, "candidates", cands)
        hosts = tuple(self.hosts)
        if not all(isinstance(h, HostRow) for h in hosts):
            raise InputError(f"{who}: hosts must be HostRow objects")
        hranks = [h.rank for h in hosts]
        if hranks != sorted(set(hranks)):
            raise InputError(f"{who}: host ranks must be distinct and in order, got {hranks}")
        _set(self, "hosts", hosts)
        classes = tuple(self.classes)
        if not all(isinstance(c, ClassRow) for c in classes):
            raise InputError(f"{who}: classes must be ClassRow objects")
        _set(self, "classes", classes)
        figs = tuple(self.figures)
        if not all(isinstance(f, ReportFigure) for f in figs):
            raise InputError(f"{who}: figures must be ReportFigure objects")
        _set(self, "figures", figs)
        for name in ("version", "generated_at_iso", "config_source", "host_note"):
            _set(self, name, _text(getattr(self, name), name, who))
        _set(self, "p_outside_catalog", _num(self.p_outside_catalog, "p_outside_catalog", who, lo=0.0, hi=1.0))
        notes = tuple(self.notes)
        for n in notes:
            _text(n, "notes", who, required=True)
        _set(self, "notes", notes)
        total = self.n_candidates_total
        if isinstance(total, bool) or not isinstance(total, int) or total < 0:
            raise InputError(f"{who}: n_candidates_total={total!r} must be an integer >= 0")
        _set(self, "n_candidates_total", max(total, len(cands)))

    @property
    def current(self) -> RevisionSummary:
        """The event's current revision."""
        return next(r for r in self.revisions if r.is_current)

    @property
    def shown(self) -> RevisionSummary:
        """The revision whose candidates and plot are shown."""
        return next(r for r in self.revisions if r.revision == self.revision)

    @property
    def withdrawn(self) -> bool:
        return self.current.withdrawn

    def class_row(self, name: str) -> ClassRow | None:
        return next((c for c in self.classes if c.name == name), None)
