"""The tuning run: prepare each class from the archive, then per alert slides and injections, then the scan.

Per alert (the unit of work, one process each with ``jobs > 1``), for each class:

1. injections drawn from the alert's map and observed through the archive's
   coverage (:mod:`.injections`);
2. the class's reports in every time slide (:mod:`.slides`), dropped early only
   where the sky bound proves they cannot pass the largest FAP threshold;
3. for every window of the grid, the injections and the slid reports scored with
   :func:`matcher.coincidence.score_reports` (the class's window replaced by the
   window scanned) and counted against the FAP thresholds (:func:`.scan.count_passes`).

One ``SkyMap`` object serves every window and slide of an alert, so the engine's
per-map background tables are built once per alert and process.

Random numbers: each (alert, class) has its own generator seeded from
``(seed, crc32(event id), crc32(class))``, and the bootstrap of a class from
``(seed, crc32("bootstrap"), crc32(class))``: results do not depend on the number
of processes, on the order of work, or on which other classes are tuned.
"""

from __future__ import annotations

import dataclasses
import time
import zlib
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from matcher.coincidence.batch import ReportBatch
from matcher.coincidence.classes import CounterpartClass
from matcher.coincidence.engine import score_reports
from matcher.coincidence.time_term import time_term
from matcher.errors import InputError
from matcher.tune.archive_io import ArchiveContents
from matcher.tune.background import (
    Cadence,
    Footprint,
    LiveTime,
    MeasuredRate,
    TriggerCoverage,
    brackets_s,
    cadence_from_reports,
    estimate_footprint,
    live_time,
    measure_rate,
    survey_exposure,
)
from matcher.tune.injections import draw_injections
from matcher.tune.scan import AlertCounts, ClassScan, count_passes, model_false_per_event, scan_class
from matcher.tune.settings import (
    ClassTuning,
    DelayModel,
    TuningSettings,
    configured_window,
    fap_thresholds,
    window_grid,
)
from matcher.tune.slides import (
    BOUND_MAX_SIGMA_DEG,
    SlidePlan,
    area_denser_than,
    density_bound,
    plan_slides,
    sky_bound,
    sky_bound_keep,
    slid_candidates,
)

__all__ = ["ClassData", "TunePlan", "prepare", "run_alert", "run_all", "summarize", "TuneResult", "SCORE_CHUNK"]

#: Largest number of reports handed to the engine in one call (memory, not results: FAP is per report).
SCORE_CHUNK = 200_000
#: Default relative error of injected distances when the archive gives none to copy (assumption).
DEFAULT_DISTANCE_REL_ERR = 0.1
#: Default error of injected host redshifts when the archive's redshifts give none (assumption).
DEFAULT_REDSHIFT_ERR = 0.001


@dataclass(frozen=True, eq=False)
class ClassData:
    """One class prepared from the archive (report columns sorted by time).

    Attributes
    ----------
    name : str
    klass : CounterpartClass
        As configured.
    tuning : ClassTuning
    delay : DelayModel
    windows_s : tuple of (lo, hi)
    configured : int
        Index of the configured window in ``windows_s``.
    columns : dict of ndarray
        ``ids, ra, dec, time, pos_err, sigma, lnd, z, z_err, d, d_err`` (``sigma``: the
        effective 1σ error, the class default where a report gives none).
    maps : list of SkyMap or None, or None
    brackets_s : ndarray, s
    eligible : ndarray of bool
        No own map and no distance (the sky bound may apply).
    footprint, live, rate, coverage, slides
    inj_pos_err_deg, inj_distance_fraction, inj_distance_rel_err : float
    inj_redshift_err : float or None
        Injected distances are host redshifts with this error (None: distances).
    model_fpe : ndarray, (windows, thresholds)
    notes : tuple of str
        How each derived quantity was obtained, for the output.
    """

    name: str
    klass: CounterpartClass
    tuning: ClassTuning
    delay: DelayModel
    windows_s: tuple[tuple[float, float], ...]
    configured: int
    columns: Mapping[str, np.ndarray]
    maps: list | None
    brackets_s: np.ndarray
    eligible: np.ndarray
    footprint: Footprint
    live: LiveTime
    rate: MeasuredRate
    coverage: Cadence | TriggerCoverage
    slides: SlidePlan
    inj_pos_err_deg: float
    inj_distance_fraction: float
    inj_distance_rel_err: float
    inj_redshift_err: float | None
    model_fpe: np.ndarray
    notes: tuple[str, ...]

    @property
    def extent_s(self) -> tuple[float, float]:
        return min(w[0] for w in self.windows_s), max(w[1] for w in self.windows_s)


