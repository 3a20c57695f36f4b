"""Pit building blocks against reference libraries (scipy.ndimage, scikit-image) and point-pattern theory."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage as ndi
from skimage.measure import regionprops_table

from coupon.ratings.spatial import clark_evans, nearest_neighbour_mm
from coupon.segment.pits import fill_holes, label_components, object_moments


def _random_mask(seed: int, shape=(80, 120), density=0.45, blur=1.2) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return ndi.gaussian_filter(rng.random(shape), blur) > 0.5 + (0.5 - density) * 0.2


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 10_000), st.floats(0.3, 0.6))
def test_component_count_matches_scipy_label(seed, density):
    # reference: scipy.ndimage.label with 8-connectivity (a 3x3 structuring element)
    mask = _random_mask(seed, density=density)
    n, lab = label_components(mask)
    ref_lab, ref_n = ndi.label(mask, structure=np.ones((3, 3)))
    assert n == ref_n
    # same partition: every coupon label maps to exactly one scipy label
    pairs = np.unique(np.stack([lab[mask], ref_lab[mask]]), axis=1)
    assert pairs.shape[1] == n


@settings(max_examples=20, deadline=None)
@given(st.integers(0, 10_000))
def test_fill_holes_matches_scipy(seed):
    # reference: scipy.ndimage.binary_fill_holes (4-connected background, as for an 8-connected object)
    mask = _random_mask(seed, density=0.55, blur=1.5)
    np.testing.assert_array_equal(fill_holes(mask), ndi.binary_fill_holes(mask))


def test_moments_match_skimage_regionprops():
    # reference: skimage.measure.regionprops (area, centroid, axis_major_length, axis_minor_length)
    _, lab = label_components(_random_mask(7, shape=(200, 260)))
    mom = object_moments(lab)
    ref = regionprops_table(lab, properties=("label", "area", "centroid", "axis_major_length", "axis_minor_length"))
    k = ref["label"]
    np.testing.assert_allclose(mom["area"][k], ref["area"])
    np.testing.assert_allclose(mom["row"][k], ref["centroid-0"], atol=1e-9)
    np.testing.assert_allclose(mom["col"][k], ref["centroid-1"], atol=1e-9)
    np.testing.assert_allclose(mom["major"][k], ref["axis_major_length"], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(mom["minor"][k], ref["axis_minor_length"], rtol=1e-6, atol=1e-6)


def test_disc_of_known_radius():
    # a digital disc of radius 30 px: area pi r^2 (within 1 %), axes 2r (within 2 %)
    yy, xx = np.mgrid[0:101, 0:101]
    disc = (yy - 50) ** 2 + (xx - 50) ** 2 <= 30**2
    mom = object_moments(disc.astype(np.int32))
    assert mom["area"][1] == pytest.approx(np.pi * 900, rel=0.01)
    assert mom["major"][1] == pytest.approx(60, rel=0.02) and mom["minor"][1] == pytest.approx(60, rel=0.02)


def test_nearest_neighbour_matches_brute_force():
    rng = np.random.default_rng(3)
    pts = rng.uniform(0, 10, (50, 2))
    d = np.hypot(*(pts[:, None, :] - pts[None, :, :]).transpose(2, 0, 1))
    np.fill_diagonal(d, np.inf)
    np.testing.assert_allclose(nearest_neighbour_mm(pts), d.min(axis=1))


def _poisson(rng, n, w, h):
    return np.column_stack([rng.uniform(0, w, n), rng.uniform(0, h, n)])


def _clustered(rng, n, w, h, parents=8, spread=1.0):
    # Thomas process: offspring scattered (Gaussian, sigma = spread) around a few parent points
    par = _poisson(rng, parents, w, h)
    pts = par[rng.integers(parents, size=n)] + rng.normal(0, spread, (n, 2))
    keep = (pts[:, 0] >= 0) & (pts[:, 0] <= w) & (pts[:, 1] >= 0) & (pts[:, 1] <= h)
    return pts[keep]


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 100_000))
def test_clark_evans_near_one_for_poisson(seed):
    # Clark & Evans (1954): R = 1 for complete spatial randomness; Donnelly (1978) edge correction.
    # A single pattern of 150 points has a standard error of about 0.04 in R: tolerance 0.2 (5 sigma).
    rng = np.random.default_rng(seed)
    w, h = 60.0, 40.0
    r = clark_evans(_poisson(rng, 150, w, h), w * h, 2 * (w + h))
    assert abs(r.ratio - 1.0) < 0.2


def test_clark_evans_mean_over_seeds_and_edge_effect():
    # Averaged over 200 seeded Poisson patterns the corrected R is 1 within 0.02, while the uncorrected
    # ratio reads high (edge effect: points near the border lack neighbours beyond it).
    w, h = 60.0, 40.0
    rs, raw, random_notes = [], [], 0
    for seed in range(200):
        res = clark_evans(_poisson(np.random.default_rng(seed), 60, w, h), w * h, 2 * (w + h))
        rs.append(res.ratio), raw.append(res.ratio_uncorrected)
        random_notes += res.note == "random"
    assert abs(np.mean(rs) - 1.0) < 0.02
    assert np.mean(raw) > np.mean(rs) + 0.03
    assert random_notes / 200 > 0.85  # a 5 % two-sided test calls about 95 % of random patterns random


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 100_000))
def test_clark_evans_well_below_one_for_clusters(seed):
    rng = np.random.default_rng(seed)
    w, h = 60.0, 40.0
    r = clark_evans(_clustered(rng, 150, w, h), w * h, 2 * (w + h))
    assert r.ratio < 0.6
    assert r.note == "clustered"


def test_clark_evans_regular_lattice():
    # a square lattice has R = 2 x spacing / sqrt(A / n) = 2 (Clark & Evans 1954), here with edge correction
    xx, yy = np.meshgrid(np.arange(0.5, 40), np.arange(0.5, 30))
    r = clark_evans(np.column_stack([xx.ravel(), yy.ravel()]), 40 * 30, 140)
    assert r.ratio > 1.8 and r.note == "regular"
    assert clark_evans(np.zeros((1, 2)), 10.0).note == "too few pits"
