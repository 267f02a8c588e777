"""Window scan: false matches per event and efficiency at each FAP threshold, and the recommendation.

Everything here works on integer count cubes per alert (pure computation):

* ``matches[a, j, i]``: false matches in alert ``a``'s time slides with window ``j``
  and FAP at most threshold ``i`` (summed over slides); ``events``: slid events
  with at least one; ``squares``: the sum over slides of the squared count;
* ``found[a, j, i]``: injections found (in window ``j``, FAP at most threshold ``i``).

Per window, the threshold *at target* is the largest FAP threshold of the grid
whose false matches per slid event do not exceed the target (conservative: the
grid's resolution costs efficiency, never false matches). The recommended
window has the highest efficiency at its own threshold; ties go to the shorter
window (as much efficiency for less background).

The uncertainty comes from a bootstrap over alerts (slides of one alert share
reports and injections share its map, so the alert is the independent unit):
each resample redoes thresholds, efficiencies and the choice of window.

The model's expectation beside the slides: a background report of bracket ``L``
has ``μ`` uniform on ``[0, μ_max]``, ``μ_max = r 4π (W + L)`` (the engine's
calibration), so the expected number of false matches per event with
``μ ≤ μ* = -ln(1 - FAP*)`` is the mean over the class's reports of
``min(μ*, r 4π (W + L))``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "AlertCounts",
    "ClassScan",
    "ModelCheck",
    "count_passes",
    "model_false_per_event",
    "scan_class",
    "UNDERESTIMATE_Z",
    "MIN_MODEL_MATCHES",
]

#: Excess (in standard deviations) of slide false matches over the model that says "underestimates".
UNDERESTIMATE_Z = 3.5
#: The model check uses the smallest threshold where the model expects at least this many matches.
MIN_MODEL_MATCHES = 10.0
_RATIO = 1.5  # and the excess must be at least this factor, so huge samples do not flag trifles


def count_passes(mu, group, n_groups: int, mu_thresholds) -> np.ndarray:
    """``out[g, i]`` = rows of group ``g`` with ``μ <= mu_thresholds[i]`` (int64).

    ``μ`` of rows outside the window is ``inf`` and counts nowhere.
    """
    mu = np.asarray(mu, dtype=np.float64)
    thr = np.asarray(mu_thresholds, dtype=np.float64)
    n_i = thr.size
    first = np.searchsorted(thr, mu, side="left")  # first threshold each row passes (n_i: none)
    flat = np.asarray(group, dtype=np.int64) * (n_i + 1) + first
    counts = np.bincount(flat, minlength=n_groups * (n_i + 1)).reshape(n_groups, n_i + 1)[:, :n_i]
    return np.cumsum(counts, axis=1)


@dataclass(frozen=True, eq=False)
class AlertCounts:
    """One alert's counts for one class (arrays of shape (windows, thresholds), int64).

    Attributes
    ----------
    matches, events, squares : ndarray
        Slides: false matches, slid events with at least one, sum of squared per-slide counts.
    found : ndarray
        Injections found.
    slides : int
    injections : int
    observed : int
        Injections the stream would have reported.
    candidates : int
        Slid report rows considered; ``scored`` of them were scored by the engine.
    scored : int
    """

    matches: np.ndarray
    events: np.ndarray
    squares: np.ndarray
    found: np.ndarray
    slides: int
    injections: int
    observed: int
    candidates: int = 0
    scored: int = 0


def model_false_per_event(fap_thresholds, windows_s, brackets_s, rate_per_sr_per_s: float) -> np.ndarray:
    """Expected false matches per event under the model, shape (windows, thresholds) (module docstring)."""
    mu = -np.log1p(-np.asarray(fap_thresholds, dtype=np.float64))
    L = np.asarray(brackets_s, dtype=np.float64)
    if L.size == 0:
        L = np.zeros(1)
    if L.size > 20000:  # the mean of a min over a sorted sample: a quantile grid is as good
        L = np.quantile(L, np.linspace(0.0, 1.0, 2001))
    out = np.empty((len(windows_s), mu.size))
    for j, (lo, hi) in enumerate(windows_s):
        mu_max = rate_per_sr_per_s * 4.0 * math.pi * ((hi - lo) + L)
        out[j] = np.minimum(mu[:, None], mu_max[None, :]).mean(axis=1)
    return out


@dataclass(frozen=True)
class ModelCheck:
    """Slides against the model at the configured window.

    Attributes
    ----------
    fap_threshold : float
    slides_false_per_event, model_false_per_event : float
    ratio : float
        Slides over model.
    z : float
        Excess in standard deviations (Poisson inflated by the slide overlap, or the
        bootstrap spread if larger).
    overlap : float
        Slides that share a given report, on average (1: independent slides).
    dispersion : float
        Variance over mean of the false matches per slid event (1 for Poisson).
    verdict : str
        ``"consistent"``, ``"underestimates"`` (the model expects fewer false matches than the
        slides give) or ``"overestimates"``; ``"untested"`` without slides.
    """

    fap_threshold: float
    slides_false_per_event: float
    model_false_per_event: float
    ratio: float
    z: float
    overlap: float
    dispersion: float
    verdict: str


@dataclass(frozen=True, eq=False)
class ClassScan:
    """The scan of one class over all alerts (arrays are (windows, thresholds) unless said).

    Attributes
    ----------
    name : str
    windows_s : ndarray, s, (J, 2)
    configured : int
        Index of the configured window.
    fap_thresholds : ndarray, (I,)
    target : float
        False matches per event to hold.
    alerts, slides, injections : int
        ``slides`` per alert; ``injections`` per alert.
    observed : int
        Injections observed over all alerts.
    matches, events, found : ndarray of int
        Totals over alerts.
    false_per_event, false_per_event_err, false_event_fraction : ndarray
    efficiency, efficiency_err : ndarray
        Errors: bootstrap standard deviations over alerts.
    model_false_per_event : ndarray
    target_index : ndarray of int, (J,)
        Threshold at target per window (-1: none).
    efficiency_at_target : ndarray, (J,)
    recommended : int
        Window index, -1 when no window reaches the target.
    efficiency_err_at_target : float
        Bootstrap standard deviation of the recommended window's efficiency at its threshold.
    window_choice_fraction : ndarray, (J,)
        How often each window was chosen in the bootstrap.
    window_lo_range_s, window_hi_range_s : (float, float), s
        16th and 84th percentiles of the chosen window's ends over the bootstrap.
    model_check : ModelCheck
    """

    name: str
    windows_s: np.ndarray
    configured: int
    fap_thresholds: np.ndarray
    target: float
    alerts: int
    slides: int
    injections: int
    observed: int
    matches: np.ndarray
    events: np.ndarray
    found: np.ndarray
    false_per_event: np.ndarray
    false_per_event_err: np.ndarray
    false_event_fraction: np.ndarray
    efficiency: np.ndarray
    efficiency_err: np.ndarray
    model_false_per_event: np.ndarray
    target_index: np.ndarray
    efficiency_at_target: np.ndarray
    recommended: int
    efficiency_err_at_target: float
    window_choice_fraction: np.ndarray
    window_lo_range_s: tuple[float, float]
    window_hi_range_s: tuple[float, float]
    model_check: ModelCheck

    @property
    def slid_events(self) -> int:
        return self.alerts * self.slides

    @property
    def total_injections(self) -> int:
        return self.alerts * self.injections


def _at_target(fpe: np.ndarray, eff: np.ndarray, target: float):
    """Threshold index at target per window (-1: none) and the efficiency there (0 when none).

    Works on (..., J, I) arrays; ``fpe`` is non-decreasing along the last axis.
    """
    ti = np.sum(fpe <= target * (1 + 1e-12), axis=-1) - 1
    eff_t = np.take_along_axis(eff, np.maximum(ti, 0)[..., None], axis=-1)[..., 0]
    return ti, np.where(ti >= 0, eff_t, 0.0)


def _choose(eff_t: np.ndarray, reachable: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Best window along the last axis: highest efficiency, then the shortest; -1 if none reachable."""
    order = np.argsort(lengths, kind="stable")
    score = np.where(reachable, eff_t, -1.0)[..., order]
    best = order[np.argmax(score, axis=-1)]  # argmax takes the first maximum: the shortest window
    return np.where(np.any(score >= 0, axis=-1), best, -1)


