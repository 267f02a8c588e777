"""The sky plot of one GW event revision: localization, candidates, hosts, distance.

:func:`plot_localization` draws into a new :class:`matplotlib.figure.Figure`
(Agg canvas, no pyplot, no global state) and returns a :class:`SkyPlot` that
holds the figure *and* what was drawn, so that tests and other tools can check
the content: the credible contours as paths in each panel's pixel coordinates
(and on the sky), and the projected position of every candidate and host.
It never writes a file; :func:`figure_bytes` renders to bytes in memory and
the caller (``matcher plot``, later the service and the HTML report) writes them.

Layout (one figure, 11 × 8.5 in by default)
-------------------------------------------
* **Top: the whole sky** in a Mollweide projection centred on the RA of the
  90% region (rounded to 15°), with the 50% (solid) and 90% (dashed)
  contours, candidates (stars), error circles, hosts (diamonds), an outline
  of the zoomed view and RA/Dec grid labels in degrees.
* **Bottom left: a gnomonic zoom** centred on the 90% region, drawn when that
  region is smaller than :data:`ZOOM_MAX_AREA_DEG2` (400 deg²) *and* lies
  within :data:`ZOOM_MAX_RADIUS_DEG` (35°) of its centre. Why these limits:
  a telescope team plans tiles on a zoomed chart up to a few hundred deg²;
  beyond that the all-sky view says more. A gnomonic chart stretches scales by
  ``1/cos²θ`` at angle θ from its centre, 1.5 at 35°, which is as far as a
  chart stays readable; a thin arc of under 400 deg² can still be 60° long,
  hence the second limit. Otherwise the slot explains why there is no zoom.
* **Bottom right: distance**: the sky-marginal luminosity-distance density,
  the density along the top candidate's line of sight, and every candidate's
  and host's distance with its error bar.

Candidates are labelled by rank, with ``P_assoc`` when it is given. Ranks are
taken as given; otherwise candidates are ranked by ``P_assoc`` when every one
has it, and by credible level (searched probability, smallest first) when not;
:attr:`SkyPlot.ranking` and the legend say which. Error circles are drawn to
scale at the radius that contains :data:`ERROR_CIRCLE_CONTAINMENT` (90%) of a
circular Gaussian (Fisher) position error of 1σ ``err_deg``, like the 90%
sky contour; the legend says so.

Colours and markers are in :mod:`matcher.report.palette`.
"""

from __future__ import annotations

import io
import math
import textwrap
from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import astropy.units as u
import numpy as np
from astropy.visualization.wcsaxes.frame import EllipticalFrame
from astropy.wcs import WCS
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from matcher.errors import InputError
from matcher.report import palette as pal
from matcher.report.projections import (
    allsky_wcs,
    break_at_jumps,
    gnomonic_wcs,
    pixel_centres_world,
    region_centre,
    small_circle,
    world_to_pixel,
)
from matcher.sky import distance as _dist
from matcher.sky.skymap import DEG2_PER_SR, SkyMap

__all__ = [
    "Candidate",
    "Host",
    "EventInfo",
    "PanelData",
    "DistancePanelData",
    "SkyPlot",
    "plot_localization",
    "figure_bytes",
    "error_circle_radius_deg",
    "ZOOM_MAX_AREA_DEG2",
    "ZOOM_MAX_RADIUS_DEG",
    "ZOOM_LEVEL",
    "ERROR_CIRCLE_CONTAINMENT",
    "FIGURE_FORMATS",
]

#: Largest 90% area (deg²) that gets a zoomed gnomonic view.
ZOOM_MAX_AREA_DEG2 = 400.0
#: Largest angular radius (deg) of the 90% region around its centre that gets a zoomed view.
ZOOM_MAX_RADIUS_DEG = 35.0
#: The credible level whose region the zoom (and the all-sky centre) is fitted to.
ZOOM_LEVEL = 0.9
#: Probability inside a drawn error circle.
ERROR_CIRCLE_CONTAINMENT = 0.9
#: Output formats :func:`figure_bytes` writes (by file suffix).
FIGURE_FORMATS = ("png", "pdf", "svg")

_ZOOM_MARGIN = 1.25  # zoom half-width over the region's radius
_ZOOM_MIN_HALF_WIDTH_DEG = 0.5
_HOSTS_LABELLED = 5


# ----------------------------------------------------------------------------- inputs
def _optional(value, name: str, who: str, *, lo: float, hi: float = math.inf, lo_open: bool = False):
    """A finite number in range, or None (None and NaN both mean "not known")."""
    if value is None:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{who}: {name}={value!r} is not a number") from None
    if math.isnan(v):
        return None
    if not math.isfinite(v) or (v <= lo if lo_open else v < lo) or v > hi:
        bound = f"({lo:g}, {hi:g}]" if lo_open else f"[{lo:g}, {hi:g}]"
        raise InputError(f"{who}: {name}={v!r} is outside {bound}")
    return v


def _position(who: str, ra, dec) -> tuple[float, float]:
    ra = _optional(ra, "ra_deg", who, lo=0.0, hi=360.0)
    dec = _optional(dec, "dec_deg", who, lo=-90.0, hi=90.0)
    if ra is None or dec is None:
        raise InputError(f"{who}: ra_deg and dec_deg are required")
    return ra, dec


