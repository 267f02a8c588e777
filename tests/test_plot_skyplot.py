"""The sky plot shows what it claims: contours that hold their probability, markers at their coordinates.

Content checks, not pixel snapshots:

* contours: the map's own pixels whose centres fall inside the drawn 90% (50%)
  polylines hold 90% (50%) of the probability, within the probability of the
  pixels close enough to the line that image sampling can put them on either
  side of it (the tolerance is computed from the pixel sizes, see ``_band``);
* positions: candidates' and hosts' projected positions agree with healpy's own
  Mollweide and gnomonic projectors (a second implementation of the same
  formulas), and the drawn markers sit at those positions;
* the rendered image has the stated size and is not blank.

The transients and hosts are invented.
"""

from __future__ import annotations

import io
import math

import healpy as hp
import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.collections import PathCollection
from matplotlib.path import Path as MplPath
from scipy import integrate
from scipy.spatial import cKDTree

from matcher.errors import InputError
from matcher.report import palette
from matcher.report.skyplot import (
    Candidate,
    EventInfo,
    Host,
    error_circle_radius_deg,
    figure_bytes,
    plot_localization,
)
from matcher.sky import read_skymap

CANDIDATES = [
    Candidate("AT-T1", 213.62, -21.05, 0.0003, p_assoc=0.71, distance_mpc=122.0, distance_err_mpc=9.0),
    Candidate("AT-T2", 211.80, -23.30, 0.0003, p_assoc=0.08),
    Candidate("GRB-T3", 215.5, -18.5, 2.5, p_assoc=0.15),
    Candidate("AT-T4", 98.4, 35.2, None, p_assoc=0.0),
]
HOSTS = [Host(f"G{i}", 213.0 + 0.35 * i, -22.0 + 0.25 * i, p_host=0.2 / (i + 1), distance_mpc=100.0 + 6 * i,
              distance_err_mpc=7.0) for i in range(6)]


@pytest.fixture(scope="module")
def blob():
    return read_skymap("fixtures/skymaps/demo_blob.multiorder.fits.gz")


@pytest.fixture(scope="module")
def arc():
    return read_skymap("fixtures/skymaps/demo_arc.multiorder.fits")


@pytest.fixture(scope="module")
def blob_plot(blob):
    return plot_localization(blob, candidates=CANDIDATES, hosts=HOSTS,
                             event=EventInfo("GW-T-0001", 3, "2026-11-28T03:14:15.926Z"))


def _pixel_centres(skymap):
    theta = np.empty(skymap.npix)
    phi = np.empty(skymap.npix)
    for o in np.unique(skymap.order):
        sel = skymap.order == o
        theta[sel], phi[sel] = hp.pix2ang(1 << int(o), skymap.ipix[sel], nest=True)
    return np.degrees(phi) % 360.0, 90.0 - np.degrees(theta)


def _inside(polylines, pts):
    """Even-odd rule over the closed polylines (a hole inside a region flips back to outside)."""
    count = np.zeros(len(pts), dtype=int)
    for seg in polylines:
        assert np.allclose(seg[0], seg[-1], atol=1e-6), "a contour polyline is not closed"
        count += MplPath(seg).contains_points(pts)
    return count % 2 == 1


def _band(xy, polylines):
    """Map pixels whose side of the drawn line image sampling can decide either way.

    The level image holds each map pixel's credible level at every image pixel
    centre inside it, and ``contour`` puts the line between neighbouring image
    centres on either side of the crossing (linear interpolation), so the line
    lies within one grid diagonal (√2 image pixels) of a map pixel's edge. A map
    pixel's centre can fall on the wrong side only if it lies that close to the
    line: those pixels form the band, and their probability is the tolerance.
    """
    vertices = np.concatenate(polylines)
    dist, _ = cKDTree(vertices).query(np.nan_to_num(xy, nan=-1e6))
    return dist <= 1.5


def _check_enclosure(panel, skymap, level):
    ra, dec = _pixel_centres(skymap)
    x, y = panel.wcs.wcs_world2pix(ra, dec, 0)
    xy = np.column_stack([x, y])
    polylines = panel.contours[level]
    assert polylines, f"no {level} contour drawn in {panel.name}"
    inside = _inside(polylines, xy)
    band = _band(xy, polylines)
    p_in = float(skymap.prob[inside].sum())
    # Whole pixels cannot hold exactly `level`: the pixels (one tie group) whose cumulative
    # probability steps across it are on the outside, so up to their probability is missing.
    levels = skymap.pixel_credible_level()
    step = levels == levels[levels >= level].min()
    tol = float(skymap.prob[band].sum() + skymap.prob[step].sum())
    # Away from the line, each pixel is inside exactly when its own credible level is below the contour's.
    expected = skymap.pixel_credible_level() < level
    assert np.array_equal(inside[~band], expected[~band])
    assert abs(p_in - level) <= tol + 1e-9, (panel.name, level, p_in, tol)
    return p_in, tol