@dataclass(frozen=True, eq=False)
class TunePlan:
    """Everything a worker needs (inherited by forked processes)."""

    archive: ArchiveContents
    classes: tuple[ClassData, ...]
    settings: TuningSettings
    fap_thresholds: np.ndarray
    seed: int
    use_bound: bool = True

    @property
    def mu_thresholds(self) -> np.ndarray:
        return -np.log1p(-self.fap_thresholds)


def _crc(text: str) -> int:
    return zlib.crc32(text.encode("utf-8"))


def _generator(seed: int, *parts: str) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed) & 0xFFFFFFFF, *(_crc(p) for p in parts)]))


def _prepare_class(name: str, klass: CounterpartClass, tuning: ClassTuning, batch: ReportBatch, report_maps,
                   settings: TuningSettings, f: np.ndarray) -> ClassData:
    sel = np.flatnonzero(batch.klass == name)
    order = sel[np.argsort(batch.time[sel], kind="stable")]
    cols = {
        "ids": batch.transient_id[order], "ra": batch.ra_deg[order], "dec": batch.dec_deg[order],
        "time": batch.time[order], "pos_err": batch.pos_err_deg[order], "lnd": batch.last_nondetection[order],
        "z": batch.redshift[order], "z_err": batch.redshift_err[order], "d": batch.distance_mpc[order],
        "d_err": batch.distance_err_mpc[order],
    }
    cols["sigma"] = np.where(np.isnan(cols["pos_err"]), klass.pos_err_deg, cols["pos_err"])
    maps = None if report_maps is None else [report_maps[i] for i in order]
    if maps is not None and all(m is None for m in maps):
        maps = None
    has_map = np.array([m is not None for m in maps]) if maps is not None else np.zeros(order.size, bool)
    has_d = np.isfinite(cols["z"]) | np.isfinite(cols["d"])
    L = brackets_s(klass, cols["time"], cols["lnd"])
    notes = []
    delay = tuning.delay_for(klass)
    if tuning.delay is None:
        notes.append(f"delay model: none configured, injections uniform over the configured window "
                     f"[{klass.window_lo_s:g}, {klass.window_hi_s:g}] s (assumption)")
    windows = window_grid(klass, tuning)
    configured = windows.index(configured_window(klass))
    fp = estimate_footprint(cols["ra"], cols["dec"], order=tuning.footprint_order)
    live = live_time(cols["time"], tuning.outage_gap_s)
    if klass.sharp_time:
        coverage = TriggerCoverage(fp, live)
        rate = measure_rate(order.size, fp, live, klass)
    else:
        coverage = cadence_from_reports(fp, cols["ra"], cols["dec"], cols["time"], cols["lnd"])
        rate = measure_rate(order.size, fp, live, klass,
                            survey_exposure(fp, cols["ra"], cols["dec"], cols["time"], cols["lnd"]))
    splan = plan_slides(cols["time"], L, windows, settings.slides)
    # Injected positions carry the archive's typical error; distances as often and as precise as the archive's.
    given_err = cols["pos_err"][np.isfinite(cols["pos_err"])]
    if tuning.pos_err_deg is not None:
        pos_err = tuning.pos_err_deg
    elif given_err.size:
        pos_err = float(np.median(given_err))
        notes.append(f"injected position error: median of the archive's reports, {pos_err:.3g} deg")
    else:
        pos_err = klass.pos_err_deg
    if tuning.distance_fraction is not None:
        dfrac = tuning.distance_fraction
    else:
        dfrac = float(has_d.mean()) if has_d.size else 0.0
        if dfrac > 0:
            notes.append(f"injections with a measured distance: {dfrac:.1%}, as in the archive")
    # Measured distances like the archive's: host redshifts with its typical redshift error when most of
    # its distances are redshifts, else distances with its typical relative error.
    zerr_given = cols["z_err"][np.isfinite(cols["z"]) & np.isfinite(cols["z_err"])]
    n_z = int(np.isfinite(cols["z"]).sum())
    n_d = int(np.isfinite(cols["d"]).sum())
    z_err = None
    if tuning.distance_rel_err is not None:
        drel = tuning.distance_rel_err
    else:
        rel = (cols["d_err"] / cols["d"])[np.isfinite(cols["d_err"]) & np.isfinite(cols["d"])]
        drel = float(np.clip(np.median(rel), 1e-3, 1.0)) if rel.size else DEFAULT_DISTANCE_REL_ERR
        if n_z > n_d:
            z_err = float(np.median(zerr_given)) if zerr_given.size else DEFAULT_REDSHIFT_ERR
            if dfrac > 0:
                notes.append(f"injected distances are host redshifts with error {z_err:.3g}, as in the archive")
    model = model_false_per_event(f, windows, L, klass.rate_per_sr_per_s)
    return ClassData(name, klass, tuning, delay, windows, configured, cols, maps, L, ~has_map & ~has_d, fp, live,
                     rate, coverage, splan, float(pos_err), float(dfrac), float(drel), z_err, model, tuple(notes))