def _rank(value, who: str) -> int | None:
    if value is None:
        return None
    try:
        ok = not isinstance(value, bool) and float(value).is_integer() and int(value) >= 1
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise InputError(f"{who}: rank={value!r} must be a positive integer")
    return int(value)


@dataclass(frozen=True)
class Candidate:
    """A reported transient to mark on the plot.

    Attributes
    ----------
    transient_id : str
    ra_deg, dec_deg : float, deg
    err_deg : float or None, deg
        1σ radius of a circular Gaussian position error (None or NaN: a point).
    p_assoc : float or None
        Association probability, shown in the label.
    rank : int or None
        1 = best. Missing ranks are filled in by :func:`plot_localization`.
    distance_mpc, distance_err_mpc : float or None, Mpc
        Luminosity distance (from a redshift or a host) and its 1σ error.
    klass : str or None
        Counterpart class, for tables; the plot marks every class alike.
    """

    transient_id: str
    ra_deg: float
    dec_deg: float
    err_deg: float | None = None
    p_assoc: float | None = None
    rank: int | None = None
    distance_mpc: float | None = None
    distance_err_mpc: float | None = None
    klass: str | None = None

    def __post_init__(self):
        if not isinstance(self.transient_id, str) or not self.transient_id:
            raise InputError(f"candidate: transient_id must be a non-empty string, got {self.transient_id!r}")
        who = f"candidate {self.transient_id}"
        ra, dec = _position(who, self.ra_deg, self.dec_deg)
        object.__setattr__(self, "ra_deg", ra)
        object.__setattr__(self, "dec_deg", dec)
        object.__setattr__(self, "err_deg", _optional(self.err_deg, "err_deg", who, lo=0.0, hi=90.0))
        object.__setattr__(self, "p_assoc", _optional(self.p_assoc, "p_assoc", who, lo=0.0, hi=1.0))
        object.__setattr__(self, "rank", _rank(self.rank, who))
        object.__setattr__(self, "distance_mpc",
                           _optional(self.distance_mpc, "distance_mpc", who, lo=0.0, lo_open=True))
        object.__setattr__(self, "distance_err_mpc",
                           _optional(self.distance_err_mpc, "distance_err_mpc", who, lo=0.0, lo_open=True))

    @classmethod
    def from_report(cls, report, *, p_assoc=None, rank=None, distance_mpc=None, distance_err_mpc=None):
        """Build from a :class:`~matcher.streams.messages.TransientReport` (or anything with its fields).

        ``distance_mpc`` overrides the report's own distance (e.g. one derived from
        its redshift, or the one the scoring used).
        """
        d = report.distance_mpc if distance_mpc is None else distance_mpc
        de = report.distance_err_mpc if distance_mpc is None else distance_err_mpc
        return cls(report.transient_id, report.ra_deg, report.dec_deg, report.pos_err_deg, p_assoc, rank, d, de,
                   report.klass)


@dataclass(frozen=True)
class Host:
    """A candidate host galaxy to mark on the plot.

    Attributes
    ----------
    galaxy_id : str
    ra_deg, dec_deg : float, deg
    p_host : float or None
        Probability that this galaxy is the host.
    rank : int or None
        1 = most probable. Missing ranks follow ``p_host`` (or input order).
    distance_mpc, distance_err_mpc : float or None, Mpc
    """

    galaxy_id: str
    ra_deg: float
    dec_deg: float
    p_host: float | None = None
    rank: int | None = None
    distance_mpc: float | None = None
    distance_err_mpc: float | None = None

    def __post_init__(self):
        if not isinstance(self.galaxy_id, str) or not self.galaxy_id:
            raise InputError(f"host: galaxy_id must be a non-empty string, got {self.galaxy_id!r}")
        who = f"host {self.galaxy_id}"
        ra, dec = _position(who, self.ra_deg, self.dec_deg)
        object.__setattr__(self, "ra_deg", ra)
        object.__setattr__(self, "dec_deg", dec)
        object.__setattr__(self, "p_host", _optional(self.p_host, "p_host", who, lo=0.0, hi=1.0))
        object.__setattr__(self, "rank", _rank(self.rank, who))
        object.__setattr__(self, "distance_mpc",
                           _optional(self.distance_mpc, "distance_mpc", who, lo=0.0, lo_open=True))
        object.__setattr__(self, "distance_err_mpc",
                           _optional(self.distance_err_mpc, "distance_err_mpc", who, lo=0.0, lo_open=True))


@dataclass(frozen=True)
class EventInfo:
    """What the title says: event id, revision, merger time (ISO-8601 UTC)."""

    event_id: str | None = None
    revision: int | None = None
    merger_time_iso: str | None = None

    @classmethod
    def from_alert(cls, alert) -> "EventInfo":
        """From a :class:`~matcher.streams.messages.GWAlert`."""
        return cls(alert.event_id, alert.revision, alert.merger_time_iso)

    @classmethod
    def from_meta(cls, meta: Mapping[str, object]) -> "EventInfo":
        """From a map's header facts (``OBJECT``, ``DATE-OBS``) when there is no alert."""
        obj = meta.get("OBJECT")
        when = meta.get("DATE-OBS")
        return cls(str(obj) if obj else None, None, str(when) if when else None)

    def title(self, source: str) -> str:
        parts = [self.event_id or f"localization {source}"]
        if self.revision is not None:
            parts.append(f"revision {self.revision}")
        if self.merger_time_iso:
            parts.append(f"merger {self.merger_time_iso}")
        return "  ·  ".join(parts)


