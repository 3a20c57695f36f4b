"""Profiles: round trip, provenance, validation with clear errors."""

from __future__ import annotations

import json

import numpy as np
import pytest

from coupon.calibrate.colour import ColourCorrection
from coupon.calibrate.indicator import build_model
from coupon.calibrate.profile import Profile, load_profile, save_profile, step_record
from coupon.calibrate.scale import scale_from_rectangle
from coupon.errors import ProfileError


def _full_profile() -> Profile:
    sc = scale_from_rectangle(np.array([[0, 0], [300, 0], [300, 600], [0, 600]]), 75, 150)
    col = ColourCorrection(gains=np.array([0.9, 1.0, 1.2]), matrix=np.eye(3, 4), residual_de00={"P01": 0.5})
    ind = build_model([4, 7, 10], [[55, 40, 60], [60, -40, 30], [40, 10, -45]], name="test")
    p = Profile()
    p = p.with_part("scale", sc, step_record("scale", [("a.jpg", "ab" * 32)], {"method": "rect"}))
    p = p.with_part("colour", col, step_record("colour", [], {}))
    return p.with_part("indicator", ind, step_record("indicator", [], {}))


def test_round_trip(tmp_path):
    path = save_profile(_full_profile(), tmp_path / "p.json")
    again = load_profile(path)
    assert again.scale.px_per_mm == pytest.approx(4.0)
    np.testing.assert_allclose(again.scale.homography, _full_profile().scale.homography)
    np.testing.assert_allclose(again.colour.gains, [0.9, 1.0, 1.2])
    np.testing.assert_allclose(again.indicator.lab, _full_profile().indicator.lab)
    assert [h["step"] for h in again.history] == ["scale", "colour", "indicator"]
    data = json.loads(path.read_text())
    assert data["schema_version"] == 1 and data["scale"]["px_per_mm"] == pytest.approx(4.0)
    assert set(data) >= {"scale", "colour", "indicator", "history", "tool_version", "created"}
    import hashlib

    assert again.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    path.write_text(path.read_text() + " ")  # the hash is of the bytes that were read, not of a later file
    assert again.sha256 != hashlib.sha256(path.read_bytes()).hexdigest()
    assert again.with_part("scale", again.scale, {}).sha256 is None


@pytest.mark.parametrize("text,match", [
    ("{not json", "not valid JSON"),
    ("[1, 2]", "JSON object"),
    ('{"schema": "other"}', "not a coupon profile"),
    ('{"schema": "coupon-profile", "schema_version": 99}', "version 99"),
    ('{"schema": "coupon-profile", "schema_version": 1, "scale": {"method": "given", "px_per_mm": -2}}',
     "invalid 'scale'"),
    ('{"schema": "coupon-profile", "schema_version": 1, "scale": {"px_per_mm": 2}}', "invalid 'scale'"),
    ('{"schema": "coupon-profile", "schema_version": 1, "colour": {"white_balance_gains": [1, 0]}}',
     "invalid 'colour'"),
    ('{"schema": "coupon-profile", "schema_version": 1, "indicator": {"points": [{"ph": 4, "lab": [1, 2, 3]}]}}',
     "at least 3 buffers"),
    ('{"schema": "coupon-profile", "schema_version": 1, "indicator": "x"}', "'indicator' must be an object"),
])
def test_malformed_profiles_are_refused_with_the_reason(tmp_path, text, match):
    path = tmp_path / "bad.json"
    path.write_text(text)
    with pytest.raises(ProfileError, match=match) as info:
        load_profile(path)
    assert str(path) in str(info.value) and "\n" not in str(info.value)


def test_missing_and_binary_profiles(tmp_path):
    with pytest.raises(ProfileError, match="not found"):
        load_profile(tmp_path / "none.json")
    b = tmp_path / "bin.json"
    b.write_bytes(b"\xff\xfe\x00\x81")
    with pytest.raises(ProfileError, match="not a text file|not valid JSON"):
        load_profile(b)


def test_profile_is_never_executable_content(tmp_path):
    # JSON only: a pickle-looking payload is just invalid JSON
    import pickle

    path = tmp_path / "p.json"
    path.write_bytes(pickle.dumps({"schema": "coupon-profile"}))
    with pytest.raises(ProfileError):
        load_profile(path)