def prepare(archive: ArchiveContents, classes: Mapping[str, CounterpartClass], settings: TuningSettings,
            selected: Sequence[str] | None, seed: int) -> tuple[TunePlan, list[str]]:
    """Prepare the classes to tune.

    Parameters
    ----------
    selected : sequence of str, optional
        Classes to tune; default every configured class with reports in the archive.

    Returns
    -------
    (TunePlan, warnings)

    Raises
    ------
    InputError
        A selected class is not configured or has no report in the archive.
    """
    warnings: list[str] = []
    present = sorted(set(archive.reports.klass.tolist()))
    unknown = [k for k in present if k not in classes]
    if unknown:
        n = int(np.isin(archive.reports.klass, unknown).sum())
        warnings.append(f"{n} report(s) of unconfigured class(es) {', '.join(unknown)} were not used")
    if selected:
        for name in selected:
            if name not in classes:
                raise InputError(f"--class {name}: not a configured class (configured: {', '.join(sorted(classes))})")
            if name not in present:
                raise InputError(f"--class {name}: the archive has no report of this class "
                                 f"(it has {', '.join(present) or 'none'})")
        names = list(dict.fromkeys(selected))
    else:
        names = [k for k in present if k in classes]
        if not names:
            raise InputError(f"archive {archive.path}: none of its report classes ({', '.join(present)}) is "
                             f"configured (configured: {', '.join(sorted(classes))})")
    f = fap_thresholds(settings)
    data = tuple(_prepare_class(n, classes[n], settings.for_class(n), archive.reports, archive.report_maps,
                                settings, f) for n in names)
    return TunePlan(archive, data, settings, f, int(seed)), warnings


def _score_mu(alert, skymap, cd: ClassData, lo: float, hi: float, rows, t, lnd, maps=None) -> np.ndarray:
    """Engine ``μ`` (inf outside the window) for class rows ``rows`` at times ``t`` (alert frame)."""
    klass = dataclasses.replace(cd.klass, window_lo_s=float(lo), window_hi_s=float(hi))
    classes = {cd.name: klass}
    c = cd.columns
    out = np.empty(rows.size)
    for s in range(0, rows.size, SCORE_CHUNK):
        r = rows[s:s + SCORE_CHUNK]
        sl = slice(s, s + SCORE_CHUNK)
        batch = ReportBatch.from_arrays(c["ids"][r], cd.name, c["ra"][r], c["dec"][r], t[sl],
                                        pos_err_deg=c["pos_err"][r], last_nondetection=lnd[sl], redshift=c["z"][r],
                                        redshift_err=c["z_err"][r], distance_mpc=c["d"][r],
                                        distance_err_mpc=c["d_err"][r])
        rm = None if maps is None else [maps[i] for i in r]
        tab = score_reports(alert, skymap, batch, classes, report_maps=rm)
        out[sl] = np.where(tab.in_window, tab.background_expected, np.inf)
    return out