@pytest.mark.parametrize("level", [0.5, 0.9])
def test_zoom_contours_enclose_their_probability(blob_plot, blob, level):
    p_in, tol = _check_enclosure(blob_plot.panels["zoom"], blob, level)
    # The zoom samples the map finely (0.02° per image pixel, 0.11° map pixels), so the band is
    # nearly empty (measured: 3e-4 at 50%, 7e-5 at 90%): a contour drawn at the wrong level fails.
    assert tol < 0.01


@pytest.mark.parametrize("level", [0.5, 0.9])
def test_allsky_contours_enclose_their_probability(blob_plot, blob, level):
    p_in, tol = _check_enclosure(blob_plot.panels["allsky"], blob, level)
    # 0.27° image pixels on a 45 deg² region: the band holds much of the 50% region's edge
    # (measured 0.27 at 50%, 0.10 at 90%); pixels off the band are still checked one by one.
    assert tol < (0.3 if level == 0.5 else 0.12)


def test_contours_across_the_mollweide_seam(blob):
    """Centred 180° away, the region is cut by the map's edge into two closed pieces that still hold 90%."""
    sp = plot_localization(blob, zoom=False, center_ra_deg=(213.25 + 180.0) % 360.0)
    panel = sp.panels["allsky"]
    assert len(panel.contours[0.9]) >= 2
    xs = np.concatenate([seg[:, 0] for seg in panel.contours[0.9]])
    nx = panel.wcs.pixel_shape[0]
    assert xs.min() < 0.1 * nx and xs.max() > 0.9 * nx  # pieces at both edges
    _check_enclosure(panel, blob, 0.9)


def test_large_region_contours_on_the_allsky_view(arc):
    sp = plot_localization(arc)
    assert "zoom" not in sp.panels
    p_in, tol = _check_enclosure(sp.panels["allsky"], arc, 0.9)
    assert tol < 0.05  # measured 0.02 for the 737 deg² arc
    p_in, tol = _check_enclosure(sp.panels["allsky"], arc, 0.5)
    assert tol < 0.15  # measured 0.11


def test_contours_radec_lie_on_the_level(blob_plot, blob):
    # Points of the drawn 90% line lie where the map's credible level crosses 0.9: the
    # level at those points must be near 0.9 (within the band of levels one pixel spans).
    pts = np.concatenate(blob_plot.panels["zoom"].contours_radec(0.9))
    lv = blob.credible_level(pts[:, 0], np.clip(pts[:, 1], -90, 90))
    assert np.median(np.abs(lv - 0.9)) < 0.01


def test_positions_match_healpy_mollweide(blob_plot):
    panel = blob_plot.panels["allsky"]
    ra0 = float(panel.wcs.wcs.crval[0])
    assert ra0 == 210.0  # 213.25 rounded to 15°, as documented
    cands = blob_plot.candidates
    ra = np.array([c.ra_deg for c in cands])
    dec = np.array([c.dec_deg for c in cands])
    # healpy's Mollweide plane spans x in [-2, 2], y in [-1, 1] (east to the left); our image is
    # nx × nx/2 pixels filling that ellipse, 0-based, so one healpy unit is nx/4 pixels.
    x, y = hp.projector.MollweideProj(rot=(ra0, 0.0, 0.0)).ang2xy(ra, dec, lonlat=True)
    nx = panel.wcs.pixel_shape[0]
    expected = np.column_stack([(nx / 2 - 0.5) + x * nx / 4, (nx / 4 - 0.5) + y * nx / 4])
    # healpy solves 2γ + sin 2γ = π sin δ iteratively; agreement to a thousandth of a pixel.
    np.testing.assert_allclose(panel.candidate_xy, expected, atol=1e-3)
    hx, hy = hp.projector.MollweideProj(rot=(ra0, 0.0, 0.0)).ang2xy(
        np.array([h.ra_deg for h in blob_plot.hosts]), np.array([h.dec_deg for h in blob_plot.hosts]), lonlat=True)
    np.testing.assert_allclose(panel.host_xy[:, 0], (nx / 2 - 0.5) + hx * nx / 4, atol=1e-3)
    np.testing.assert_allclose(panel.host_xy[:, 1], (nx / 4 - 0.5) + hy * nx / 4, atol=1e-3)


