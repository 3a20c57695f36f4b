"""Time to failure, criteria, per-system summary, ranking and growth on constructed series."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from coupon.campaign.criteria import (Criteria, CriteriaError, Criterion, load_criteria, parse_criteria,
                                      rating_number, with_overrides)
from coupon.campaign.timeline import (growth_rates, missing_inspections, specimen_ttf, system_series,
                                      system_summary, time_to_failure)
from coupon.ratings.scales import rate


def series(sid, hours, areas, creeps=None, system="S1", replicate=1):
    """Rows shaped like timeline.specimen_series; ratings from the published tables."""
    creeps = creeps if creeps is not None else [0.0] * len(hours)
    return pd.DataFrame({
        "specimen_id": sid, "system": system, "replicate": replicate, "exposure_h": [float(h) for h in hours],
        "rust_area_pct": areas, "rust_grade": [rating_number(rate("astm-d610", a)) for a in areas],
        "ri_degree": [rating_number(rate("iso-4628-3", a)) for a in areas], "creep_mean_mm": creeps,
        "creep_max_mm": [1.5 * c for c in creeps], "creep_rating": [rating_number(rate("astm-d1654", c))
                                                                     for c in creeps],
        "rust_grade_label": "", "image": "", "overlay": ""})


GRADE7 = Criteria("grade", (Criterion("rust_grade", "fails_below", 7),))
CREEP2 = Criteria("creep", (Criterion("creep_mean_mm", "fails_above", 2.0),))


def test_continuous_thresholds_follow_the_published_tables():
    # ASTM D610-08 Table 1: grade 7 is "> 0.1 to 0.3 %", so below grade 7 means more than 0.3 % rusted.
    assert Criterion("rust_grade", "fails_below", 7).continuous_threshold == pytest.approx(0.3)
    # ASTM D610-08 Table 1: grade 4 is "> 3 to 10 %".
    assert Criterion("rust_grade", "fails_below", 4).continuous_threshold == pytest.approx(10.0)
    # ISO 4628-3 (secondary): Ri 2 = 0.5 %, Ri 3 = 1 %; coupon's cut-off is their geometric mean.
    assert Criterion("ri_degree", "fails_above", 2).continuous_threshold == pytest.approx(math.sqrt(0.5))
    # ASTM D1654 (body from memory): rating 7 is "> 1.0 to 2.0 mm" mean creepage.
    assert Criterion("creep_rating", "fails_below", 7).continuous_threshold == pytest.approx(2.0)


def test_known_crossing_is_interpolated_linearly():
    # 0.1 % at 168 h (grade 8), 0.5 % at 336 h (grade 6): area 0.3 % is crossed at 168 + 0.5 * 168 = 252 h.
    r = specimen_ttf(series("P1", [0, 168, 336, 504], [0.0, 0.1, 0.5, 1.0]), GRADE7)
    assert r["failed"] and r["method"] == "interpolated"
    assert (r["ttf_low_h"], r["ttf_high_h"]) == (168.0, 336.0)
    assert r["ttf_h"] == pytest.approx(252.0)
    assert "between 168 h and 336 h" in r["status"]


def test_creep_crossing():
    # 1.0 mm at 168 h, 3.0 mm at 336 h: 2.0 mm at 252 h.
    r = specimen_ttf(series("P1", [0, 168, 336], [0, 0, 0], [0.0, 1.0, 3.0]), CREEP2)
    assert r["ttf_h"] == pytest.approx(252.0)
    assert r["criterion"] == "creep_mean_mm above 2 mm"


def test_boundary_value_passes_and_interval_edges():
    # ASTM D610-08 Table 1: upper bounds inclusive, 0.3 % is still grade 7 and passes "below 7".
    r = specimen_ttf(series("P1", [0, 168, 336, 504], [0.0, 0.1, 0.3, 0.9]), GRADE7)
    assert (r["last_pass_h"], r["first_fail_h"]) == (336.0, 504.0)
    assert r["ttf_h"] == pytest.approx(336.0)  # the threshold is reached exactly at the last passing inspection
    # creep of exactly 2.0 mm passes "above 2 mm"
    r = specimen_ttf(series("P1", [0, 168, 336], [0, 0, 0], [0.0, 2.0, 2.5]), CREEP2)
    assert (r["ttf_low_h"], r["ttf_high_h"]) == (168.0, 336.0)
    assert r["ttf_h"] == pytest.approx(168.0)


def test_never_fails_is_censored_at_the_last_inspection():
    r = specimen_ttf(series("P1", [0, 168, 336], [0.0, 0.05, 0.2]), GRADE7)
    assert not r["failed"]
    assert math.isnan(r["ttf_h"]) and r["ttf_low_h"] == 336.0 and math.isinf(r["ttf_high_h"])
    assert r["status"] == "not failed by 336 h"


def test_fails_at_first_inspection():
    r = specimen_ttf(series("P1", [168, 336], [2.0, 4.0]), GRADE7)
    assert r["failed"] and r["method"] == "first inspection"
    assert math.isnan(r["ttf_low_h"]) and r["ttf_high_h"] == 168.0 and r["ttf_h"] == 168.0
    assert "first inspection (168 h)" in r["status"]


def test_earliest_criterion_wins_and_order_does_not_matter():
    both = Criteria("both", GRADE7.criteria + CREEP2.criteria)
    s = series("P1", [0, 100, 200], [0.0, 0.2, 0.4], [0.0, 1.0, 5.0])
    # area 0.3 % reached at 150 h; creep 2.0 mm at 100 + 100 * 1/4 = 125 h
    r = specimen_ttf(s.sample(frac=1.0, random_state=3), both)
    assert r["ttf_h"] == pytest.approx(125.0)
    assert r["criterion"].startswith("creep_mean_mm")


def test_first_failure_counts_even_if_a_later_inspection_passes():
    r = specimen_ttf(series("P1", [0, 168, 336, 504], [0.0, 0.5, 0.2, 0.6]), GRADE7)
    assert (r["ttf_low_h"], r["ttf_high_h"]) == (0.0, 168.0)


def test_missing_continuous_value_falls_back_to_midpoint():
    s = series("P1", [0, 100, 200], [0.0, 0.2, 0.4])
    s.loc[2, "rust_area_pct"] = np.nan  # the grade is known but not the area
    r = specimen_ttf(s, GRADE7)
    assert r["method"] == "midpoint" and r["ttf_h"] == pytest.approx(150.0)


def test_system_median_ranking_and_growth():
    parts = [series("A1", [0, 100, 200, 300], [0.0, 0.2, 0.4, 0.6], system="A", replicate=1),   # 150 h
             series("A2", [0, 100, 200, 300], [0.0, 0.1, 0.2, 0.5], system="A", replicate=2),   # 233.3 h
             series("A3", [0, 100, 200, 300], [0.0, 0.0, 0.0, 0.1], system="A", replicate=3),   # never
             series("B1", [0, 100, 200, 300], [0.0, 0.0, 0.0, 0.1], system="B", replicate=1),   # never
             series("B2", [0, 100, 200, 300], [0.0, 0.0, 0.1, 0.2], system="B", replicate=2),   # never
             series("B3", [0, 100, 200, 300], [0.0, 0.4, 0.8, 1.2], system="B", replicate=3)]   # 75 h
    s = pd.concat(parts, ignore_index=True)
    ttf = time_to_failure(s, GRADE7)
    assert ttf.set_index("specimen_id").loc["A1", "ttf_h"] == pytest.approx(150.0)
    assert ttf.set_index("specimen_id").loc["B3", "ttf_h"] == pytest.approx(75.0)
    summ = system_summary(s, ttf).set_index("system")
    # A2 crosses 0.3 % at 200 + 100 * (0.3 - 0.2) / (0.5 - 0.2) h; median of 150, 233.3, never (inf)
    assert summ.loc["A", "median_ttf_h"] == pytest.approx(200 + 100 / 3)
    assert summ.loc["A", "n_failed"] == 2 and summ.loc["B", "n_failed"] == 1
    assert math.isnan(summ.loc["B", "median_ttf_h"]) and summ.loc["B", "median_text"] == "not reached by 300 h"
    assert summ.loc["B", "rank"] == 1 and summ.loc["A", "rank"] == 2  # median not reached beats 233 h
    g = growth_rates(s).set_index("specimen_id")
    assert g.loc["B3", "growth_pp_per_100h"] == pytest.approx(0.4)  # 0.4 % per 100 h exactly
    assert g.loc["B3", "r2"] == pytest.approx(1.0)
    # system growth: one line through all replicate points, compared with numpy's least squares
    b = s[s["system"] == "B"]
    assert summ.loc["B", "growth_pp_per_100h"] == pytest.approx(
        100 * np.polyfit(b["exposure_h"], b["rust_area_pct"], 1)[0])
    agg = system_series(s)
    row = agg[(agg["system"] == "A") & (agg["exposure_h"] == 300) & (agg["metric"] == "rust_area_pct")].iloc[0]
    assert (row["mean"], row["min"], row["max"], row["n"]) == (pytest.approx(0.4), 0.1, 0.6, 3)


def test_growth_needs_two_times():
    g = growth_rates(series("P1", [168], [0.2]))
    assert math.isnan(g["growth_pp_per_100h"].iloc[0])


def test_missing_inspections_from_schedule_and_from_observed_times():
    s = pd.concat([series("P01", [0, 168, 336], [0, 0, 0]), series("P07", [0, 336], [0, 0])])
    specs = pd.DataFrame({"specimen_id": ["P01", "P07", "P08"], "kind": ["panel", "panel", "panel"]})
    assert missing_inspections(s, specs, []) == ["P07 has no 168 h inspection", "P08 has no rated inspection"]
    assert "P01 has no 504 h inspection" in missing_inspections(s, specs, [0, 168, 336, 504])


def test_rating_number_reads_stored_forms():
    assert [rating_number(v) for v in ("7", 7, "7-G", "Ri 2", "A-3")] == [7, 7, 7, 2, 3]
    assert math.isnan(rating_number(None)) and math.isnan(rating_number("n/a"))


def test_criteria_file_and_errors(tmp_path):
    p = tmp_path / "c.json"
    p.write_text(json.dumps({"name": "spec X", "criteria": [{"metric": "rust_area_pct", "fails_above": 1.0}]}))
    c = load_criteria(p)
    assert c.name == "spec X" and c.criteria[0].fails(1.0) is False and c.criteria[0].fails(1.01) is True
    assert load_criteria(None).criteria[0].metric == "rust_grade"
    with pytest.raises(CriteriaError, match="metric 'rust' is invalid, it must be one of"):
        parse_criteria({"criteria": [{"metric": "rust", "fails_above": 1}]})
    with pytest.raises(CriteriaError, match="exactly one of"):
        parse_criteria({"criteria": [{"metric": "rust_grade", "fails_above": 1, "fails_below": 2}]})
    with pytest.raises(CriteriaError, match="takes 'fails_below'"):
        parse_criteria({"criteria": [{"metric": "rust_grade", "fails_above": 7}]})
    with pytest.raises(CriteriaError, match="not found"):
        load_criteria(tmp_path / "none.json")
    o = with_overrides(c, creep_mean_mm=3.0, rust_grade=None)
    assert [x.metric for x in o.criteria] == ["rust_area_pct", "creep_mean_mm"]
