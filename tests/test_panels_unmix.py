"""The unmixing's fits: each pixel's rust colour and cover (``coupon.segment.panels.rust._best_rust``) and the
cone fraction of dark coatings (``_cone_fraction``, ``_cone_fraction_along``).

Reference library: scipy.optimize.nnls (non-negative least squares) on the same fits, and
scipy.optimize.minimize_scalar for the fit at full cover.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize_scalar, nnls

from coupon.ratings.panel_ratings import PINPOINT_MAX_MM2
from coupon.segment.panels.rust import (
    CONE_MIN_SITE_MM2,
    RUST_ENDMEMBERS_SRGB,
    _best_rust,
    _cone_fraction,
    _cone_fraction_along,
    _lin,
    _norm2,
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


COATINGS = {"white": _lin((0.90, 0.90, 0.88)), "grey": _lin((0.55, 0.56, 0.57)), "green": _lin((0.28, 0.46, 0.36))}


def _reference_fits(q: np.ndarray, c: np.ndarray) -> list[tuple[float, float]]:
    """(residual^2, cover) of every fit :func:`_best_rust` weighs, by scipy: each rust colour alone (cover in
    [0, 1]), each pair of neighbours by nnls (both shares > 0, cover <= 1), and beyond full cover the best
    colour on the segment between them at cover 1 (minimize_scalar)."""
    devs = [e - c for e in RUST]
    out = []
    for d in devs:
        f = float(np.clip(q @ d / (d @ d), 0, 1))
        if f > 0:
            out.append((float(np.sum((q - f * d) ** 2)), f))
    for d1, d2 in zip(devs[:-1], devs[1:]):
        (a, b), _ = nnls(np.column_stack([d1, d2]), q)
        if a + b > 1:
            t = minimize_scalar(lambda t: np.sum((q - (1 - t) * d1 - t * d2) ** 2), bounds=(0, 1),
                                method="bounded", options={"xatol": 1e-10}).x
            a, b = 1 - t, t
        if a > 1e-9 and b > 1e-9:
            out.append((float(np.sum((q - a * d1 - b * d2) ** 2)), float(a + b)))
    return sorted(out)


@settings(max_examples=80, deadline=None)
@given(st.lists(st.floats(-0.6, 0.6), min_size=3, max_size=3), st.sampled_from(sorted(COATINGS)))
def test_best_rust_fit_against_scipy(dq, coating):
    # the best of the single-colour and pair fits (no neutral threshold: every fit may win)
    c = COATINGS[coating]
    q = np.asarray(dq, np.float64)
    assume(np.linalg.norm(q) > 1e-4)  # a pixel of the coating's own colour: every cover fits it alike
    ref = _reference_fits(q, c)
    q32 = q.astype(np.float32).reshape(3, 1)
    f, k, res, dev = _best_rust(q32, _norm2(q32), np.full(1, np.inf, np.float32), [(e - c).astype(np.float32) for e in RUST])
    if not ref:
        assert np.isnan(f[0]) and k[0] == -1
        return
    assert res[0] == pytest.approx(ref[0][0], rel=1e-3, abs=1e-6)
    # the cover of the best fit, unless another fit with another cover is as good within rounding
    if len(ref) == 1 or ref[1][0] - ref[0][0] > 1e-5 or abs(ref[1][1] - ref[0][1]) < 1e-3:
        assert f[0] == pytest.approx(ref[0][1], abs=1e-3)
    # the rust colour used explains the pixel: q = f * dev up to the residual
    assert np.sum((q - f[0] * dev[:, 0]) ** 2) == pytest.approx(res[0], rel=1e-3, abs=1e-6)


@pytest.mark.parametrize("coating", sorted(COATINGS))
def test_rust_colours_between_the_listed_ones_unmix_to_their_cover(coating):
    # the model's premise: a rust colour anywhere on the curve through the listed ones, at any cover,
    # p = c + f (e(s) - c); a pixel of translucent rust (a bleeding streak) of a colour between two listed
    # ones read 0.82 of its cover on the green coating when only the listed colours were fitted
    c = COATINGS[coating]
    rng = np.random.default_rng(1)
    n = 400
    k = rng.integers(0, len(RUST) - 1, n)
    s = rng.uniform(0, 1, n)
    e = np.array(RUST)[k] * (1 - s)[:, None] + np.array(RUST)[k + 1] * s[:, None]
    f = rng.uniform(0.05, 1.0, n)
    q = np.ascontiguousarray((f[:, None] * (e - c)).T.astype(np.float32))
    got, _, res, _ = _best_rust(q, _norm2(q), np.full(n, np.inf, np.float32), [(x - c).astype(np.float32) for x in RUST])
    np.testing.assert_allclose(got, f, atol=2e-3)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.0, 0.6), min_size=3, max_size=3), st.lists(st.floats(0.0, 0.8), min_size=3, max_size=3))
def test_cone_fraction_along_a_pixels_own_colour_against_scipy_nnls(rgb, rust):
    p, e = np.asarray(rgb, np.float64), np.asarray(rust, np.float64)
    assume(p.sum() > 1e-3 and e.sum() > 1e-3)
    # a rust colour nearly along the coating's own is no second column (the 2 x 2 fit degenerates)
    cosine = e @ DARK / np.linalg.norm(e) / np.linalg.norm(DARK)
    assume(cosine < 0.999)
    (a, b), _ = nnls(np.column_stack([DARK, e]), p)
    want = float(np.clip(1 - a, 0, 1)) if b > 1e-9 else 0.0
    got = _cone_fraction_along(p.astype(np.float32).reshape(3, 1), DARK, e.astype(np.float32).reshape(3, 1))[0]
    assume(b > 1e-6 or b < 1e-12)  # not on the edge where beta just vanishes (float32 against float64)
    assert abs(got - want) < 2e-3, (p, e)
