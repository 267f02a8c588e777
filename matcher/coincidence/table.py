"""The result of scoring: one row per report, columnar."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ScoreTable", "DISTANCE_SOURCE_NAMES"]

#: Names of :func:`~matcher.coincidence.distance_term.measured_distances` source codes.
DISTANCE_SOURCE_NAMES = ("none", "redshift", "distance", "external")


@dataclass(frozen=True, eq=False)
class ScoreTable:
    """Scores of many reports against one GW event revision (rows aligned with the input reports).

    Attributes
    ----------
    event_id : str
    revision : int
    transient_id, klass : ndarray of str
    in_window : ndarray of bool
        The report's onset (bracket) meets its class window; elsewhere odds are 0,
        ``p_assoc`` 0 and ``fap`` 1.
    odds : ndarray
        Posterior odds against "unrelated".
    p_assoc : ndarray
        ``O_i / (1 + Σ_j O_j)`` over the reports of the same class in this table.
    fap : ndarray
        False-association probability, ``1 - exp(-background_expected)``.
    background_expected : ndarray
        ``μ``: expected number of unrelated reports of the class scoring at least
        as high (0 … inf); keeps full precision where ``fap`` rounds to 1.
    searched_area_deg2 : ndarray, deg²
    credible_level : ndarray
        Searched probability at the report position.
    dt_s : ndarray, s
        Report time (trigger or first detection) minus merger time.
    sky_per_sr : ndarray, sr**-1
    time_per_s : ndarray, s**-1
    distance_factor : ndarray
    prior : ndarray
        ``π`` (a probability; the odds use ``π/(1-π)``).
    joint_far_per_year : ndarray, yr**-1
        For sharp-trigger classes when the alert has a FAR; NaN elsewhere.
    distance_mpc, distance_err_mpc : ndarray, Mpc
        The distance used for ``D`` (NaN when none).
    distance_source : ndarray of str
        ``none``, ``redshift``, ``distance`` or ``external``.
    """

    event_id: str
    revision: int
    transient_id: np.ndarray
    klass: np.ndarray
    in_window: np.ndarray
    odds: np.ndarray
    p_assoc: np.ndarray
    fap: np.ndarray
    background_expected: np.ndarray
    searched_area_deg2: np.ndarray
    credible_level: np.ndarray
    dt_s: np.ndarray
    sky_per_sr: np.ndarray
    time_per_s: np.ndarray
    distance_factor: np.ndarray
    prior: np.ndarray
    joint_far_per_year: np.ndarray
    distance_mpc: np.ndarray
    distance_err_mpc: np.ndarray
    distance_source: np.ndarray

    def __len__(self) -> int:
        return int(self.odds.size)

    def ranking(self, *, include_out_of_window: bool = False) -> np.ndarray:
        """Row indices best first: odds descending, then FAP ascending, then transient id."""
        rows = np.arange(len(self)) if include_out_of_window else np.flatnonzero(self.in_window)
        keys = (self.transient_id[rows], self.fap[rows], -self.odds[rows])
        return rows[np.lexsort(keys)]

    def record(self, i: int) -> dict:
        """One row as the documented output object (plain Python values)."""
        far = float(self.joint_far_per_year[i])
        return {
            "transient_id": str(self.transient_id[i]),
            "class": str(self.klass[i]),
            "odds": float(self.odds[i]),
            "p_assoc": float(self.p_assoc[i]),
            "fap": float(self.fap[i]),
            "searched_area_deg2": float(self.searched_area_deg2[i]),
            "credible_level": float(self.credible_level[i]),
            "dt_s": float(self.dt_s[i]),
            "terms": {
                "sky_per_sr": float(self.sky_per_sr[i]),
                "time_per_s": float(self.time_per_s[i]),
                "distance_factor": float(self.distance_factor[i]),
                "prior": float(self.prior[i]),
            },
            "joint_far_per_year": None if np.isnan(far) else far,
        }

    def records(self, *, include_out_of_window: bool = False) -> list[dict]:
        """Ranked rows as output objects (see :meth:`record`)."""
        return [self.record(int(i)) for i in self.ranking(include_out_of_window=include_out_of_window)]
