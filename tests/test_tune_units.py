"""Pieces of ``matcher tune`` against independent computations (fixed seeds, invented data).

Each check names what it is compared with: a brute-force loop written here, a
closed form (Fisher 1953 for the scatter of positions), or scipy's KS test for
a known distribution. KS tests use a 1 % level; the seeds are fixed, so the
outcome is deterministic.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from matcher.coincidence import parse_classes
from matcher.errors import ConfigError
from matcher.sky import Blob, kappa_for_area, synthetic_skymap
from matcher.sky.coords import angular_separation_deg
from matcher.tune.background import (
    cadence_from_reports,
    estimate_footprint,
    live_time,
    measure_rate,
)
from matcher.tune.injections import scatter_positions
from matcher.tune.scan import _at_target, _choose, count_passes, model_false_per_event
from matcher.tune.settings import DelayModel, fap_thresholds, parse_tuning, window_grid
from matcher.tune.slides import plan_slides, slid_candidates

CLASSES = parse_classes({
    "flash": dict(window_s=[-500, 500], rate_per_deg2_per_day=1e-3, efficiency=0.5, needs_neutron_star=False,
                  reach_mpc=1000.0, pos_err_deg=0.0, sharp_time=True),
    "survey": dict(window_s=[0, 259200], rate_per_deg2_per_day=0.1, efficiency=0.5, needs_neutron_star=True,
                   reach_mpc=1000.0, pos_err_deg=0.0003, sharp_time=False, cadence_s=86400),
})


# ------------------------------------------------------------------ settings
@pytest.mark.parametrize("raw, path", [
    ({"classses": {}}, "tuning.classses"),
    ({"classes": {"nope": {}}}, "tuning.classes.nope"),
    ({"classes": {"flash": {"delay_model": {"uniform_s": [5, 1]}}}}, "tuning.classes.flash.delay_model.uniform_s"),
    ({"classes": {"flash": {"delay_model": {"table": {"edges_s": [0, 1], "weights": [1, 2]}}}}},
     "tuning.classes.flash.delay_model.table"),
    ({"classes": {"flash": {"delay_model": {"uniform_s": [0, 1], "table": {}}}}}, "tuning.classes.flash.delay_model"),
    ({"classes": {"flash": {"windows_s": [[0, 1], [3]]}}}, "tuning.classes.flash.windows_s[1]"),
    ({"classes": {"flash": {"distance_fraction": 1.5}}}, "tuning.classes.flash.distance_fraction"),
    ({"fap_grid": {"min": 0.1, "max": 0.01}}, "tuning.fap_grid"),
    ({"fap_grid": {"max": 1.0}}, "tuning.fap_grid.max"),
    ({"slides": 0}, "tuning.slides"),
])
def test_tuning_errors_name_the_key_path(raw, path):
    with pytest.raises(ConfigError) as exc:
        parse_tuning(raw, CLASSES)
    assert exc.value.path == path


def test_fap_grid_is_log_spaced_with_its_ends():
    s = parse_tuning({"fap_grid": {"min": 1e-4, "max": 0.1, "per_decade": 4}}, CLASSES)
    f = fap_thresholds(s)
    assert f[0] == pytest.approx(1e-4) and f[-1] == pytest.approx(0.1)
    assert f.size == 13  # 3 decades × 4 + 1
    assert np.allclose(np.diff(np.log10(f)), 0.25)


def test_delay_table_samples_its_histogram():
    s = parse_tuning({"classes": {"flash": {"delay_model": {"table": {"edges_s": [0, 10, 40], "weights": [1, 3]}}}}},
                     CLASSES)
    d = s.for_class("flash").delay_for(CLASSES["flash"])
    assert d.weights == (0.25, 0.75) and d.support_s == (0.0, 40.0)
    x = d.sample(4000, np.random.default_rng(5))
    # The histogram's CDF, written out: 0.25 x/10 on [0, 10], then 0.25 + 0.75 (x-10)/30.
    cdf = lambda v: np.where(v < 10, 0.025 * v, 0.25 + 0.025 * (v - 10))  # noqa: E731
    assert stats.kstest(x, cdf).pvalue > 0.01
    assert d.fraction_in(5, 20) == pytest.approx(0.125 + 0.25)


def test_window_grid_holds_the_configured_window_and_the_delay_range():
    s = parse_tuning({"classes": {"flash": {"delay_model": {"uniform_s": [100, 400]}}}}, CLASSES)
    grid = window_grid(CLASSES["flash"], s.for_class("flash"))
    assert (-500.0, 500.0) in grid and (100.0, 400.0) in grid
    assert grid == tuple(sorted(set(grid)))
    assert all(hi > lo for lo, hi in grid)
    explicit = parse_tuning({"classes": {"flash": {"windows_s": [[0, 10], [0, 20]]}}}, CLASSES)
    assert window_grid(CLASSES["flash"], explicit.for_class("flash")) == ((-500.0, 500.0), (0.0, 10.0), (0.0, 20.0))


# ---------------------------------------------------------------- background
def test_footprint_of_known_cells_and_rate_of_a_poisson_stream():
    rng = np.random.default_rng(2)
    import healpy as hp

    order = 2
    cells = np.arange(0, 192, 3)  # every third order-2 cell: a footprint of 64 cells
    n_exp = 6000
    fine = (cells[rng.integers(0, cells.size, n_exp)] << 20) + rng.integers(0, 4**10, n_exp)
    theta, phi = hp.pix2ang(1 << 12, fine, nest=True)
    ra, dec = np.degrees(phi), 90 - np.degrees(theta)
    fp = estimate_footprint(ra, dec)
    # 6000 reports over 64 cells: the automatic order is 2 (94 per cell; order 3 would give 23.4
    # per occupied cell, but its 256 cells are all occupied too - the test accepts either).
    assert fp.order in (2, 3)
    assert fp.area_deg2 == pytest.approx(64 * 4 ** (-order) * 41252.96 / 12, rel=1e-6)
    # Poisson stream of known rate over that footprint for 30 days.
    rate = n_exp / (fp.area_deg2 * 30.0)
    t = np.sort(rng.uniform(0, 30 * 86400, n_exp))
    r = measure_rate(n_exp, fp, live_time(t), CLASSES["flash"])
    assert abs(r.rate_per_deg2_per_day - rate) < 3 * r.err_per_deg2_per_day
    assert r.err_per_deg2_per_day == pytest.approx(rate / math.sqrt(n_exp), rel=0.01)


def test_outages_are_taken_out_of_the_live_time():
    rng = np.random.default_rng(3)
    t = np.concatenate([rng.uniform(0, 10 * 86400, 3000), rng.uniform(20 * 86400, 30 * 86400, 3000)])
    lt = live_time(t)
    assert lt.segments == 2
    assert lt.live_s == pytest.approx(20 * 86400, rel=0.01)
    assert not lt.is_live(15 * 86400) and lt.is_live(5 * 86400)


def test_cadence_observe_matches_a_loop():
    rng = np.random.default_rng(4)
    n = 400
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    t = rng.uniform(0, 1e6, n)
    lnd = np.where(rng.uniform(size=n) < 0.7, t - rng.uniform(1e3, 1e5, n), np.nan)
    fp = estimate_footprint(ra, dec, order=1)
    cad = cadence_from_reports(fp, ra, dec, t, lnd)
    qra = rng.uniform(0, 360, 300)
    qdec = np.degrees(np.arcsin(rng.uniform(-1, 1, 300)))
    qt = rng.uniform(-1e5, 1.1e6, 300)
    obs, t_det, l_det = cad.observe(qra, qdec, qt)
    cell_r = fp.cell_of(ra, dec)
    cell_q = fp.cell_of(qra, qdec)
    for i in range(300):
        # Brute force: every epoch of the query's cell (times and last non-detections of its reports).
        sel = cell_r == cell_q[i]
        ep = np.sort(np.unique(np.concatenate([t[sel], lnd[sel][np.isfinite(lnd[sel])]])))
        after = ep[ep >= qt[i]]
        before = ep[ep < qt[i]]
        assert obs[i] == (after.size > 0)
        if after.size:
            assert t_det[i] == after[0]
            assert (np.isnan(l_det[i]) and before.size == 0) or l_det[i] == before[-1]


# -------------------------------------------------------------------- slides
def test_slide_offsets_keep_clear_of_zero_lag():
    rng = np.random.default_rng(6)
    t = np.sort(rng.uniform(0, 40 * 86400, 500))
    plan = plan_slides(t, np.zeros(500), [(-500, 500), (0, 2000)], 30)
    d = plan.offsets_s
    assert d.size == 30
    assert d.min() >= 2500 and d.max() <= plan.period_s - 2500
    short = plan_slides(t[:5] * 1e-4, np.zeros(5), [(0, 2000)], 10)
    assert short.offsets_s.size == 0 and "no slide fits" in short.reason


def test_slid_candidates_match_a_loop_over_copies_of_the_stream():
    rng = np.random.default_rng(7)
    t = np.sort(rng.uniform(1e6, 1e6 + 5e5, 300))
    plan = plan_slides(t, np.zeros(t.size), [(-2e4, 3e4)], 12)
    g = 1e6 + 4.9e5  # near the end of the period: windows wrap around
    rows, shift, slide = slid_candidates(t, plan, g, -2e4, 3e4, 0.0)
    got = sorted(zip(slide.tolist(), rows.tolist()))
    want = []
    for k, d in enumerate(plan.offsets_s):
        for i, ti in enumerate(t):
            for m in range(-3, 4):
                tt = ti - d + m * plan.period_s
                if g - 2e4 <= tt <= g + 3e4:
                    want.append((k, i))
    assert got == sorted(want)
    assert np.all((t[rows] + shift >= g - 2e4 - 1e-6) & (t[rows] + shift <= g + 3e4 + 1e-6))


# ---------------------------------------------------------------------- scan
def test_count_passes_matches_a_loop():
    rng = np.random.default_rng(8)
    mu = np.where(rng.uniform(size=500) < 0.2, np.inf, rng.exponential(0.3, 500))
    grp = rng.integers(0, 7, 500)
    thr = np.array([0.01, 0.05, 0.1, 0.5, 1.0])
    got = count_passes(mu, grp, 7, thr)
    for g in range(7):
        for i, x in enumerate(thr):
            assert got[g, i] == int(np.sum((grp == g) & (mu <= x)))


def test_model_false_per_event_for_a_sharp_class_is_the_capped_poisson_mean():
    r = CLASSES["flash"].rate_per_sr_per_s
    f = np.array([1e-3, 0.1, 0.5])
    out = model_false_per_event(f, [(-500, 500)], np.zeros(10), r)
    mu_max = r * 4 * math.pi * 1000.0  # every in-window background report has μ <= r 4π W
    assert np.allclose(out[0], np.minimum(-np.log1p(-f), mu_max))


def test_threshold_at_target_and_choice_of_window():
    fpe = np.array([[0.0, 0.005, 0.02, 0.1], [0.0, 0.0, 0.009, 0.2], [0.02, 0.03, 0.05, 0.2]])
    eff = np.array([[0.1, 0.4, 0.6, 0.7], [0.1, 0.3, 0.4, 0.8], [0.5, 0.6, 0.7, 0.9]])
    ti, et = _at_target(fpe, eff, 0.01)
    assert ti.tolist() == [1, 2, -1] and et.tolist() == [0.4, 0.4, 0.0]
    # Equal efficiency: the shorter window wins; an unreachable one is never chosen.
    assert int(_choose(et, ti >= 0, np.array([10.0, 5.0, 1.0]))) == 1
    assert int(_choose(np.zeros(2), np.array([False, False]), np.array([1.0, 2.0]))) == -1


# ---------------------------------------------------------------- injections
def test_scattered_positions_follow_the_fisher_distribution():
    rng = np.random.default_rng(9)
    sigma = 4.0
    ra, dec = scatter_positions(np.full(3000, 40.0), np.full(3000, 70.0), sigma, rng)
    theta = np.radians(angular_separation_deg(40.0, 70.0, ra, dec))
    kappa = 1.0 / math.radians(sigma) ** 2
    # Fisher 1953: P(θ) = (1 - e^{-κ(1 - cos θ)}) / (1 - e^{-2κ}).
    cdf = lambda th: -np.expm1(-kappa * (1 - np.cos(th))) / -np.expm1(-2 * kappa)  # noqa: E731
    assert stats.kstest(theta, cdf).pvalue > 0.01


def test_injected_positions_are_drawn_from_the_map():
    from matcher.tune.background import TriggerCoverage
    from matcher.tune.injections import draw_injections

    m = synthetic_skymap([Blob(200.0, -30.0, kappa_for_area(80.0))], distance=(120.0, 30.0), max_order=7,
                         pixel_prob=2e-3)
    rng = np.random.default_rng(10)
    ra = rng.uniform(0, 360, 5000)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, 5000)))
    cov = TriggerCoverage(estimate_footprint(ra, dec), live_time(np.linspace(0, 1e6, 100)))
    inj = draw_injections("flash", 5e5, m, DelayModel.uniform(100, 400), cov, 2000, rng, pos_err_deg=0.0,
                          distance_fraction=0.0, distance_rel_err=0.1)
    assert inj.observed.all() and len(inj.batch) == 2000
    # Positions from the map's own posterior: their credible levels are uniform (a P-P check).
    assert stats.kstest(m.credible_level(inj.batch.ra_deg, inj.batch.dec_deg), "uniform").pvalue > 0.01
    dt = inj.batch.time - 5e5
    assert stats.kstest(dt, "uniform", args=(100, 300)).pvalue > 0.01


# ------------------------------------------------------------------ archive
def test_archive_keeps_latest_revisions_and_drops_withdrawn_events(tmp_path):
    import json

    from matcher.sky import moc_fits_bytes
    from matcher.tune import read_archive

    m = synthetic_skymap([Blob(10.0, 20.0, kappa_for_area(200.0))], distance=None, max_order=5, pixel_prob=1e-2)
    (tmp_path / "m.fits").write_bytes(moc_fits_bytes(m))
    alert = {"schema": "matcher/1", "type": "gw_alert", "localization": {"path": "m.fits"}}
    msgs = [
        {**alert, "event_id": "EV-A", "revision": 1, "state": "issued", "merger_time": "2026-03-01T00:00:00Z"},
        {**alert, "event_id": "EV-A", "revision": 3, "state": "revised", "merger_time": "2026-03-01T00:00:02Z"},
        {**alert, "event_id": "EV-A", "revision": 2, "state": "revised", "merger_time": "2026-03-01T00:00:01Z"},
        {**alert, "event_id": "EV-B", "revision": 1, "state": "issued", "merger_time": "2026-03-02T00:00:00Z"},
        {"schema": "matcher/1", "type": "gw_alert", "event_id": "EV-B", "revision": 2, "state": "withdrawn",
         "merger_time": "2026-03-02T00:00:00Z"},
        {"schema": "matcher/1", "type": "transient", "transient_id": "T1", "class": "flash", "ra_deg": 1.0,
         "dec_deg": 2.0, "time": "2026-03-01T01:00:00Z"},
        {"schema": "matcher/1", "type": "transient", "transient_id": "T1", "class": "flash", "ra_deg": 1.5,
         "dec_deg": 2.0, "time": "2026-03-01T02:00:00Z"},
        {"schema": "matcher/1", "type": "transient", "transient_id": "T2", "class": "flash", "ra_deg": 3.0,
         "dec_deg": 4.0, "time": "2026-03-01T03:00:00Z", "localization": {"path": "m.fits"}},
        {"schema": "matcher/1", "type": "transient", "transient_id": "T3", "class": "flash", "ra_deg": 3.0,
         "dec_deg": 4.0, "time": "2026-03-01T03:00:00Z", "localization": {"path": "absent.fits"}},
    ]
    (tmp_path / "a.jsonl").write_text("\n".join(json.dumps(x) for x in msgs) + "\nnot json\n")
    a = read_archive(tmp_path / "a.jsonl")
    assert [x.event_id for x in a.alerts] == ["EV-A"] and a.alerts[0].revision == 3
    assert a.reports.transient_id.tolist() == ["T1", "T2"]  # T1's first line; T3's map is missing
    assert a.reports.ra_deg[0] == 1.0
    assert a.report_maps is not None and a.report_maps[0] is None and a.report_maps[1] is not None
    assert any("line 10" in r for r in a.rejected) and any("T3" in r for r in a.rejected)
    assert any("withdrawn" in n and "EV-B" in n for n in a.notes)
    # Reports with their own maps go through the engine's map overlap in the slides.
    from matcher.tune import prepare, run_all

    plan, _ = prepare(a, CLASSES, parse_tuning({"slides": 4, "injections": 10}, CLASSES), ["flash"], 1)
    counts, _ = run_all(plan, progress_mode="off")
    c = counts[0]["flash"]
    assert c.slides == 4 and c.injections == 10 and c.candidates >= c.scored
