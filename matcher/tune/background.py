"""What the archive itself says about a class's background: footprint, live time, cadence, rate.

Pure computation on report columns (no files).

**Footprint.** The sky the stream covered is estimated as the HEALPix cells
(NESTED, at one order) that hold at least one report of the class. The order
is the finest in ``[0, MAX_FOOTPRINT_ORDER]`` at which the occupied cells hold
on average at least :data:`MIN_REPORTS_PER_CELL` reports: a uniformly covered
cell is then empty by chance with probability ``≲ e^-20``, so holes are real
holes. Cells on the footprint's edge count whole (the area is biased high by
about half the edge cells; finer orders shrink that but need more reports).
A class with too few reports to map at order 0 is taken to cover the whole
sky (said in the output): sparse classes are usually all-sky monitors.

**Live time.** From the first to the last report of the class, minus
silences longer than ``outage_gap_s`` (default :data:`OUTAGE_GAP_FACTOR` times
the mean spacing of distinct report times, which a Poisson stream exceeds
with probability ``e^-20``): those are outages, not quiet spells.

**Rate.** For a sharp class, ``(N - S) / (A · T)`` per deg² per day, with
``N`` reports in ``S`` live segments (each segment's first report starts its
clock), ``A`` the footprint (deg²) and ``T`` the live time (days). For a
bracketed class (a survey) a report counts the transients that appeared since
the previous visit of its place, and visits that found nothing leave no trace,
so the exposure is taken per cell between two epochs that do not depend on
the counts inside: from the cell's first report epoch to the last non-detection
of its last report. The reports strictly between the first and the last report
epochs appeared in exactly that time (the visits before and after are
conditioned on having a report; the ones between are not), so the rate is
their number over ``Σ cell area × that time``. Poisson errors: ``√count`` over
the exposure.

**Coverage (for injections).** A bracketed class (a survey) observed a cell at
the *epochs* its reports there carry: their first detections and last
non-detections. A counterpart with onset ``t`` in that cell is reported at the
first epoch at or after ``t``, with the epoch before ``t`` as its last
non-detection. A sharp class (a trigger) reports a counterpart at its onset
when the position is in the footprint and the stream was live.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import healpy as hp
import numpy as np

from matcher.coincidence.classes import DEG2_PER_SR, SECONDS_PER_DAY, CounterpartClass

__all__ = [
    "Footprint",
    "LiveTime",
    "Cadence",
    "TriggerCoverage",
    "MeasuredRate",
    "estimate_footprint",
    "live_time",
    "cadence_from_reports",
    "measure_rate",
    "survey_exposure",
    "brackets_s",
    "MIN_REPORTS_PER_CELL",
    "MAX_FOOTPRINT_ORDER",
    "OUTAGE_GAP_FACTOR",
]

#: Mean reports per occupied cell needed to trust a footprint order.
MIN_REPORTS_PER_CELL = 20
#: Finest order the automatic footprint uses (cells of 0.84 deg²).
MAX_FOOTPRINT_ORDER = 6
#: A silence longer than this many mean spacings is an outage.
OUTAGE_GAP_FACTOR = 20.0


def _cells(ra_deg, dec_deg, order: int) -> np.ndarray:
    theta = np.radians(90.0 - np.asarray(dec_deg, dtype=np.float64))
    phi = np.radians(np.asarray(ra_deg, dtype=np.float64))
    return hp.ang2pix(1 << order, theta, phi, nest=True).astype(np.int64)


@dataclass(frozen=True, eq=False)
class Footprint:
    """The sky a class's stream covered.

    Attributes
    ----------
    order : int
        HEALPix order of the cells (NESTED).
    cells : ndarray of int
        Sorted occupied cells (all cells when ``all_sky``).
    all_sky : bool
        True when the class had too few reports to map and the whole sky is assumed.
    method : str
        One line saying how it was estimated.
    """

    order: int
    cells: np.ndarray
    all_sky: bool
    method: str

    @property
    def cell_area_deg2(self) -> float:
        return float(hp.nside2pixarea(1 << self.order) * DEG2_PER_SR)

    @property
    def area_deg2(self) -> float:
        return float(self.cells.size * self.cell_area_deg2)

    def cell_of(self, ra_deg, dec_deg) -> np.ndarray:
        return _cells(ra_deg, dec_deg, self.order)

    def contains(self, ra_deg, dec_deg) -> np.ndarray:
        if self.all_sky:
            return np.ones(np.shape(ra_deg), dtype=bool)
        c = self.cell_of(ra_deg, dec_deg)
        k = np.searchsorted(self.cells, c)
        k = np.minimum(k, self.cells.size - 1)
        return self.cells[k] == c


def estimate_footprint(ra_deg, dec_deg, *, order: int | None = None,
                       min_per_cell: float = MIN_REPORTS_PER_CELL,
                       max_order: int = MAX_FOOTPRINT_ORDER) -> Footprint:
    """Occupied HEALPix cells (see the module docstring for the choice of order).

    Parameters
    ----------
    ra_deg, dec_deg : array_like, deg
        Report positions of one class.
    order : int, optional
        Use this order (no automatic choice, never all-sky).
    min_per_cell : float
        Mean reports per occupied cell the automatic order needs.
    max_order : int
        Finest order tried automatically.
    """
    ra = np.asarray(ra_deg, dtype=np.float64)
    n = ra.size
    if order is not None:
        cells = np.unique(_cells(ra, dec_deg, order))
        return Footprint(order, cells, False, f"cells of order {order} with at least one report (configured order)")
    for o in range(max_order, -1, -1):
        cells = np.unique(_cells(ra, dec_deg, o))
        if cells.size and n / cells.size >= min_per_cell:
            return Footprint(o, cells, False,
                             f"cells of order {o} ({hp.nside2pixarea(1 << o) * DEG2_PER_SR:.3g} deg²) with at least "
                             f"one report; the finest order whose occupied cells hold >= {min_per_cell:g} reports "
                             f"on average ({n / cells.size:.1f})")
    return Footprint(0, np.arange(12, dtype=np.int64), True,
                     f"whole sky assumed: {n} reports are too few to map (fewer than {min_per_cell:g} per "
                     "order-0 cell)")


@dataclass(frozen=True, eq=False)
class LiveTime:
    """When a class's stream was live.

    Attributes
    ----------
    start_s, end_s : float, GPS s
        First and last report.
    starts_s, ends_s : ndarray, GPS s
        Live segments (separated by outages).
    gap_s : float, s
        A silence longer than this is an outage.
    """

    start_s: float
    end_s: float
    starts_s: np.ndarray
    ends_s: np.ndarray
    gap_s: float

    @property
    def live_s(self) -> float:
        return float(np.sum(self.ends_s - self.starts_s))

    @property
    def segments(self) -> int:
        return int(self.starts_s.size)

    def is_live(self, t) -> np.ndarray:
        """True where ``t`` (GPS s) lies inside a live segment (ends included)."""
        t = np.asarray(t, dtype=np.float64)
        k = np.searchsorted(self.starts_s, t, side="right") - 1
        ok = k >= 0
        kk = np.maximum(k, 0)
        return ok & (t <= self.ends_s[kk])


def live_time(times_s, outage_gap_s: float | None = None) -> LiveTime:
    """Live segments of a stream from its report times (GPS s; see the module docstring)."""
    t = np.unique(np.asarray(times_s, dtype=np.float64))  # reports of one visit share a time: count it once
    if t.size == 0:
        raise ValueError("live_time needs at least one report time")
    span = float(t[-1] - t[0])
    if outage_gap_s is None:
        outage_gap_s = OUTAGE_GAP_FACTOR * span / max(t.size - 1, 1) if t.size > 1 else math.inf
    gaps = np.flatnonzero(np.diff(t) > outage_gap_s)
    starts = np.concatenate([[t[0]], t[gaps + 1]])
    ends = np.concatenate([t[gaps], [t[-1]]])
    return LiveTime(float(t[0]), float(t[-1]), starts, ends, float(outage_gap_s))


@dataclass(frozen=True)
class MeasuredRate:
    """A class's empirical background rate.

    Attributes
    ----------
    reports : int
    rate_per_deg2_per_day, err_per_deg2_per_day : float, deg**-2 day**-1
    footprint_deg2 : float, deg²
    live_days : float, day
    configured_per_deg2_per_day : float, deg**-2 day**-1
    """

    reports: int
    rate_per_deg2_per_day: float
    err_per_deg2_per_day: float
    footprint_deg2: float
    live_days: float
    configured_per_deg2_per_day: float

    @property
    def ratio_to_configured(self) -> float:
        return self.rate_per_deg2_per_day / self.configured_per_deg2_per_day

    @property
    def z_vs_configured(self) -> float:
        """(measured - configured) / error; NaN when the error is zero."""
        if not self.err_per_deg2_per_day > 0:
            return float("nan")
        return (self.rate_per_deg2_per_day - self.configured_per_deg2_per_day) / self.err_per_deg2_per_day


def survey_exposure(footprint: Footprint, ra_deg, dec_deg, time_s, last_nondetection_s) -> tuple[int, float]:
    """``(count, exposure in deg²·day)`` of a bracketed class (see *Rate* in the module docstring)."""
    t = np.asarray(time_s, dtype=np.float64)
    lnd = np.asarray(last_nondetection_s, dtype=np.float64)
    c = footprint.cell_of(ra_deg, dec_deg)
    order = np.lexsort((t, c))
    c, t, lnd = c[order], t[order], lnd[order]
    start = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    end = np.r_[start[1:], c.size]  # exclusive
    first_t = t[start]
    last_t = t[end - 1]
    # The last report's last non-detection; where it has none, the latest earlier epoch of the cell.
    last_lnd = lnd[end - 1].copy()
    missing = ~np.isfinite(last_lnd)
    if np.any(missing):
        for k in np.flatnonzero(missing):
            seg_t = t[start[k]:end[k]]
            seg_l = lnd[start[k]:end[k]]
            before = np.concatenate([seg_t[seg_t < last_t[k]], seg_l[np.isfinite(seg_l) & (seg_l < last_t[k])]])
            last_lnd[k] = before.max() if before.size else first_t[k]
    cell_of_row = np.repeat(np.arange(start.size), end - start)
    inner = (t > first_t[cell_of_row]) & (t < last_t[cell_of_row])
    span = np.maximum(last_lnd - first_t, 0.0)
    return int(inner.sum()), float(footprint.cell_area_deg2 * span.sum() / SECONDS_PER_DAY)


def measure_rate(n_reports: int, footprint: Footprint, live: LiveTime, klass: CounterpartClass,
                 survey: tuple[int, float] | None = None) -> MeasuredRate:
    """The class's rate and its Poisson error (see the module docstring).

    ``survey``: ``(count, exposure)`` from :func:`survey_exposure` for a bracketed class
    whose footprint is mapped; otherwise footprint area times live time.
    """
    area = footprint.area_deg2
    days = live.live_s / SECONDS_PER_DAY
    if survey is not None and not footprint.all_sky:
        k, exposure = survey
    else:
        exposure = area * days
        k = max(int(n_reports) - live.segments, 0)
    if not exposure > 0:
        rate = err = float("nan")
    else:
        rate = k / exposure
        err = math.sqrt(max(k, 1)) / exposure
    return MeasuredRate(int(n_reports), rate, err, area, days, klass.rate_per_deg2_per_day)


def brackets_s(klass: CounterpartClass, time_s, last_nondetection_s) -> np.ndarray:
    """Bracket length (s) the engine uses: 0 for a sharp class, else time minus last
    non-detection, or the class cadence where none is given."""
    t = np.asarray(time_s, dtype=np.float64)
    if klass.sharp_time:
        return np.zeros(t.shape)
    lnd = np.asarray(last_nondetection_s, dtype=np.float64)
    return np.maximum(np.where(np.isfinite(lnd), t - lnd, float(klass.cadence_s)), 0.0)


@dataclass(frozen=True, eq=False)
class Cadence:
    """Epochs at which a survey looked at each footprint cell (CSR layout).

    Attributes
    ----------
    footprint : Footprint
    cells : ndarray of int
        Sorted cells with epochs.
    offsets : ndarray of int
        ``epochs[offsets[i]:offsets[i+1]]`` belong to ``cells[i]``.
    epochs_s : ndarray, GPS s
        Sorted within each cell.
    """

    footprint: Footprint
    cells: np.ndarray
    offsets: np.ndarray
    epochs_s: np.ndarray

    def observe(self, ra_deg, dec_deg, onset_s):
        """Report time and last non-detection (GPS s) of counterparts with these onsets.

        Returns
        -------
        observed : ndarray of bool
            An epoch at or after the onset exists in the counterpart's cell.
        time_s, last_nondetection_s : ndarray, GPS s
            First epoch at or after the onset; the epoch before the onset (NaN if none).
            Both NaN where not observed.
        """
        t_on = np.asarray(onset_s, dtype=np.float64)
        c = self.footprint.cell_of(ra_deg, dec_deg)
        if self.cells.size == 0:
            nan = np.full(t_on.size, np.nan)
            return np.zeros(t_on.size, dtype=bool), nan, nan.copy()
        k = np.minimum(np.searchsorted(self.cells, c), self.cells.size - 1)
        has = self.cells[k] == c
        lo = np.where(has, self.offsets[k], 0)
        hi = np.where(has, self.offsets[k + 1], 0)
        # Epochs of cell k occupy [lo, hi): group the queries by cell (few distinct cells per
        # alert) and search each group in its own slice.
        pos = np.zeros(t_on.size, dtype=np.int64)
        rows = np.flatnonzero(has)
        if rows.size:
            order = rows[np.argsort(k[rows], kind="stable")]
            ks = k[order]
            for grp in np.split(np.arange(ks.size), np.flatnonzero(np.diff(ks)) + 1):
                cell_i = int(ks[grp[0]])
                a, b = int(self.offsets[cell_i]), int(self.offsets[cell_i + 1])
                q = order[grp]
                pos[q] = a + np.searchsorted(self.epochs_s[a:b], t_on[q], side="left")
        observed = has & (pos < hi)
        t_det = np.full(t_on.size, np.nan)
        lnd = np.full(t_on.size, np.nan)
        t_det[observed] = self.epochs_s[pos[observed]]
        before = observed & (pos > lo)
        lnd[before] = self.epochs_s[pos[before] - 1]
        return observed, t_det, lnd


def cadence_from_reports(footprint: Footprint, ra_deg, dec_deg, time_s, last_nondetection_s) -> Cadence:
    """Per-cell epochs from a bracketed class's reports (first detections and last non-detections)."""
    t = np.asarray(time_s, dtype=np.float64)
    lnd = np.asarray(last_nondetection_s, dtype=np.float64)
    c = footprint.cell_of(ra_deg, dec_deg)
    has_lnd = np.isfinite(lnd)
    cells = np.concatenate([c, c[has_lnd]])
    epochs = np.concatenate([t, lnd[has_lnd]])
    order = np.lexsort((epochs, cells))
    cells, epochs = cells[order], epochs[order]
    keep = np.ones(cells.size, dtype=bool)
    keep[1:] = (cells[1:] != cells[:-1]) | (epochs[1:] != epochs[:-1])
    cells, epochs = cells[keep], epochs[keep]
    uc, start = np.unique(cells, return_index=True)
    offsets = np.append(start, cells.size).astype(np.int64)
    return Cadence(footprint, uc, offsets, epochs)


@dataclass(frozen=True, eq=False)
class TriggerCoverage:
    """Coverage of a sharp class: the footprint while the stream was live."""

    footprint: Footprint
    live: LiveTime

    def observe(self, ra_deg, dec_deg, onset_s):
        """``(observed, time_s, last_nondetection_s)``: reported at the onset where covered (no bracket)."""
        t_on = np.asarray(onset_s, dtype=np.float64)
        observed = self.footprint.contains(ra_deg, dec_deg) & self.live.is_live(t_on)
        return observed, np.where(observed, t_on, np.nan), np.full(t_on.size, np.nan)
