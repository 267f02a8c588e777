"""Posterior odds against "unrelated" and association probabilities.

For one GW event and a report of class k, with the background of class k a
Poisson process of intensity ``r`` (sr**-1 s**-1) and a counterpart, present
with prior probability ``π``, distributed as ``ρ_gw(Ω) T(t) p(d | assoc)``:

    P(report i is the counterpart | data) / P(no counterpart among them | data)
        = π/(1-π) · I_i · T_i · D_i / r  =  O_i.

The Poisson likelihood of the other reports is common to every hypothesis and
cancels. Because at most one report of the class is the counterpart,
``P_i = O_i / (1 + Σ_j O_j)`` exactly.

The design note writes ``π`` for the prior factor; with ``π`` a probability the
exact factor is the prior *odds* ``π/(1-π)``, identical for small ``π`` (the
worked example of Ashton et al. 2018) and the one that keeps ``P_i``
calibrated when ``π`` is not small (see the reliability test). ``π`` is clipped
at ``1 - 1e-9`` so that the odds stay finite.
"""

from __future__ import annotations

import numpy as np

__all__ = ["posterior_odds", "association_probabilities", "group_codes", "PRIOR_MAX"]

PRIOR_MAX = 1.0 - 1e-9


def posterior_odds(prior, sky_per_sr, time_per_s, distance_factor, rate_per_sr_per_s) -> np.ndarray:
    """``O = π/(1-π) · I · T · D / r`` (dimensionless), vectorized.

    Parameters
    ----------
    prior : array_like
        ``π`` in [0, 1].
    sky_per_sr : array_like, sr**-1
    time_per_s : array_like, s**-1
    distance_factor : array_like
    rate_per_sr_per_s : array_like, sr**-1 s**-1
    """
    p = np.clip(np.asarray(prior, dtype=np.float64), 0.0, PRIOR_MAX)
    return (p / (1.0 - p)) * np.asarray(sky_per_sr, float) * np.asarray(time_per_s, float) \
        * np.asarray(distance_factor, float) / np.asarray(rate_per_sr_per_s, float)


def association_probabilities(odds, groups) -> np.ndarray:
    """``P_i = O_i / (1 + Σ_{j in i's group} O_j)``.

    Parameters
    ----------
    odds : array_like
        Odds of each report for one GW event (non-negative, finite).
    groups : array_like
        Group label of each report (its class); the sum runs within a group.

    Examples
    --------
    >>> association_probabilities([3.0, 1.0, 4.0], ["a", "a", "b"]).tolist()
    [0.6, 0.2, 0.8]
    """
    o = np.asarray(odds, dtype=np.float64)
    if o.size == 0:
        return o.copy()
    if np.any(~np.isfinite(o)) or np.any(o < 0):
        raise ValueError("odds must be finite and non-negative")
    _, inv = group_codes(np.asarray(groups))
    totals = np.bincount(inv, weights=o)
    return o / (1.0 + totals[inv])


def group_codes(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(labels, return_inverse=True)`` (inverse flattened), without sorting when all are equal.

    A batch of reports is usually of one class; sorting strings is the slow part of ``np.unique``.
    """
    labels = np.asarray(labels)
    flat = labels.ravel()
    if flat.size and bool(np.all(flat == flat[0])):
        return flat[:1].copy(), np.zeros(flat.size, dtype=np.intp)
    names, inv = np.unique(labels, return_inverse=True)
    return names, inv.ravel()
