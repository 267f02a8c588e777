"""Columnar reports: many transient reports as numpy arrays, validated once.

The engine works on a :class:`ReportBatch`; :meth:`ReportBatch.from_reports`
builds one from validated :class:`~matcher.streams.messages.TransientReport`
messages, :meth:`ReportBatch.from_arrays` from columns (a store query, a
benchmark). Absent optional values are NaN. Times are GPS seconds.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from matcher.errors import InputError

__all__ = ["ReportBatch", "REPORT_NUMBERS"]

_FLOAT_COLUMNS = ("ra_deg", "dec_deg", "time", "pos_err_deg", "last_nondetection", "redshift",
                  "redshift_err", "distance_mpc", "distance_err_mpc")
#: The numeric columns of a report, in the order :meth:`ReportBatch.from_reports` takes them.
REPORT_NUMBERS = _FLOAT_COLUMNS


def _ro(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.flags.writeable = False
    return a


@dataclass(frozen=True, eq=False)
class ReportBatch:
    """Reports as read-only columns (one row per report).

    Attributes
    ----------
    transient_id : ndarray of str
    klass : ndarray of str
        Counterpart class of each report.
    ra_deg, dec_deg : ndarray, deg
    time : ndarray, GPS s
        Trigger time (sharp classes) or first detection.
    pos_err_deg : ndarray, deg
        1σ Gaussian position error; NaN → the class default.
    last_nondetection : ndarray, GPS s
        NaN → the class cadence before ``time``.
    redshift, redshift_err, distance_mpc, distance_err_mpc : ndarray
        NaN where absent.
    """

    transient_id: np.ndarray
    klass: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    time: np.ndarray
    pos_err_deg: np.ndarray
    last_nondetection: np.ndarray
    redshift: np.ndarray
    redshift_err: np.ndarray
    distance_mpc: np.ndarray
    distance_err_mpc: np.ndarray

    def __len__(self) -> int:
        return int(self.ra_deg.size)

    @classmethod
    def from_arrays(cls, transient_id, klass, ra_deg, dec_deg, time, *, pos_err_deg=None,
                    last_nondetection=None, redshift=None, redshift_err=None, distance_mpc=None,
                    distance_err_mpc=None) -> "ReportBatch":
        """Validate columns into a batch. ``klass`` may be one string for all rows.

        Raises
        ------
        InputError
            Naming the transient, the column and the constraint.
        """
        ids = np.asarray(transient_id).astype(str).ravel()
        n = ids.size
        kl = np.asarray(klass).astype(str)
        kl = np.broadcast_to(kl, (n,)).copy() if kl.ndim == 0 else kl.ravel()
        if kl.size != n:
            raise InputError(f"reports: class has {kl.size} values for {n} transient ids")
        cols = {}
        given = dict(ra_deg=ra_deg, dec_deg=dec_deg, time=time, pos_err_deg=pos_err_deg,
                     last_nondetection=last_nondetection, redshift=redshift, redshift_err=redshift_err,
                     distance_mpc=distance_mpc, distance_err_mpc=distance_err_mpc)
        for name in _FLOAT_COLUMNS:
            v = given[name]
            if v is None:
                cols[name] = np.full(n, np.nan)
                continue
            try:
                arr = np.asarray(v, dtype=np.float64)
            except (TypeError, ValueError):
                raise InputError(f"reports: column {name} is not numeric") from None
            arr = np.broadcast_to(arr, (n,)).copy() if arr.ndim == 0 else arr.ravel().copy()
            if arr.size != n:
                raise InputError(f"reports: column {name} has {arr.size} values for {n} transient ids")
            cols[name] = arr

        def check(name, bad, rule):
            if np.any(bad):
                i = int(np.flatnonzero(bad)[0])
                raise InputError(f"transient {ids[i]}: {name}={float(cols[name][i])!r} {rule}")

        c = cols
        check("ra_deg", ~(np.isfinite(c["ra_deg"]) & (c["ra_deg"] >= 0) & (c["ra_deg"] <= 360)), "is outside [0, 360]")
        check("dec_deg", ~(np.isfinite(c["dec_deg"]) & (c["dec_deg"] >= -90) & (c["dec_deg"] <= 90)),
              "is outside [-90, 90]")
        check("time", ~np.isfinite(c["time"]), "must be a finite GPS time")

        def optional(name, ok, rule):
            v = c[name]
            check(name, ~np.isnan(v) & ~ok(v), rule)

        with np.errstate(invalid="ignore"):
            optional("pos_err_deg", lambda v: np.isfinite(v) & (v >= 0) & (v <= 90), "must lie in [0, 90]")
            optional("last_nondetection", lambda v: np.isfinite(v) & (v <= c["time"]), "must be finite and not after time")
            optional("redshift", lambda v: np.isfinite(v) & (v >= 0) & (v <= 20), "must lie in [0, 20]")
            optional("redshift_err", lambda v: np.isfinite(v) & (v > 0), "must be finite and > 0")
            optional("distance_mpc", lambda v: np.isfinite(v) & (v > 0), "must be finite and > 0")
            optional("distance_err_mpc", lambda v: np.isfinite(v) & (v > 0), "must be finite and > 0")
        check("redshift_err", ~np.isnan(c["redshift_err"]) & np.isnan(c["redshift"]), "is given without redshift")
        check("distance_err_mpc", ~np.isnan(c["distance_err_mpc"]) & np.isnan(c["distance_mpc"]),
              "is given without distance_mpc")
        return cls(_ro(ids), _ro(kl), *(_ro(c[k]) for k in ("ra_deg", "dec_deg", "time", "pos_err_deg",
                                                           "last_nondetection", "redshift", "redshift_err",
                                                           "distance_mpc", "distance_err_mpc")))

    @classmethod
    def from_reports(cls, reports: Sequence, numbers: np.ndarray | None = None) -> "ReportBatch":
        """Build from :class:`~matcher.streams.messages.TransientReport` messages (already validated).

        ``numbers``: their :data:`REPORT_NUMBERS` as an ``(n, 9)`` float array (None as NaN),
        when already at hand (the decode process makes it); else read from the reports.
        """
        if numbers is None:
            # One pass over the reports; numpy turns None into NaN for a float array.
            numbers = np.array([(r.ra_deg, r.dec_deg, r.time, r.pos_err_deg, r.last_nondetection, r.redshift,
                                 r.redshift_err, r.distance_mpc, r.distance_err_mpc) for r in reports],
                               dtype=np.float64)
        cols = np.asarray(numbers, dtype=np.float64).reshape(-1, 9).T.copy()
        return cls.from_arrays(
            [r.transient_id for r in reports], np.array([r.klass for r in reports], dtype=str),
            cols[0], cols[1], cols[2], pos_err_deg=cols[3], last_nondetection=cols[4], redshift=cols[5],
            redshift_err=cols[6], distance_mpc=cols[7], distance_err_mpc=cols[8],
        )

    def take(self, index) -> "ReportBatch":
        """Rows ``index`` (an index array or boolean mask) as a new batch."""
        return ReportBatch(*(_ro(np.asarray(getattr(self, f))[index]) for f in self.__dataclass_fields__))
