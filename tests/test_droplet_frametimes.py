"""Frame times: file names, durations, tables, EXIF, t0."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from coupon.errors import CouponError
from coupon.io import frametimes as ft


@pytest.mark.parametrize("text, minutes", [("60s", 1.0), ("5min", 5.0), ("1.5h", 90.0), ("90 sec", 1.5),
                                           ("-2min", -2.0), ("2HR", 120.0)])
def test_parse_duration(text, minutes):
    assert ft.parse_duration(text) == pytest.approx(minutes)


@pytest.mark.parametrize("text", ["60", "5 minutes", "abc", "", "1.5m"])
def test_parse_duration_refuses(text):
    with pytest.raises(ValueError, match="duration with a unit"):
        ft.parse_duration(text)


@pytest.mark.parametrize("name, minutes", [
    ("drop_t035min.jpg", 35.0), ("A1_0065s.png", 65 / 60), ("run-2.5h.tif", 150.0), ("t10min.jpg", 10.0),
    ("steel_B_12min_x.jpg", 12.0), ("IMG_0012.jpg", None), ("sample3.jpg", None), ("drop_5mm.jpg", None),
])
def test_time_from_name(name, minutes):
    got = ft.time_from_name(name)
    assert got == (None if minutes is None else pytest.approx(minutes))


def test_time_table_units(tmp_path):
    p = tmp_path / "t.csv"
    p.write_text("file,t_s\na.jpg,0\nsub/b.jpg,90\n")
    assert ft.read_time_table(p) == {"a.jpg": 0.0, "b.jpg": 1.5}
    p.write_text("# comment\nfile,time\na.jpg,0s\nb.jpg,2h\n")
    assert ft.read_time_table(p) == {"a.jpg": 0.0, "b.jpg": 120.0}


def test_time_table_errors(tmp_path):
    p = tmp_path / "t.csv"
    p.write_text("name,t_min\na.jpg,1\n")
    with pytest.raises(CouponError, match="'file' column"):
        ft.read_time_table(p)
    p.write_text("file,t_min\na.jpg,x\n")
    with pytest.raises(CouponError, match="non-numeric"):
        ft.read_time_table(p)
    p.write_text("file,when\na.jpg,1\n")
    with pytest.raises(CouponError, match="needs a time column"):
        ft.read_time_table(p)


def test_choose_source_order():
    named = [Path("a_t000min.jpg"), Path("a_t005min.jpg")]
    plain = [Path("a.jpg"), Path("b.jpg")]
    assert ft.choose_source(named, table={"x": 1}) == "table"
    assert ft.choose_source(named, interval_min=1.0) == "interval"
    assert ft.choose_source(named) == "name"
    assert ft.choose_source(plain, captures=[dt.datetime(2026, 1, 1), dt.datetime(2026, 1, 1, 0, 1)]) == "exif"
    with pytest.raises(CouponError, match="--interval"):
        ft.choose_source(plain, captures=[None, dt.datetime(2026, 1, 1)])


def test_to_minutes_and_t0():
    assert ft.to_minutes([5.0, 10.0, None]) == [0.0, 5.0, None]
    assert ft.to_minutes([5.0, 10.0], t0=2.0) == [3.0, 8.0]
    a = dt.datetime(2026, 3, 2, 9, 15, 0)
    assert ft.to_minutes([a, a + dt.timedelta(seconds=90)]) == [0.0, 1.5]
    assert ft.to_minutes([a], t0=a - dt.timedelta(minutes=3)) == [3.0]
    with pytest.raises(CouponError, match="date and time"):
        ft.to_minutes([a], t0=5.0)
    with pytest.raises(CouponError, match="durations"):
        ft.to_minutes([1.0], t0=a)
    assert ft.parse_t0("2026-03-02T09:15:00") == a
    assert ft.parse_t0("-2min") == -2.0
    with pytest.raises(ValueError, match="neither"):
        ft.parse_t0("soon")
