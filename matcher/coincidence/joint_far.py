"""Joint false-alarm rate for a GW event and a sharp external trigger.

``FAR_joint = FAR_gw × R_ext × W / I_Ω`` with ``I_Ω = 4π ∫ ρ_gw ρ_ext dΩ``:
the temporal part is the chance rate of two independent Poisson processes
coinciding within a window ``W``; dividing by the sky overlap is the field's
usual heuristic, not an exact tail probability (Urban 2016, PhD thesis,
U. Wisconsin–Milwaukee; Piotrzkowski et al. 2022, CQG 39, 085010 — from memory).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["joint_far"]


def joint_far(far_gw, all_sky_rate_per_s, window_s, sky_per_sr) -> np.ndarray:
    """Joint false-alarm rate, in the units of ``far_gw``.

    Parameters
    ----------
    far_gw : float or array_like
        GW false-alarm rate (any unit: per year in, per year out).
    all_sky_rate_per_s : array_like, s**-1
        All-sky rate of the external triggers.
    window_s : array_like, s
        Coincidence window length.
    sky_per_sr : array_like, sr**-1
        ``∫ ρ_gw ρ_ext dΩ``; the sky factor is ``I_Ω = 4π`` times it.
        Where it is 0 the result is +inf.
    """
    i_omega = 4.0 * math.pi * np.asarray(sky_per_sr, dtype=np.float64)
    num = np.asarray(far_gw, float) * np.asarray(all_sky_rate_per_s, float) * np.asarray(window_s, float)
    # A vanishing (subnormal) overlap gives an infinite joint FAR: that is the answer, not an error.
    with np.errstate(divide="ignore", over="ignore"):
        return np.where(i_omega > 0, num / np.where(i_omega > 0, i_omega, 1.0), np.inf)