# ---------------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False)
class PanelData:
    """What one sky panel shows, in its own pixel coordinates (0-based, ``imshow`` origin lower).

    Attributes
    ----------
    name : str
        ``"allsky"`` (Mollweide) or ``"zoom"`` (gnomonic).
    wcs : astropy.wcs.WCS
        The projection; ``wcs.pixel_shape`` is ``(nx, ny)``.
    contours : mapping of float to tuple of ndarray
        For each credible level, the contour polylines drawn, each of shape
        ``(N, 2)`` in pixel coordinates ``(x, y)``. A level whose region is
        smaller than one image pixel has no polylines.
    candidate_xy, host_xy : ndarray, shape (n, 2)
        Projected positions of :attr:`SkyPlot.candidates` and :attr:`SkyPlot.hosts`
        (NaN where the projection is undefined, e.g. the far side of a gnomonic view).
    labelled : tuple of str
        Ids of the candidates labelled in this panel.
    axes : matplotlib Axes
    """

    name: str
    wcs: WCS
    contours: Mapping[float, tuple[np.ndarray, ...]]
    candidate_xy: np.ndarray
    host_xy: np.ndarray
    labelled: tuple[str, ...]
    axes: object

    @property
    def shape(self) -> tuple[int, int]:
        """Image shape ``(ny, nx)``."""
        nx, ny = self.wcs.pixel_shape
        return ny, nx

    def in_view(self, xy: np.ndarray) -> np.ndarray:
        """True for points inside the image (and projectable)."""
        ny, nx = self.shape
        xy = np.asarray(xy, float).reshape(-1, 2)
        ok = np.all(np.isfinite(xy), axis=1)
        with np.errstate(invalid="ignore"):
            ok &= (xy[:, 0] >= -0.5) & (xy[:, 0] <= nx - 0.5) & (xy[:, 1] >= -0.5) & (xy[:, 1] <= ny - 0.5)
        return ok

    def contours_radec(self, level: float) -> list[np.ndarray]:
        """The contour polylines of ``level`` as ``(N, 2)`` arrays of (RA, Dec) in degrees."""
        out = []
        for seg in self.contours[level]:
            with np.errstate(invalid="ignore"):
                ra, dec = self.wcs.wcs_pix2world(seg[:, 0], seg[:, 1], 0)
            out.append(np.column_stack([np.mod(ra, 360.0), dec]))
        return out


@dataclass(frozen=True, eq=False)
class DistancePanelData:
    """What the distance panel shows.

    Attributes
    ----------
    r_mpc : ndarray, Mpc
    marginal_pdf : ndarray or None, Mpc**-1
        Sky-marginal distance density on ``r_mpc`` (None without distance layers).
    line_of_sight_pdf : ndarray or None, Mpc**-1
        Density along the top candidate's line of sight.
    line_of_sight_id : str or None
    rows : tuple of (kind, id, distance_mpc, err_mpc or None, y)
        Each candidate (``"candidate"``) and host (``"host"``) drawn, with its height.
    axes : matplotlib Axes
    """

    r_mpc: np.ndarray
    marginal_pdf: np.ndarray | None
    line_of_sight_pdf: np.ndarray | None
    line_of_sight_id: str | None
    rows: tuple
    axes: object


@dataclass(frozen=True, eq=False)
class SkyPlot:
    """The figure and what it shows.

    Attributes
    ----------
    figure : matplotlib.figure.Figure
    panels : mapping of str to PanelData
        ``"allsky"`` always, ``"zoom"`` when a zoomed view is drawn.
    candidates : tuple of Candidate
        Sorted by rank, every rank filled in; rows of ``candidate_xy``.
    hosts : tuple of Host
        The hosts drawn (at most ``max_hosts``), by rank; rows of ``host_xy``.
    ranking : str
        ``"given"``, ``"p_assoc"`` or ``"credible_level"``: how candidates were ranked.
    levels : tuple of float
    area_deg2 : mapping of float to float
        Credible area of each level.
    zoom_note : str
        Why there is, or is not, a zoomed view.
    distance : DistancePanelData or None
        None when neither the map nor any candidate or host has a distance.
    title : str
    """

    figure: Figure
    panels: Mapping[str, PanelData]
    candidates: tuple[Candidate, ...]
    hosts: tuple[Host, ...]
    ranking: str
    levels: tuple[float, ...]
    area_deg2: Mapping[float, float]
    zoom_note: str
    distance: DistancePanelData | None
    title: str
    meta: Mapping[str, object] = field(default_factory=dict)