def scan_class(name: str, counts: list[AlertCounts], windows_s, configured: int, fap_thresholds, target: float,
               model_fpe: np.ndarray, bootstrap: int, rng: np.random.Generator, *,
               slide_step_s: float = float("nan"), bracket_median_s: float = 0.0) -> ClassScan:
    """Combine per-alert counts into the scan and the recommendation (see the module docstring)."""
    W = np.asarray(windows_s, dtype=np.float64).reshape(-1, 2)
    f = np.asarray(fap_thresholds, dtype=np.float64)
    A = len(counts)
    J, I = W.shape[0], f.size
    slides = counts[0].slides if counts else 0
    inj = counts[0].injections if counts else 0
    M = np.stack([c.matches for c in counts]) if counts else np.zeros((0, J, I), np.int64)
    E = np.stack([c.events for c in counts]) if counts else np.zeros((0, J, I), np.int64)
    Q = np.stack([c.squares for c in counts]) if counts else np.zeros((0, J, I), np.int64)
    F = np.stack([c.found for c in counts]) if counts else np.zeros((0, J, I), np.int64)
    observed = int(sum(c.observed for c in counts))
    n_slid = A * slides
    n_inj = A * inj
    Mt, Et, Qt, Ft = M.sum(0), E.sum(0), Q.sum(0), F.sum(0)
    with np.errstate(invalid="ignore", divide="ignore"):
        fpe = Mt / n_slid if n_slid else np.full((J, I), np.nan)
        fef = Et / n_slid if n_slid else np.full((J, I), np.nan)
        eff = Ft / n_inj if n_inj else np.full((J, I), np.nan)
    lengths = W[:, 1] - W[:, 0]

    # Bootstrap over alerts: multinomial weights, everything redone per resample.
    B = int(bootstrap)
    if A > 0:
        w = rng.multinomial(A, np.full(A, 1.0 / A), size=B).astype(np.float64)
        tot = w.sum(axis=1)
        fpe_b = (w @ M.reshape(A, -1)).reshape(B, J, I) / (tot[:, None, None] * max(slides, 1))
        eff_b = (w @ F.reshape(A, -1)).reshape(B, J, I) / (tot[:, None, None] * max(inj, 1))
        fpe_err = fpe_b.std(axis=0) if n_slid else np.full((J, I), np.nan)
        eff_err = eff_b.std(axis=0)
    else:
        fpe_b = eff_b = np.zeros((0, J, I))
        fpe_err = eff_err = np.full((J, I), np.nan)

    if n_slid:
        ti, eff_t = _at_target(fpe, eff, target)
        rec = int(_choose(eff_t[None, :], (ti >= 0)[None, :], lengths)[0])
    else:
        ti = np.full(J, -1, dtype=np.int64)
        eff_t = np.zeros(J)
        rec = -1
    choice = np.zeros(J)
    lo_rng = hi_rng = (float("nan"), float("nan"))
    eff_t_err = float("nan")
    if n_slid and B and A > 0:
        ti_b, eff_t_b = _at_target(fpe_b, eff_b, target)
        rec_b = _choose(eff_t_b, ti_b >= 0, lengths)
        ok = rec_b >= 0
        if np.any(ok):
            choice = np.bincount(rec_b[ok], minlength=J) / B
            lo_rng = tuple(float(x) for x in np.percentile(W[rec_b[ok], 0], [16, 84]))
            hi_rng = tuple(float(x) for x in np.percentile(W[rec_b[ok], 1], [16, 84]))
        if rec >= 0:
            eff_t_err = float(eff_t_b[:, rec].std())

    check = _model_check(Mt, Qt, fpe_b, n_slid, model_fpe, configured, f, lengths[configured], slide_step_s,
                         bracket_median_s)
    return ClassScan(name, W, int(configured), f, float(target), A, slides, inj, observed, Mt, Et, Ft, fpe, fpe_err,
                     fef, eff, eff_err, np.asarray(model_fpe, dtype=np.float64), ti, eff_t, rec, eff_t_err, choice,
                     lo_rng, hi_rng, check)


