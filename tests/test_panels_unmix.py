"""The cone fraction of dark coatings (``coupon.segment.panels.rust._cone_fraction``).

Reference library: scipy.optimize.nnls (non-negative least squares) on the same two-column fits.
"""

from __future__ import annotations

import numpy as np
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy.optimize import nnls

from coupon.ratings.panel_ratings import PINPOINT_MAX_MM2
from coupon.segment.panels.rust import (
    CONE_MIN_SITE_MM2,
    RUST_ENDMEMBERS_SRGB,
    _cone_fraction,
    _lin,
)

RUST = [_lin(e) for e in RUST_ENDMEMBERS_SRGB]
DARK = _lin((0.13, 0.13, 0.14))  # a dark coating (our synthetic trays' "dark", sRGB)


def _nnls_fraction(p: np.ndarray, c: np.ndarray) -> float:
    """1 - alpha of the rust colour whose non-negative fit alpha c + beta e (beta > 0) leaves the least residual."""
    best = (np.inf, 1.0)
    for e in RUST:
        (a, b), res = nnls(np.column_stack([c, e]), p)
        if b > 1e-9 and res * res < best[0]:
            best = (res * res, a)
    return float(np.clip(1 - best[1], 0, 1))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.0, 0.6), min_size=3, max_size=3),
       st.sampled_from([DARK, _lin((0.55, 0.56, 0.57)), _lin((0.28, 0.46, 0.36))]))
def test_cone_fraction_against_scipy_nnls(rgb, c):
    p = np.asarray(rgb, np.float64)
    assume(p.sum() > 1e-3)  # a pixel of (almost) no light: any rust colour fits it at brightness 0
    got = _cone_fraction(p.astype(np.float32).reshape(3, 1), c, RUST)[0]
    assert abs(got - _nnls_fraction(p, c)) < 2e-3, (p, c)


def test_cone_fraction_does_not_depend_on_rust_brightness():
    # the model's premise: p = (1 - f) c + f k e for any brightness k of a known rust colour e
    rng = np.random.default_rng(0)
    f = rng.uniform(0.05, 1.0, 500)
    k = rng.uniform(0.5, 1.5, 500)
    e = RUST[rng.integers(0, len(RUST))]
    p = (1 - f)[None, :] * DARK[:, None] + (f * k)[None, :] * e[:, None]
    got = _cone_fraction(p.astype(np.float32), DARK, RUST)
    np.testing.assert_allclose(got, f, atol=2e-3)


def test_cone_limit_is_the_pinpoint_limit():
    # CONE_MIN_SITE_MM2's note: the distribution letter's pinpoint limit
    assert CONE_MIN_SITE_MM2 == PINPOINT_MAX_MM2


def test_light_field_is_not_pulled_by_a_zone_that_covers_most_of_the_panel():
    # a white panel at 10 px/mm whose coating lies under a 10 % lighting gradient, with a dark corroded
    # band over 60 % of it (an X scribe with 10 mm creep holds about that much): the light field must
    # follow the coating, not the band (the coating's brightness is 1 by the definition of its colour).
    # Reference: the gradient itself, computed here in closed form.
    from coupon.segment.panels.rust import _smooth_light

    rows, cols = 1500, 750
    x = (np.arange(cols) + 0.5) / cols - 0.5
    grad = np.broadcast_to((1.0 + 0.2 * x)[None, :], (rows, cols)).astype(np.float32)
    alpha = grad.copy()
    alpha[:, 150:600] *= 0.3  # the band: rust, a third as bright along the coating's colour
    light = _smooth_light(alpha, np.ones((rows, cols), bool), 10.0)
    assert np.abs(light / grad - 1).max() < 0.02