# ---------------------------------------------------------------------------- helpers
def error_circle_radius_deg(sigma_deg, containment: float = ERROR_CIRCLE_CONTAINMENT) -> np.ndarray:
    """Radius (deg) holding ``containment`` of a Fisher density with 1σ ``sigma_deg``.

    With ``κ = 1/σ²`` (σ in radians) the Fisher distribution has
    ``1 - cos θ_p = -ln(1 - p (1 - e^{-2κ})) / κ`` (Fisher 1953); for small σ this
    is the circular Gaussian's ``θ_p = σ √(-2 ln(1 - p))`` (2.146σ at p = 0.9).
    """
    sigma = np.radians(np.asarray(sigma_deg, dtype=float))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        kappa = 1.0 / sigma**2
        one_minus_cos = -np.log1p(-containment * -np.expm1(-2.0 * kappa)) / kappa
        theta = 2.0 * np.arcsin(np.sqrt(np.clip(one_minus_cos / 2.0, 0.0, 1.0)))
    return np.degrees(np.where(sigma > 0, theta, 0.0))


def _check_levels(levels) -> tuple[float, ...]:
    try:
        out = sorted({float(v) for v in levels})
    except (TypeError, ValueError):
        raise InputError(f"levels={levels!r} must be numbers in (0, 1)") from None
    if not out or any(not 0.0 < v < 1.0 for v in out):
        raise InputError(f"levels={levels!r} must be credible levels in (0, 1), e.g. (0.5, 0.9)")
    return tuple(out)


def _ranked_candidates(skymap: SkyMap, candidates: Sequence[Candidate]) -> tuple[tuple[Candidate, ...], str]:
    cands = list(candidates)
    for c in cands:
        if not isinstance(c, Candidate):
            raise InputError(f"candidates must be Candidate objects, got {type(c).__name__}")
    if not cands:
        return (), "given"
    if all(c.rank is not None for c in cands):
        ranks = [c.rank for c in cands]
        if len(set(ranks)) != len(ranks):
            raise InputError(f"candidate ranks must be distinct, got {sorted(ranks)}")
        return tuple(sorted(cands, key=lambda c: c.rank)), "given"
    if all(c.p_assoc is not None for c in cands):
        key = np.array([-c.p_assoc for c in cands])
        how = "p_assoc"
    else:
        key = skymap.credible_level(np.array([c.ra_deg for c in cands]), np.array([c.dec_deg for c in cands]))
        how = "credible_level"
    order = np.argsort(key, kind="stable")
    return tuple(replace(cands[i], rank=r + 1) for r, i in enumerate(order)), how


def _ranked_hosts(hosts: Sequence[Host], max_hosts: int) -> tuple[Host, ...]:
    hs = list(hosts)
    for h in hs:
        if not isinstance(h, Host):
            raise InputError(f"hosts must be Host objects, got {type(h).__name__}")
    if all(h.rank is not None for h in hs):
        hs.sort(key=lambda h: h.rank)
    elif all(h.p_host is not None for h in hs):
        hs.sort(key=lambda h: -h.p_host)
    hs = [replace(h, rank=h.rank if h.rank is not None else i + 1) for i, h in enumerate(hs)]
    return tuple(hs[: max(0, int(max_hosts))])


def _p_text(p: float | None) -> str:
    if p is None:
        return ""
    if 0.0 < p < 0.005:
        return " · P<0.01"
    return f" · P={p:.2f}"


def _xy(wcs: WCS, ra, dec) -> np.ndarray:
    x, y = world_to_pixel(wcs, ra, dec)
    return np.column_stack([x, y]) if x.size else np.zeros((0, 2))


def _images(skymap: SkyMap, wcs: WCS):
    """Density (deg**-2, NaN off the sky) and credible level (1 off the sky) at each image pixel."""
    ra, dec = pixel_centres_world(wcs)
    ok = np.isfinite(ra) & np.isfinite(dec)
    dens = np.full(ra.shape, np.nan)
    level = np.ones(ra.shape)
    idx = skymap.pixel_index(ra[ok], np.clip(dec[ok], -90.0, 90.0), checked=True)
    dens[ok] = skymap.probdensity[idx] / DEG2_PER_SR
    level[ok] = skymap.pixel_credible_level()[idx]
    return dens, level


def _contours(ax, level_img: np.ndarray, levels: tuple[float, ...]) -> dict[float, tuple[np.ndarray, ...]]:
    """Draw the credible contours; return their polylines per level (pixel coordinates)."""
    out: dict[float, tuple[np.ndarray, ...]] = {lv: () for lv in levels}
    lo, hi = float(np.min(level_img)), float(np.max(level_img))
    drawable = [lv for lv in levels if lo < lv < hi]
    for lv in drawable:
        style = pal.contour_style(lv)
        cs = ax.contour(level_img, levels=[lv], zorder=3, **style)
        cs.set_path_effects(pal.halo(style["linewidths"] + 2.0))
        out[lv] = tuple(np.asarray(seg, float) for seg in cs.allsegs[0] if len(seg) >= 2)
    return out


_LABEL_OFFSETS = (((7, 5), "left"), ((7, -12), "left"), ((-7, 5), "right"), ((-7, -12), "right"),
                  ((7, 16), "left"), ((7, -23), "left"))