def test_positions_match_healpy_gnomonic(blob_plot):
    panel = blob_plot.panels["zoom"]
    ra0, dec0 = (float(v) for v in panel.wcs.wcs.crval)
    step_rad = math.radians(abs(float(panel.wcs.wcs.cdelt[0])))
    n = panel.wcs.pixel_shape[0]
    cands = blob_plot.candidates
    ra = np.array([c.ra_deg for c in cands])
    dec = np.array([c.dec_deg for c in cands])
    # healpy's gnomonic plane is in units of tan(angle) (radians near the centre), east to the left.
    x, y = hp.projector.GnomonicProj(rot=(ra0, dec0, 0.0)).ang2xy(ra, dec, lonlat=True)
    expected = np.column_stack([(n / 2 - 0.5) + x / step_rad, (n / 2 - 0.5) + y / step_rad])
    near = np.array([c.transient_id != "AT-T4" for c in cands])  # AT-T4 is on the far side
    np.testing.assert_allclose(panel.candidate_xy[near], expected[near], atol=1e-6)
    assert np.all(np.isnan(panel.candidate_xy[~near])) and np.all(np.isnan(expected[~near]))


@pytest.mark.parametrize("name", ["allsky", "zoom"])
def test_markers_are_drawn_at_the_projected_positions(blob_plot, name):
    panel = blob_plot.panels[name]
    n = len(blob_plot.candidates)
    stars = [c for c in panel.axes.collections if isinstance(c, PathCollection) and len(c.get_offsets()) == n
             and np.allclose(c.get_facecolor()[0][:3], _rgb(palette.CANDIDATE["face"]))]
    assert len(stars) == 1
    got = np.asarray(stars[0].get_offsets(), float)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(panel.candidate_xy))
    ok = np.isfinite(got)
    np.testing.assert_allclose(got[ok], panel.candidate_xy[ok])


def test_view_is_the_image_even_with_markers_outside(blob):
    far = [Candidate("far-north", 213.25, -10.0), Candidate("far-east", 230.0, -21.5)]
    sp = plot_localization(blob, candidates=far, zoom_size_px=200, allsky_width_px=400)
    zoom = sp.panels["zoom"]
    assert not np.any(zoom.in_view(zoom.candidate_xy))
    assert zoom.axes.get_xlim() == (-0.5, 199.5) and zoom.axes.get_ylim() == (-0.5, 199.5)


def _rgb(c):
    from matplotlib.colors import to_rgb

    return np.array(to_rgb(c))


def test_error_circles_drawn_to_scale(blob_plot):
    from astropy.coordinates import SkyCoord

    panel = blob_plot.panels["zoom"]
    grb = next(c for c in blob_plot.candidates if c.transient_id == "GRB-T3")
    radius = float(error_circle_radius_deg(grb.err_deg))
    lines = [ln for ln in panel.axes.lines if ln.get_linestyle() == ":" and len(ln.get_xdata()) > 50]
    centre = SkyCoord(grb.ra_deg, grb.dec_deg, unit="deg")
    found = False
    for ln in lines:
        x, y = np.asarray(ln.get_xdata(), float), np.asarray(ln.get_ydata(), float)
        ra, dec = panel.wcs.wcs_pix2world(x, y, 0)
        sep = centre.separation(SkyCoord(ra, dec, unit="deg")).deg
        if np.allclose(sep, radius, atol=1e-6):
            found = True
    assert found, "no dotted line at the GRB's 90% radius"


def test_error_circle_radius_against_published_forms():
    # Small errors: a circular 2-D Gaussian holds 90% within sqrt(-2 ln 0.1) σ = 2.1460 σ
    # (Rayleigh distribution of the offset, common practice).
    assert float(error_circle_radius_deg(1e-4)) == pytest.approx(1e-4 * math.sqrt(-2 * math.log(0.1)), rel=1e-6)
    # Large errors: the Fisher density κ e^{κ(cos t - 1)} sin t / (1 - e^{-2κ}) (Fisher 1953)
    # integrated numerically with scipy to the radius must give 0.9.
    for sigma in (5.0, 15.0, 40.0):
        kappa = 1.0 / math.radians(sigma) ** 2
        r = math.radians(float(error_circle_radius_deg(sigma)))
        mass, _ = integrate.quad(lambda t: kappa * math.exp(kappa * (math.cos(t) - 1)) * math.sin(t)
                                 / -math.expm1(-2 * kappa), 0.0, r)
        assert mass == pytest.approx(0.9, abs=1e-9)
    assert float(error_circle_radius_deg(0.0)) == 0.0