def _model_check(Mt, Qt, fpe_b, n_slid, model_fpe, j, f, window_len, step, bracket_median) -> ModelCheck:
    nan = float("nan")
    if not n_slid:
        return ModelCheck(nan, nan, nan, nan, nan, nan, nan, "untested")
    n_model = n_slid * model_fpe[j]
    enough = np.flatnonzero(n_model >= MIN_MODEL_MATCHES)
    i = int(enough[0]) if enough.size else int(f.size - 1)
    n_emp = float(Mt[j, i])
    nm = float(n_model[i])
    overlap = max(1.0, (window_len + bracket_median) / step) if step == step and step > 0 else 1.0
    var = nm * overlap
    if fpe_b.shape[0] > 1:
        var = max(var, float(fpe_b[:, j, i].var()) * n_slid**2)
    z = (n_emp - nm) / math.sqrt(var) if var > 0 else (math.inf if n_emp > nm else 0.0)
    mean = n_emp / n_slid
    dispersion = (float(Qt[j, i]) / n_slid - mean**2) / mean if mean > 0 else nan
    ratio = n_emp / nm if nm > 0 else (math.inf if n_emp > 0 else nan)
    if z > UNDERESTIMATE_Z and ratio >= _RATIO:
        verdict = "underestimates"
    elif z < -UNDERESTIMATE_Z and ratio <= 1.0 / _RATIO:
        verdict = "overestimates"
    else:
        verdict = "consistent"
    return ModelCheck(float(f[i]), mean, nm / n_slid, ratio, z, overlap, dispersion, verdict)