def _label_offset(ax, x: float, y: float, placed: list):
    """First offset (points) whose label box does not fall on an earlier label (greedy, in display space)."""
    px, py = ax.transData.transform((x, y))
    scale = ax.figure.dpi / 72.0
    box = ax.bbox
    for (dx, dy), ha in _LABEL_OFFSETS:
        lx = px + dx * scale + (0.0 if ha == "left" else -60.0 * scale)
        ly = py + dy * scale
        if lx < box.x0 or lx + 60.0 * scale > box.x1 or ly < box.y0 or ly + 10.0 * scale > box.y1:
            continue
        if all(abs(lx - qx) > 62.0 * scale or abs(ly - qy) > 11.0 * scale for qx, qy in placed):
            placed.append((lx, ly))
            return (dx, dy), ha
    placed.append((px + 7 * scale, py + 5 * scale))
    return _LABEL_OFFSETS[0]


def _polyline(ax, wcs: WCS, ra, dec, max_jump: float, **style):
    x, y = world_to_pixel(wcs, ra, dec)
    x, y = break_at_jumps(x, y, max_jump)
    (line,) = ax.plot(x, y, **style)
    return line


def _sky_panel(ax, wcs: WCS, name: str, skymap: SkyMap, levels, norm, cands, hosts, *, label_ids, label_hosts,
               max_jump):
    dens, level = _images(skymap, wcs)
    ax.imshow(dens, origin="lower", cmap=pal.SKY_CMAP, norm=norm, interpolation="nearest", zorder=1)
    contours = _contours(ax, level, levels)

    c_xy = _xy(wcs, [c.ra_deg for c in cands], [c.dec_deg for c in cands])
    h_xy = _xy(wcs, [h.ra_deg for h in hosts], [h.dec_deg for h in hosts])

    for c in cands:
        if c.err_deg:
            r = float(error_circle_radius_deg(c.err_deg))
            cra, cdec = small_circle(c.ra_deg, c.dec_deg, r)
            line = _polyline(ax, wcs, cra, cdec, max_jump, zorder=4, **pal.ERROR_CIRCLE)
            line.set_path_effects(pal.halo(pal.ERROR_CIRCLE["linewidth"] + 1.6))

    if len(hosts):
        sc = ax.scatter(h_xy[:, 0], h_xy[:, 1], s=pal.HOST["size"], marker=pal.HOST["marker"],
                        facecolors=pal.HOST["face"], edgecolors=pal.HOST["edge"], linewidths=1.2, zorder=5)
        sc.set_path_effects(pal.halo(2.4))
        for h, (x, y) in zip(hosts, h_xy):
            if label_hosts and h.rank is not None and h.rank <= _HOSTS_LABELLED and np.isfinite(x):
                ax.annotate(f"g{h.rank}", (x, y), xytext=(5, -9), textcoords="offset points", fontsize=7,
                            fontstyle="italic", color=pal.HOST["edge"], zorder=6, path_effects=pal.halo(2.2),
                            annotation_clip=True)

    labelled = []
    if len(cands):
        big = np.array([c.transient_id in (label_ids or ()) for c in cands])
        sizes = np.where(big, pal.CANDIDATE["size"], pal.CANDIDATE["small"])
        sc = ax.scatter(c_xy[:, 0], c_xy[:, 1], s=sizes, marker=pal.CANDIDATE["marker"],
                        facecolors=pal.CANDIDATE["face"], edgecolors=pal.CANDIDATE["edge"], linewidths=0.9,
                        zorder=7)
        sc.set_path_effects(pal.halo(2.4))
        ny, nx = dens.shape
        placed: list[tuple[float, float]] = []
        for c, (x, y), lab in zip(cands, c_xy, big):
            if not lab or not (np.isfinite(x) and -0.5 <= x <= nx - 0.5 and -0.5 <= y <= ny - 0.5):
                continue
            (dx, dy), ha = _label_offset(ax, x, y, placed)
            ax.annotate(f"{c.rank}{_p_text(c.p_assoc)}", (x, y), xytext=(dx, dy), textcoords="offset points",
                        ha=ha, fontsize=8.5, fontweight="bold", color=pal.INK, zorder=8,
                        path_effects=pal.halo(2.6), annotation_clip=True)
            labelled.append(c.transient_id)

    # Markers outside the image must not widen the view (autoscaling would).
    ny, nx = dens.shape
    ax.set_xlim(-0.5, nx - 0.5)
    ax.set_ylim(-0.5, ny - 0.5)
    for coord in (ax.coords[0], ax.coords[1]):
        coord.set_major_formatter("d" if name == "allsky" else "d.d")
        coord.set_ticklabel(size=7.5, color="#3b3848")
    if name == "allsky":  # axis titles would sit in the middle of the map; the panel title says it
        ax.coords[0].set_axislabel("")
        ax.coords[1].set_axislabel("")
    else:
        ax.coords[0].set_axislabel("RA (deg)", size=8.5)
        ax.coords[1].set_axislabel("Dec (deg)", size=8.5)
    ax.coords.grid(True, color="#8d8a99", alpha=0.55, linestyle="-", linewidth=0.5)
    return PanelData(name, wcs, contours, c_xy, h_xy, tuple(labelled), ax)