def test_png_has_the_stated_size_and_is_not_blank(blob_plot):
    png = figure_bytes(blob_plot.figure, "png")
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    img = mpimg.imread(io.BytesIO(png))
    assert img.shape[:2] == (850, 1100)  # 8.5 × 11 in at 100 dpi
    rgb = img[..., :3]
    not_white = np.any(rgb < 0.97, axis=-1)
    assert not_white.mean() > 0.1
    # The densest sky is drawn in the dark end of the colour map (ink, L* ≈ 11).
    assert np.any(np.all(rgb < 0.2, axis=-1) & (np.ptp(rgb, axis=-1) > 0.05))
    assert len(np.unique((rgb * 255).astype(np.uint8).reshape(-1, 3), axis=0)) > 200


def test_other_formats_and_sizes(blob):
    sp = plot_localization(blob, zoom=False, figsize=(8.0, 6.0), dpi=50, allsky_width_px=400)
    img = mpimg.imread(io.BytesIO(figure_bytes(sp.figure, "png")))
    assert img.shape[:2] == (300, 400)
    assert figure_bytes(sp.figure, "pdf")[:5] == b"%PDF-"
    svg = figure_bytes(sp.figure, ".SVG")
    assert b"<svg" in svg[:2000]
    with pytest.raises(InputError, match="'gif' is not one of png, pdf, svg"):
        figure_bytes(sp.figure, "gif")


def test_title_and_facts(blob_plot):
    assert blob_plot.title == "GW-T-0001  ·  revision 3  ·  merger 2026-11-28T03:14:15.926Z"
    assert blob_plot.figure.get_suptitle() == blob_plot.title
    texts = [t.get_text() for t in blob_plot.figure.texts]
    assert any("90% area 45 deg²" in t and "distance 120 ± 30 Mpc" in t for t in texts)


def test_title_from_map_header(blob):
    sp = plot_localization(blob, zoom=False, allsky_width_px=300)
    assert sp.title == "GW-DEMO-0001  ·  merger 2026-11-28T03:14:15.926"


def test_colour_scale_has_units(blob_plot):
    labels = [ax.get_xlabel() for ax in blob_plot.figure.axes]
    assert "probability per deg²" in labels


def test_zoom_decision(blob_plot, arc, blob):
    assert "zoom" in blob_plot.panels and blob_plot.area_deg2[0.9] < 400
    sp = plot_localization(arc, zoom=False, allsky_width_px=300)
    assert "zoom" not in sp.panels and sp.zoom_note == "zoomed view turned off"
    sp = plot_localization(arc, allsky_width_px=300)
    assert sp.zoom_note.startswith("No zoomed view: the 90% region covers 737 deg²")
    sp = plot_localization(blob, zoom_max_area_deg2=40.0, allsky_width_px=300)
    assert "zoom" not in sp.panels


def test_labels_by_rank_with_p_assoc(blob_plot):
    ranked = [(c.rank, c.transient_id) for c in blob_plot.candidates]
    assert ranked == [(1, "AT-T1"), (2, "GRB-T3"), (3, "AT-T2"), (4, "AT-T4")]
    assert blob_plot.ranking == "p_assoc"
    zoom_texts = {t.get_text() for t in blob_plot.panels["zoom"].axes.texts}
    assert {"1 · P=0.71", "2 · P=0.15", "3 · P=0.08"} <= zoom_texts
    # AT-T4 lies outside the zoom: labelled on the all-sky view instead.
    sky_texts = {t.get_text() for t in blob_plot.panels["allsky"].axes.texts}
    assert "4 · P=0.00" in sky_texts and blob_plot.panels["allsky"].labelled == ("AT-T4",)


def test_ranking_by_credible_level_without_scores(blob):
    cands = [Candidate("far", 100.0, 40.0), Candidate("near", 213.3, -21.5), Candidate("mid", 211.8, -23.3)]
    sp = plot_localization(blob, candidates=cands, zoom=False, allsky_width_px=300)
    assert [c.transient_id for c in sp.candidates] == ["near", "mid", "far"]
    assert sp.ranking == "credible_level"
    legend = sp.figure.legends[0]
    assert any("(by credible level: not scored)" in t.get_text() for t in legend.get_texts())