def _alert_class(plan: TunePlan, alert, skymap, bound, cd: ClassData) -> AlertCounts:
    f_mu = plan.mu_thresholds
    J, I = len(cd.windows_s), f_mu.size
    rng = _generator(plan.seed, alert.event_id, cd.name)
    n_inj = plan.settings.injections
    inj = draw_injections(cd.name, alert.merger_time, skymap, cd.delay, cd.coverage, n_inj, rng,
                          pos_err_deg=cd.inj_pos_err_deg, distance_fraction=cd.inj_distance_fraction,
                          distance_rel_err=cd.inj_distance_rel_err, redshift_err=cd.inj_redshift_err)
    found = np.zeros((J, I), np.int64)
    matches = np.zeros((J, I), np.int64)
    events = np.zeros((J, I), np.int64)
    squares = np.zeros((J, I), np.int64)
    n_slides = int(cd.slides.offsets_s.size)
    c = cd.columns
    lo_all, hi_all = cd.extent_s
    Lmax = float(cd.brackets_s.max()) if cd.brackets_s.size else 0.0
    rows, shift, slide = slid_candidates(c["time"], cd.slides, alert.merger_time, lo_all, hi_all, Lmax)
    n_candidates = int(rows.size)
    mu_cap = float(f_mu[-1]) * (1 + 1e-9)
    i_upper = None
    if plan.use_bound and bound is not None and rows.size:
        # Once per alert, for every window at once (see sky_bound_keep): T max(L, W) <= 1 and W >= the
        # shortest window, so mu >= r max(L, W_min) A(rho >= 2 I_upper) whatever the window and the slide.
        i_rep = density_bound(bound, c["ra"], c["dec"])
        w_min = min(hi - lo for lo, hi in cd.windows_s)
        a_rep = area_denser_than(bound, 2.0 * i_rep)
        point = cd.eligible & (c["sigma"] <= BOUND_MAX_SIGMA_DEG)
        lb = cd.klass.rate_per_sr_per_s * np.maximum(cd.brackets_s, w_min) * a_rep
        sure_out = point & (lb > mu_cap)
        keep = ~sure_out[rows]
        rows, shift, slide = rows[keep], shift[keep], slide[keep]
        i_upper = i_rep[rows]
    t_new = c["time"][rows] + shift
    lnd_new = c["lnd"][rows] + shift
    L = cd.brackets_s[rows]
    scored = 0
    t_g = float(alert.merger_time)
    ib = inj.batch
    inj_L = brackets_s(cd.klass, ib.time, ib.last_nondetection)
    for j, (lo, hi) in enumerate(cd.windows_s):
        if len(ib):
            T_inj = time_term(ib.time - t_g, inj_L, lo, hi)
            mu = np.full(len(ib), np.inf)
            live = np.flatnonzero(T_inj > 0)
            if live.size:
                klass = dataclasses.replace(cd.klass, window_lo_s=float(lo), window_hi_s=float(hi))
                tab = score_reports(alert, skymap, ib.take(live), {cd.name: klass})
                mu[live] = np.where(tab.in_window, tab.background_expected, np.inf)
            found[j] = count_passes(mu, np.zeros(mu.size, np.int64), 1, f_mu)[0]
        if rows.size == 0 or n_slides == 0:
            continue
        T = time_term(t_new - t_g, L, lo, hi)
        if i_upper is not None:
            keep = sky_bound_keep(bound, i_upper, c["sigma"][rows], cd.eligible[rows], T, L, hi - lo,
                                  cd.klass.rate_per_sr_per_s, mu_cap)
        else:
            keep = T > 0
        k = np.flatnonzero(keep)
        scored += k.size
        mu = _score_mu(alert, skymap, cd, lo, hi, rows[k], t_new[k], lnd_new[k], cd.maps)
        per_slide = count_passes(mu, slide[k], n_slides, f_mu)
        matches[j] = per_slide.sum(axis=0)
        events[j] = (per_slide > 0).sum(axis=0)
        squares[j] = (per_slide.astype(np.int64) ** 2).sum(axis=0)
    return AlertCounts(matches, events, squares, found, n_slides, n_inj, int(inj.observed.sum()), n_candidates,
                       int(scored))