def _distance_panel(ax, skymap: SkyMap, cands, hosts, max_labels: int) -> DistancePanelData:
    objs = [("candidate", c.transient_id, c.rank, c.distance_mpc, c.distance_err_mpc) for c in cands
            if c.distance_mpc is not None][:max_labels]
    objs += [("host", h.galaxy_id, h.rank, h.distance_mpc, h.distance_err_mpc) for h in hosts
             if h.distance_mpc is not None][:_HOSTS_LABELLED]
    far = [d + 2.0 * (e or 0.0) for _, _, _, d, e in objs]
    rmax = 1.08 * max(far) if far else 0.0
    marginal = los = None
    los_id = None
    if skymap.has_distance:
        mean, std = skymap.distance_marginal()
        rmax = max(rmax, mean + 4.0 * std)
    r = np.linspace(0.0, rmax, 500)
    peak = 1.0
    if skymap.has_distance:
        marginal = skymap.distance_marginal_pdf(r)
        peak = float(np.max(marginal)) or 1.0
        ax.fill_between(r, marginal, color=pal.SKY_CMAP(0.35), alpha=0.85, linewidth=0, zorder=1)
        mean, std = skymap.distance_marginal()
        ax.plot(r, marginal, color=pal.INK, linewidth=1.5, zorder=2,
                label=f"sky-marginal ({mean:,.0f} ± {std:,.0f} Mpc, mean ± std)")
        if cands:
            # Arrays, not scalars: SkyMap lookups take arrays of positions.
            mu, sg, nm = (float(a[0]) for a in skymap.distance_parameters([cands[0].ra_deg], [cands[0].dec_deg]))
            if np.isfinite(mu) and nm > 0:
                los = _dist.conditional_pdf(r, mu, sg, nm)
                los_id = cands[0].transient_id
                ax.plot(r, los, zorder=3, label=f"along the line of sight of #{cands[0].rank}", **pal.LINE_OF_SIGHT)
                peak = max(peak, float(np.max(los)))
    rows = []
    base = 1.12 * peak if skymap.has_distance else 0.0
    step = (0.1 if skymap.has_distance else 1.0) * peak
    for k, (kind, ident, rank, d, e) in enumerate(objs):
        y = base + k * step
        style = pal.CANDIDATE if kind == "candidate" else pal.HOST
        ax.errorbar([d], [y], xerr=None if e is None else [e], fmt="none", ecolor=style["edge"], elinewidth=1.1,
                    capsize=2.5, zorder=4)
        ax.scatter([d], [y], s=style["size"] * (0.7 if kind == "candidate" else 1.0), marker=style["marker"],
                   facecolors=style["face"], edgecolors=style["edge"], linewidths=1.0, zorder=5)
        ax.annotate(f"{'' if kind == 'candidate' else 'g'}{rank}", (d, y), xytext=(6, 3),
                    textcoords="offset points", fontsize=7.5, color=pal.INK, zorder=6)
        rows.append((kind, ident, float(d), e, float(y)))
    top = base + max(len(objs), 1) * step
    ax.set_xlim(0.0, rmax if rmax > 0 else 1.0)
    ax.set_ylim(0.0, top if objs else 1.08 * peak)
    ax.set_xlabel("luminosity distance (Mpc)", fontsize=8.5)
    if skymap.has_distance:
        ax.set_ylabel("probability per Mpc", fontsize=8.5)
        ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=7, frameon=False, ncol=1,
                  borderaxespad=0.2)
    else:
        ax.set_yticks([])
        ax.text(0.5, 0.9, "no distance layers in this localization", transform=ax.transAxes, ha="center",
                fontsize=8, color="#5e5a6e")
    ax.tick_params(labelsize=7.5)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    return DistancePanelData(r, marginal, los, los_id, tuple(rows), ax)


def _note(fig, rect, text: str):
    ax = fig.add_axes(rect)
    ax.set_axis_off()
    ax.text(0.5, 0.5, textwrap.fill(text, 48), ha="center", va="center", fontsize=9, color="#5e5a6e",
            transform=ax.transAxes)
    return ax


def _legend_handles(cands, hosts, levels, ranking: str, with_errors: bool):
    handles = []
    for lv in levels:
        st = pal.contour_style(lv)
        handles.append(Line2D([], [], color=st["colors"], linestyle=st["linestyles"], linewidth=st["linewidths"],
                              label=f"{lv:.0%} credible region"))
    if cands:
        how = {"given": "", "p_assoc": " (by P_assoc)", "credible_level": " (by credible level: not scored)"}[ranking]
        with_p = any(c.p_assoc is not None for c in cands)
        handles.append(Line2D([], [], linestyle="none", marker=pal.CANDIDATE["marker"], markersize=11,
                              markerfacecolor=pal.CANDIDATE["face"], markeredgecolor=pal.CANDIDATE["edge"],
                              label=f"candidate: rank{' · P_assoc' if with_p else ''}{how}"))
        if with_errors:
            handles.append(Line2D([], [], label=f"error circle ({ERROR_CIRCLE_CONTAINMENT:.0%} containment)",
                                  **pal.ERROR_CIRCLE))
    if hosts:
        handles.append(Line2D([], [], linestyle="none", marker=pal.HOST["marker"], markersize=6,
                              markerfacecolor=pal.HOST["face"], markeredgecolor=pal.HOST["edge"],
                              label=f"host galaxy (top {len(hosts)}, g = rank)"))
    return handles


