"""The time term ``T`` (s**-1) and the window test, vectorized.

Under association the onset is ``t_g + δ`` with ``δ ~ U[lo, hi]`` (the class
window, length ``W = hi - lo``). A report's onset is known to lie in a bracket
``[t1 - L, t1]``: ``t1`` is the trigger time (sharp classes, ``L = 0``) or the
first detection, ``t1 - L`` the last non-detection (or ``t1`` minus the class
cadence when none is given). Then

* sharp (``L = 0``): ``T = 1/W`` when ``lo <= t1 - t_g <= hi``, else 0;
* bracketed: ``T = |[t1 - L, t1] ∩ [t_g + lo, t_g + hi]| / (W L)``.

As a function of ``u = t1 - t_g``, ``T`` integrates to 1 (it is the density of
the first-detection time under association), which is what makes the odds and
the false-association probability consistent.
"""

from __future__ import annotations

import numpy as np

__all__ = ["time_term", "window_overlap_s"]


def window_overlap_s(dt_s, bracket_s, lo_s, hi_s) -> np.ndarray:
    """Length (s) of ``[dt - L, dt] ∩ [lo, hi]`` (all relative to the merger time)."""
    dt, L, lo, hi = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in (dt_s, bracket_s, lo_s, hi_s)))
    return np.maximum(np.minimum(dt, hi) - np.maximum(dt - L, lo), 0.0)


def time_term(dt_s, bracket_s, lo_s, hi_s) -> np.ndarray:
    """``T`` (s**-1) for each report.

    Parameters
    ----------
    dt_s : array_like, s
        Trigger time or first detection minus the merger time.
    bracket_s : array_like, s
        Bracket length ``L >= 0`` (first detection minus last non-detection);
        0 for a sharp trigger time.
    lo_s, hi_s : array_like, s
        The class window.

    Returns
    -------
    ndarray, s**-1
        Zero outside the window.

    Examples
    --------
    >>> float(time_term(2.0, 0.0, -1.0, 5.0))       # sharp, inside: 1/6 per s
    0.16666666666666666
    >>> float(time_term(86400.0, 172800.0, 0.0, 259200.0))   # half the 2-day bracket overlaps
    1.9290123456790124e-06
    """
    dt, L, lo, hi = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in (dt_s, bracket_s, lo_s, hi_s)))
    W = hi - lo
    sharp = L <= 0.0
    inside = (dt >= lo) & (dt <= hi)
    out = np.where(sharp & inside, 1.0 / W, 0.0)
    b = ~sharp
    if np.any(b):
        ov = window_overlap_s(dt[b], L[b], lo[b], hi[b])
        out[b] = ov / (W[b] * L[b])
    return out[()] if out.ndim == 0 else out