def run_alert(plan: TunePlan, index: int) -> tuple[dict[str, AlertCounts], float]:
    """Slides and injections of alert ``index`` for every class; returns the counts and the wall time (s)."""
    t0 = time.perf_counter()
    # Tuning uses the FAP only: without a FAR the engine skips the joint FAR, which it does not need here
    # (and which overflows, with a warning, for sky overlaps near the smallest floats).
    alert = dataclasses.replace(plan.archive.alerts[index], far_per_year=None)
    skymap = plan.archive.skymaps[index]
    bound = sky_bound(skymap) if plan.use_bound else None
    out = {cd.name: _alert_class(plan, alert, skymap, bound, cd) for cd in plan.classes}
    return out, time.perf_counter() - t0


_PLAN: TunePlan | None = None


def _worker(index: int):
    return index, run_alert(_PLAN, index)


def run_all(plan: TunePlan, jobs: int = 1, progress_mode: str = "auto", indices: Sequence[int] | None = None):
    """Run every alert (in ``jobs`` processes); returns ``(counts per alert, seconds per alert)`` in alert order."""
    from matcher.report.progress import progress

    global _PLAN
    idx = list(range(len(plan.archive.alerts))) if indices is None else list(indices)
    results: dict[int, tuple] = {}
    with progress("tuning", total=len(idx), unit="alerts", mode=progress_mode) as bar:
        if jobs <= 1 or len(idx) <= 1:
            for i in idx:
                results[i] = run_alert(plan, i)
                bar.advance(1)
        else:
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor, as_completed

            _PLAN = plan  # forked workers inherit it; nothing is pickled but the indices and the counts
            try:
                ctx = multiprocessing.get_context("fork")
                with ProcessPoolExecutor(max_workers=min(jobs, len(idx)), mp_context=ctx) as pool:
                    futures = [pool.submit(_worker, i) for i in idx]
                    for fut in as_completed(futures):
                        i, res = fut.result()
                        results[i] = res
                        bar.advance(1)
            finally:
                _PLAN = None
    counts = [results[i][0] for i in idx]
    seconds = [results[i][1] for i in idx]
    return counts, seconds


@dataclass(frozen=True, eq=False)
class TuneResult:
    """The scans and what the run noticed."""

    plan: TunePlan
    scans: tuple[ClassScan, ...]
    seconds_per_alert: tuple[float, ...]
    warnings: tuple[str, ...]


def summarize(plan: TunePlan, counts: list[dict[str, AlertCounts]], seconds, warnings: Sequence[str] = ()) -> TuneResult:
    """Scan each class and collect warnings a practitioner must see."""
    out_w = list(warnings)
    scans = []
    for cd in plan.classes:
        per = [c[cd.name] for c in counts]
        rng = _generator(plan.seed, "bootstrap", cd.name)
        med_L = float(np.median(cd.brackets_s)) if cd.brackets_s.size else 0.0
        scan = scan_class(cd.name, per, cd.windows_s, cd.configured, plan.fap_thresholds,
                          plan.settings.target_false_per_event, cd.model_fpe, plan.settings.bootstrap, rng,
                          slide_step_s=cd.slides.step_s, bracket_median_s=med_L)
        scans.append(scan)
        out_w.extend(class_warnings(cd, scan, plan.settings))
    return TuneResult(plan, tuple(scans), tuple(seconds), tuple(out_w))


