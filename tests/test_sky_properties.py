"""Property tests (hypothesis) of credible regions on arbitrary maps.

Properties (definitions, common practice): the searched probability is monotone
in density; areas add up to the whole sphere (4π sr); credible areas grow with
the level; flat and multi-order forms of one map agree.
"""

from __future__ import annotations

import numpy as np
from hypothesis import example, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from matcher.sky import DEG2_PER_SR, SkyMap

weights = arrays(
    np.float64,
    st.sampled_from([12, 48, 192]),
    elements=st.floats(0.0, 1.0, allow_nan=False, allow_subnormal=False),
).filter(lambda w: w.sum() > 1e-6)


@settings(max_examples=60, deadline=None)
@given(weights, st.booleans())
@example(np.ones(12), False)  # a flat (uniform) map: every position ties
def test_level_is_monotone_in_density(w, nest):
    m = SkyMap.from_flat(w / w.sum(), nest=nest)
    level = m.pixel_credible_level()
    order = np.argsort(-m.probdensity, kind="stable")
    d = m.probdensity[order]
    lv = level[order]
    assert np.all(np.diff(lv) >= -1e-12)
    # Ties share one level.
    same = np.diff(d) == 0
    assert np.all(np.abs(np.diff(lv)[same]) < 1e-12)
    assert np.all((lv >= 0) & (lv <= 1 + 1e-12))


@settings(max_examples=60, deadline=None)
@given(weights)
def test_areas_add_up_and_grow(w):
    m = SkyMap.from_flat(w / w.sum(), nest=True)
    assert np.isclose(m.area_sr.sum(), 4 * np.pi, rtol=1e-12)
    # The least dense pixel's searched area is the whole sphere.
    assert np.isclose(m._ranking[4].max(), 4 * np.pi, rtol=1e-12)
    levels = np.linspace(0.01, 1.0, 25)
    areas = m.credible_areas(levels)
    assert np.all(np.diff(areas) >= -1e-9)
    assert areas[-1] <= 4 * np.pi * DEG2_PER_SR * (1 + 1e-12)
    # The area holding all probability covers every pixel holding a non-negligible share
    # (pixels below float rounding of the cumulative sum may fall outside).
    assert areas[-1] >= m.area_sr[m.prob > 1e-6].sum() * DEG2_PER_SR * (1 - 1e-6)


@settings(max_examples=40, deadline=None)
@given(weights, st.integers(1, 3))
def test_refining_never_changes_areas(w, extra):
    # Splitting every pixel into children of equal density is the same map.
    m = SkyMap.from_flat(w / w.sum(), nest=True)
    prob, *_ = m.to_flat(m.max_order + extra)
    fine = SkyMap.from_flat(prob, nest=True)
    levels = [0.1, 0.5, 0.9]
    assert np.allclose(fine.credible_areas(levels), m.credible_areas(levels), rtol=1e-9)