def test_given_ranks_are_kept_and_must_be_distinct(blob):
    cands = [Candidate("a", 213.3, -21.5, rank=2), Candidate("b", 211.8, -23.3, rank=1)]
    sp = plot_localization(blob, candidates=cands, zoom=False, allsky_width_px=300)
    assert [c.transient_id for c in sp.candidates] == ["b", "a"] and sp.ranking == "given"
    with pytest.raises(InputError, match="ranks must be distinct"):
        plot_localization(blob, candidates=[Candidate("a", 1, 1, rank=1), Candidate("b", 2, 2, rank=1)])


def test_distance_panel(blob_plot, blob):
    dist = blob_plot.distance
    # The sky-marginal density of the distance ansatz (Singer et al. 2016) integrates to 1;
    # the grid reaches mean + 4σ, so at most ~1e-4 is beyond it, plus trapezoid error.
    assert np.trapezoid(dist.marginal_pdf, dist.r_mpc) == pytest.approx(1.0, abs=2e-3)
    np.testing.assert_allclose(dist.marginal_pdf, blob.distance_marginal_pdf(dist.r_mpc))
    assert dist.line_of_sight_id == "AT-T1"
    kinds = [(k, i) for k, i, *_ in dist.rows]
    assert kinds[0] == ("candidate", "AT-T1") and ("host", "G0") in kinds
    assert len([k for k in kinds if k[0] == "host"]) == 5


def test_hosts_are_ranked_and_capped(blob):
    hosts = [Host(f"H{i}", 213.0, -21.0 + 0.1 * i, p_host=0.01 * i) for i in range(15)]
    sp = plot_localization(blob, hosts=hosts, max_hosts=4, zoom=False, allsky_width_px=300)
    assert [h.galaxy_id for h in sp.hosts] == ["H14", "H13", "H12", "H11"]
    assert [h.rank for h in sp.hosts] == [1, 2, 3, 4]
    assert sp.panels["allsky"].host_xy.shape == (4, 2)


def test_map_without_distance_layers():
    from matcher.sky import Blob, kappa_for_area, synthetic_skymap

    m = synthetic_skymap([Blob(40.0, 10.0, kappa_for_area(100.0))], max_order=7, pixel_prob=1e-3)
    sp = plot_localization(m, allsky_width_px=300, zoom_size_px=150)
    assert sp.distance is None
    sp = plot_localization(m, candidates=[Candidate("c", 40.0, 10.0, distance_mpc=80.0)], allsky_width_px=300,
                           zoom_size_px=150)
    assert sp.distance.marginal_pdf is None and sp.distance.rows[0][2] == 80.0


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda: Candidate("T17", 10.0, 97.2), "candidate T17: dec_deg=97.2 is outside"),
        (lambda: Candidate("T18", 361.0, 0.0), "candidate T18: ra_deg=361.0 is outside"),
        (lambda: Candidate("T19", 1.0, 0.0, err_deg=-1.0), "candidate T19: err_deg=-1.0 is outside"),
        (lambda: Candidate("T20", 1.0, 0.0, p_assoc=1.5), "candidate T20: p_assoc=1.5 is outside"),
        (lambda: Candidate("T21", 1.0, 0.0, rank=0), "candidate T21: rank=0 must be a positive integer"),
        (lambda: Candidate("T22", 1.0, 0.0, distance_mpc=0.0), "candidate T22: distance_mpc=0.0 is outside"),
        (lambda: Candidate("T23", 1.0, 0.0, rank="first"), "candidate T23: rank='first' must be a positive integer"),
        (lambda: Candidate("", 1.0, 0.0), "transient_id must be a non-empty string"),
        (lambda: Host("G9", "north", 0.0), "host G9: ra_deg='north' is not a number"),
    ],
)
def test_bad_inputs_are_named(make, message):
    with pytest.raises(InputError, match=message):
        make()


def test_bad_options(blob):
    with pytest.raises(InputError, match="levels"):
        plot_localization(blob, levels=(0.5, 1.0))
    with pytest.raises(InputError, match="must be a SkyMap"):
        plot_localization("map.fits")
    with pytest.raises(InputError, match="Candidate objects"):
        plot_localization(blob, candidates=[{"ra_deg": 1.0}])


def test_nan_means_not_known():
    c = Candidate("T1", 10.0, 5.0, err_deg=float("nan"), p_assoc=float("nan"), distance_mpc=float("nan"))
    assert c.err_deg is None and c.p_assoc is None and c.distance_mpc is None