def _fmt_window(w) -> str:
    return f"[{w[0]:g}, {w[1]:g}] s"


def class_warnings(cd: ClassData, scan: ClassScan, settings: TuningSettings) -> list[str]:
    """The lines a practitioner must not miss, for one class."""
    out = []
    n = cd.name
    if cd.footprint.all_sky:
        out.append(f"class {n}: {cd.footprint.method}")
    if cd.slides.offsets_s.size < cd.slides.requested:
        out.append(f"class {n}: {cd.slides.reason}; no false rates can be measured for it")
    r = cd.rate
    if r.err_per_deg2_per_day > 0 and abs(r.z_vs_configured) > 3 and not 0.67 < r.ratio_to_configured < 1.5:
        out.append(f"class {n}: the archive's background is {r.rate_per_deg2_per_day:.3g} ± "
                   f"{r.err_per_deg2_per_day:.2g} per deg² per day over its {r.footprint_deg2:,.0f} deg² footprint, "
                   f"{r.ratio_to_configured:.2g}× the configured {r.configured_per_deg2_per_day:.3g}")
    mc = scan.model_check
    if mc.verdict == "underestimates":
        out.append(f"class {n}: MODEL UNDERESTIMATES the background: time slides give {mc.slides_false_per_event:.3g} "
                   f"false matches per event at FAP <= {mc.fap_threshold:.3g} with the configured window "
                   f"{_fmt_window(cd.windows_s[cd.configured])}, {mc.ratio:.2g}× the model's "
                   f"{mc.model_false_per_event:.3g} (excess {mc.z:.1f} sigma; dispersion {mc.dispersion:.2g}, "
                   f"1 for Poisson): the isotropic Poisson background at the configured rate misses real "
                   f"clustering or a higher rate; the model FAP is too optimistic, trust the slide-calibrated "
                   f"threshold")
    elif mc.verdict == "overestimates":
        out.append(f"class {n}: the model overestimates the background: time slides give "
                   f"{mc.slides_false_per_event:.3g} false matches per event at FAP <= {mc.fap_threshold:.3g}, "
                   f"{mc.ratio:.2g}× the model's {mc.model_false_per_event:.3g} (the model FAP is conservative here)")
    if mc.overlap == mc.overlap and mc.overlap > 3:
        out.append(f"class {n}: the slides overlap: each report falls in about {mc.overlap:.0f} consecutive slides "
                   f"(the stream spans {cd.slides.period_s / 86400:.3g} d for windows up to "
                   f"{cd.slides.min_offset_s / 86400:.3g} d), so the {scan.slides} slides per alert are worth about "
                   f"{max(scan.slides / mc.overlap, 1):.0f} independent ones; a longer archive gives firmer false rates")
    if scan.slid_events and settings.target_false_per_event * scan.slid_events < 3:
        out.append(f"class {n}: only {scan.slid_events} slid events: the target of "
                   f"{settings.target_false_per_event:g} false matches per event rests on fewer than 3 expected "
                   f"matches; ask for more slides or alerts")
    if scan.slid_events and scan.recommended < 0:
        out.append(f"class {n}: no window holds the target of {settings.target_false_per_event:g} false matches per "
                   f"event even at FAP <= {scan.fap_thresholds[0]:.3g}; lower tuning.fap_grid.min")
    if scan.recommended >= 0 and scan.target_index[scan.recommended] == scan.fap_thresholds.size - 1:
        out.append(f"class {n}: the slides stay below the target at every FAP threshold up to the grid's end "
                   f"({scan.fap_thresholds[-1]:g}), where the threshold stops; raise tuning.fap_grid.max to "
                   f"look further")
    if scan.total_injections and scan.observed == 0:
        out.append(f"class {n}: no injection was observed: the archive's coverage never met the alerts' "
                   f"localizations after the onsets")
    return out
