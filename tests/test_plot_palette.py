"""The colour map gets darker monotonically, so the plot reads in greyscale and for colour-blind readers.

Lightness is CIE 1976 L* of the sRGB colour: the sRGB transfer function of
IEC 61966-2-1 (linear below 0.04045, else ((v + 0.055)/1.055)^2.4), luminance
Y with the Rec. 709 / sRGB primaries (0.2126, 0.7152, 0.0722), and
L* = 116 Y^(1/3) - 16 (CIE 15; linear branch below Y = 216/24389).
"""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.colors import to_rgb

from matcher.report import palette


def lightness(rgb) -> np.ndarray:
    v = np.asarray(rgb, dtype=float)[..., :3]
    lin = np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)
    y = lin @ np.array([0.2126, 0.7152, 0.0722])
    return np.where(y > 216 / 24389, 116 * np.cbrt(y) - 16, y * 24389 / 27)


def test_lightness_formula_check_values():
    # White is L* = 100 and sRGB grey 119/255 is the textbook mid-grey, L* = 50.0 (from memory);
    # both follow from the formulas above.
    assert float(lightness(to_rgb("#ffffff"))) == pytest.approx(100.0, abs=1e-9)
    assert float(lightness(to_rgb("#777777"))) == pytest.approx(50.0, abs=0.1)


def test_probability_map_darkens_monotonically():
    samples = palette.SKY_CMAP(np.linspace(0.0, 1.0, 256))
    lum = lightness(samples)
    assert np.all(np.diff(lum) < 0), "L* must fall all along the colour map"
    assert lum[0] > 95 and lum[-1] < 13  # paper to ink
    # Nearly even steps: no stretch of the map where probability changes but lightness barely does.
    steps = -np.diff(lum)
    assert steps.max() < 2.0 * steps.mean()


def test_anchor_lightness_is_as_documented():
    for lum, colour in palette.SKY_ANCHORS:
        assert float(lightness(to_rgb(colour))) == pytest.approx(lum, abs=0.15)


def test_overlays_differ_from_each_other_in_lightness_or_shape():
    # Candidates and hosts differ in marker shape and in lightness (filled mid-tone star vs
    # white diamond), so a greyscale print tells them apart.
    assert palette.CANDIDATE["marker"] != palette.HOST["marker"]
    cand = float(lightness(to_rgb(palette.CANDIDATE["face"])))
    host = float(lightness(to_rgb(palette.HOST["face"])))
    assert host - cand > 25
    # Contours: 50% and 90% differ in line style, not only in colour.
    assert palette.contour_style(0.5)["linestyles"] != palette.contour_style(0.9)["linestyles"]
    assert palette.ERROR_CIRCLE["linestyle"] not in (palette.contour_style(0.5)["linestyles"],
                                                     palette.contour_style(0.9)["linestyles"])