# ------------------------------------------------------------------------------- main
def plot_localization(
    skymap: SkyMap,
    *,
    candidates: Sequence[Candidate] = (),
    hosts: Sequence[Host] = (),
    event: EventInfo | None = None,
    levels: Sequence[float] = (0.5, 0.9),
    zoom: bool | None = None,
    zoom_max_area_deg2: float = ZOOM_MAX_AREA_DEG2,
    center_ra_deg: float | None = None,
    max_labels: int = 10,
    max_hosts: int = 10,
    figsize: tuple[float, float] = (11.0, 8.5),
    dpi: float = 100.0,
    allsky_width_px: int = 1200,
    zoom_size_px: int = 500,
) -> SkyPlot:
    """Draw the sky plot of one localization with its candidates and hosts.

    Parameters
    ----------
    skymap : SkyMap
    candidates : sequence of Candidate
        Reported transients; ranked as described in the module docstring.
    hosts : sequence of Host
        Host galaxies; the first ``max_hosts`` by rank (or ``p_host``) are drawn.
    event : EventInfo, optional
        Title facts; default: the map's ``OBJECT`` and ``DATE-OBS``.
    levels : sequence of float
        Credible levels to contour, each in (0, 1).
    zoom : bool or None
        None: zoom when the 90% region is small (see :data:`ZOOM_MAX_AREA_DEG2`,
        :data:`ZOOM_MAX_RADIUS_DEG`); True forces a zoom (still limited to 35°
        radius), False never zooms.
    zoom_max_area_deg2 : float, deg²
    center_ra_deg : float, optional, deg
        RA at the centre of the all-sky view (default: the 90% region's, rounded to 15°).
    max_labels : int
        Candidates labelled (by rank); the others get smaller unlabelled stars.
    max_hosts : int
    figsize : (float, float), inches
    dpi : float
        The figure is ``figsize × dpi`` pixels when rendered to PNG.
    allsky_width_px, zoom_size_px : int
        Sampling of the map images (the all-sky image is 2:1).

    Returns
    -------
    SkyPlot

    Raises
    ------
    InputError
        A bad level, candidate, host or option.
    """
    if not isinstance(skymap, SkyMap):
        raise InputError(f"plot_localization: skymap must be a SkyMap, got {type(skymap).__name__}")
    levels = _check_levels(levels)
    if not 0 < max_labels <= 100:
        raise InputError(f"max_labels={max_labels!r} must be between 1 and 100")
    cands, ranking = _ranked_candidates(skymap, candidates)
    host_list = _ranked_hosts(hosts, max_hosts)
    event = event or EventInfo.from_meta(skymap.meta)
    areas = dict(zip(levels, (float(a) for a in skymap.credible_areas(list(levels)))))

    c_ra, c_dec, radius = region_centre(skymap, ZOOM_LEVEL)
    area_zoom = float(skymap.credible_areas([ZOOM_LEVEL])[0])
    if zoom is False:
        do_zoom, note = False, "zoomed view turned off"
    elif radius > ZOOM_MAX_RADIUS_DEG:
        do_zoom = False
        note = (f"No zoomed view: the {ZOOM_LEVEL:.0%} region reaches {radius:.0f}° from its centre "
                f"(a gnomonic chart is drawn up to {ZOOM_MAX_RADIUS_DEG:.0f}°).")
    elif zoom is None and area_zoom >= zoom_max_area_deg2:
        do_zoom = False
        note = (f"No zoomed view: the {ZOOM_LEVEL:.0%} region covers {area_zoom:,.0f} deg² "
                f"(zoomed below {zoom_max_area_deg2:,.0f} deg²).")
    else:
        do_zoom = True
        note = f"zoom centred on RA {c_ra:.2f}°, Dec {c_dec:+.2f}°, half-width {_ZOOM_MARGIN * radius:.2f}°"

    fig = Figure(figsize=figsize, dpi=dpi, facecolor="white")
    FigureCanvasAgg(fig)
    vmax = float(np.max(skymap.probdensity)) / DEG2_PER_SR
    norm = Normalize(vmin=0.0, vmax=vmax)
    label_ids = {c.transient_id for c in cands[:max_labels]}

    panels: dict[str, PanelData] = {}
    zoom_wcs = None
    if do_zoom:
        half = max(_ZOOM_MARGIN * radius, _ZOOM_MIN_HALF_WIDTH_DEG)
        zoom_wcs = gnomonic_wcs(zoom_size_px, c_ra, c_dec, half)
        zax = fig.add_axes([0.075, 0.065, 0.34, 0.34], projection=zoom_wcs)
        panels["zoom"] = _sky_panel(zax, zoom_wcs, "zoom", skymap, levels, norm, cands, host_list,
                                    label_ids=label_ids, label_hosts=True, max_jump=np.inf)
        zax.set_title("zoom (gnomonic)", fontsize=8.5, color="#3b3848", loc="left")
    else:
        _note(fig, [0.05, 0.08, 0.40, 0.30], note)

    ra0 = (round(c_ra / 15.0) * 15.0) % 360.0 if center_ra_deg is None else float(center_ra_deg)
    sky_wcs = allsky_wcs(allsky_width_px, ra0)
    sax = fig.add_axes([0.03, 0.47, 0.94, 0.43], projection=sky_wcs, frame_class=EllipticalFrame)
    # Label in the all-sky view the candidates that the zoom does not show.
    if do_zoom:
        zoom_panel = panels["zoom"]
        shown = zoom_panel.in_view(zoom_panel.candidate_xy)
        sky_labels = {c.transient_id for c, s in zip(cands, shown) if not s} & label_ids
    else:
        sky_labels = label_ids
    panels["allsky"] = _sky_panel(sax, sky_wcs, "allsky", skymap, levels, norm, cands, host_list,
                                  label_ids=sky_labels, label_hosts=not do_zoom, max_jump=allsky_width_px / 4.0)
    sax.coords[0].set_ticks(spacing=30 * u.deg)
    sax.coords[1].set_ticks(spacing=30 * u.deg)
    if zoom_wcs is not None:
        nx = zoom_size_px
        edge = np.concatenate([
            np.column_stack([np.linspace(-0.5, nx - 0.5, 50), np.full(50, -0.5)]),
            np.column_stack([np.full(50, nx - 0.5), np.linspace(-0.5, nx - 0.5, 50)]),
            np.column_stack([np.linspace(nx - 0.5, -0.5, 50), np.full(50, nx - 0.5)]),
            np.column_stack([np.full(50, -0.5), np.linspace(nx - 0.5, -0.5, 50)]),
        ])
        era, edec = zoom_wcs.wcs_pix2world(edge[:, 0], edge[:, 1], 0)
        _polyline(sax, sky_wcs, np.mod(era, 360.0), edec, allsky_width_px / 4.0, zorder=2, **pal.FOOTPRINT)

    cax = fig.add_axes([0.36, 0.445, 0.28, 0.014])
    cb = fig.colorbar(ScalarMappable(norm=norm, cmap=pal.SKY_CMAP), cax=cax, orientation="horizontal")
    cb.set_label("probability per deg²", fontsize=8)
    cb.ax.tick_params(labelsize=7)
    cb.formatter.set_powerlimits((-4, 4))

    with_errors = any(c.err_deg for c in cands)
    handles = _legend_handles(cands, host_list, levels, ranking, with_errors)
    # Top right, beside the title: the corners outside the ellipse stay clear for grid labels.
    fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(0.995, 0.995), fontsize=7.5, frameon=True,
               framealpha=0.92, edgecolor="#cfcbd9")
    sax.set_title("all sky (Mollweide, RA and Dec in degrees)", fontsize=8.5, color="#3b3848", loc="left")

    has_dist = skymap.has_distance or any(c.distance_mpc for c in cands) or any(h.distance_mpc for h in host_list)
    dist = None
    if has_dist:
        dax = fig.add_axes([0.53, 0.075, 0.43, 0.30])
        dist = _distance_panel(dax, skymap, cands, host_list, max_labels)
        dax.set_title("distance", fontsize=8.5, color="#3b3848", loc="left")
    else:
        _note(fig, [0.53, 0.08, 0.43, 0.30], "No distance information: the localization has no distance "
                                             "layers and no candidate or host has a distance.")

    title = event.title(skymap.source)
    fig.suptitle(title, x=0.03, y=0.975, ha="left", fontsize=13, fontweight="bold", color=pal.INK)
    facts = [f"{lv:.0%} area {areas[lv]:,.0f} deg²" if areas[lv] >= 10 else f"{lv:.0%} area {areas[lv]:.1f} deg²"
             for lv in levels]
    if skymap.has_distance:
        mean, std = skymap.distance_marginal()
        facts.append(f"distance {mean:,.0f} ± {std:,.0f} Mpc")
    facts.append(f"{len(cands)} candidate{'s' if len(cands) != 1 else ''}")
    if host_list:
        facts.append(f"top {len(host_list)} host{'s' if len(host_list) != 1 else ''}")
    fig.text(0.03, 0.937, "   ·   ".join(facts), ha="left", fontsize=9, color="#3b3848")
    return SkyPlot(fig, panels, cands, host_list, ranking, levels, areas, note, dist, title,
                   dict(skymap.meta))


def figure_bytes(figure: Figure, fmt: str) -> bytes:
    """Render a figure to PNG, PDF or SVG bytes in memory (the caller writes the file).

    Raises
    ------
    InputError
        An unsupported format.
    """
    fmt = fmt.lower().lstrip(".")
    if fmt not in FIGURE_FORMATS:
        raise InputError(f"figure format {fmt!r} is not one of {', '.join(FIGURE_FORMATS)}")
    buf = io.BytesIO()
    meta = {"Creator": "matcher"} if fmt in ("png", "pdf") else None
    figure.savefig(buf, format=fmt, dpi=figure.dpi, facecolor=figure.get_facecolor(), metadata=meta)
    return buf.getvalue()
