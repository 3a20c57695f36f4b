"""Colour maths against colour-science and the published CIEDE2000 test data."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from coupon.calibrate import colourspace as cs
from tests.conftest import DATA

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour  # reference library

unit_rgb = arrays(np.float64, (16, 3), elements=st.floats(0.0, 1.0, allow_nan=False))


@settings(max_examples=50, deadline=None)
@given(unit_rgb)
def test_srgb_to_xyz_matches_colour_science(rgb):
    # reference: colour-science sRGB_to_XYZ (IEC 61966-2-1 matrix and transfer function)
    ours = cs.linear_to_xyz(cs.srgb_to_linear(rgb))
    np.testing.assert_allclose(ours, colour.sRGB_to_XYZ(rgb), atol=1e-4)


@settings(max_examples=50, deadline=None)
@given(unit_rgb)
def test_srgb_to_lab_matches_colour_science(rgb):
    # reference: colour-science XYZ_to_Lab with its default D65 (0.3127, 0.3290) white
    np.testing.assert_allclose(cs.srgb_to_lab(rgb), colour.XYZ_to_Lab(colour.sRGB_to_XYZ(rgb)), atol=1e-4)


@settings(max_examples=50, deadline=None)
@given(unit_rgb)
def test_lab_round_trip_matches_colour_science(rgb):
    lab = colour.XYZ_to_Lab(colour.sRGB_to_XYZ(rgb))
    np.testing.assert_allclose(cs.lab_to_srgb(lab), colour.XYZ_to_sRGB(colour.Lab_to_XYZ(lab)), atol=1e-4)
    # the published 4-decimal matrices are inverses only to about 1e-4, hence 1e-3 here
    np.testing.assert_allclose(cs.lab_to_srgb(lab), rgb, atol=1e-3)


def test_lab_of_white_and_black():
    # CIE 015: the reference white has L* = 100, a* = b* = 0; black has L* = 0.  sRGB white lands
    # within 0.01 of neutral because IEC 61966-2-1 publishes its matrix rounded to four decimals.
    np.testing.assert_allclose(cs.srgb_to_lab(np.array([1.0, 1.0, 1.0])), [100, 0, 0], atol=1e-2)
    np.testing.assert_allclose(cs.srgb_to_lab(np.array([0.0, 0.0, 0.0])), [0, 0, 0], atol=1e-9)


def test_ciede2000_published_pairs():
    # Sharma, Wu and Dalal (2005), Color Research and Application 30(1), Table 1: all 34 pairs
    pairs = pd.read_csv(DATA / "ciede2000_sharma2005.csv", comment="#")
    assert len(pairs) == 34
    de = cs.delta_e_2000(pairs[["L1", "a1", "b1"]].to_numpy(), pairs[["L2", "a2", "b2"]].to_numpy())
    np.testing.assert_allclose(de, pairs["dE00"].to_numpy(), atol=1e-4)


def test_ciede2000_matches_colour_science_on_random_colours():
    rng = np.random.default_rng(7)
    a = cs.srgb_to_lab(rng.random((200, 3)))
    b = cs.srgb_to_lab(rng.random((200, 3)))
    np.testing.assert_allclose(cs.delta_e_2000(a, b), colour.delta_E(a, b, method="CIE 2000"), atol=1e-4)


def test_nd_input_keeps_shape():
    rgb = np.random.default_rng(1).random((4, 5, 3))
    assert cs.srgb_to_lab(rgb).shape == (4, 5, 3)
    assert cs.delta_e_2000(cs.srgb_to_lab(rgb), cs.srgb_to_lab(rgb)).shape == (4, 5)


@pytest.mark.parametrize("value", [0.0, 0.04045, 0.5, 1.0])
def test_transfer_function_inverse(value):
    # the two branches of the IEC 61966-2-1 curve meet at the knee only to about 1e-7
    assert cs.linear_to_srgb(cs.srgb_to_linear(np.array(value))) == pytest.approx(value, abs=1e-6)
