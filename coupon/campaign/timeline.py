"""Ratings against exposure time: per specimen, per system, time to failure, growth rate.

All functions take and return pandas DataFrames whose columns are those of the
commands' CSVs (see :data:`coupon.campaign.store.TABLES`) plus ``specimen_id``;
nothing here reads files.

Choices (documented, not from a standard)
-----------------------------------------
* Only rows whose ``status`` is ``ok`` (or empty) are rated.  If a specimen was
  photographed twice at one exposure time, the most recently analysed row counts.
* Time to failure: the first inspection at which any criterion fails is the
  *first failing* one; the inspection before it is the *last passing* one.  The
  failure lies in the interval (last passing, first failing]; the point estimate
  interpolates the quantity behind each failing criterion linearly between the two
  inspections to its threshold (earliest over the criteria).  A specimen failing at
  its first inspection gets the interval (unknown, first] and the first inspection
  time as its estimate; one that never fails is right-censored at its last inspection.
* Per system median time to failure: never-failed replicates count as +inf, so the
  median is "not reached" when half or more never failed.
* Ranking: longer median time to failure first, then fewer replicates failed, then
  lower mean rust area at the last common inspection, then lower growth rate.
* Rust growth rate: least-squares straight line of rust area % against exposure
  hours, reported in percentage points per 100 h.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from coupon.campaign.criteria import Criteria, rating_number

#: Ratings plotted and tabulated against exposure time, with axis labels (units).
RATING_METRICS: dict[str, str] = {
    "rust_area_pct": "rusted area (% of rated area)",
    "rust_grade": "rust grade (ASTM D610, 10 = no rust)",
    "ri_degree": "degree of rusting (ISO 4628-3 Ri)",
    "creep_mean_mm": "mean creepage from scribe (mm)",
    "creep_max_mm": "maximum creepage from scribe (mm)",
}
UNASSIGNED = "(not in layout)"

SERIES_COLUMNS = ["specimen_id", "system", "replicate", "exposure_h", "rust_area_pct", "rust_grade", "ri_degree",
                  "creep_mean_mm", "creep_max_mm", "creep_rating", "rust_grade_label", "image", "overlay"]
TTF_COLUMNS = ["specimen_id", "system", "replicate", "n_inspections", "first_h", "last_h", "failed",
               "last_pass_h", "first_fail_h", "ttf_h", "ttf_low_h", "ttf_high_h", "method", "criterion", "status"]
SYSTEM_TTF_COLUMNS = ["rank", "system", "n_specimens", "n_failed", "median_ttf_h", "median_text", "min_ttf_h",
                      "max_ttf_h", "final_h", "final_rust_area_pct_mean", "growth_pp_per_100h"]
GROWTH_COLUMNS = ["specimen_id", "system", "n_points", "growth_pp_per_100h", "intercept_pct", "r2"]


def _ok(df: pd.DataFrame) -> pd.DataFrame:
    if "status" not in df.columns or df.empty:
        return df
    st = df["status"]
    return df[st.isna() | (st.astype(str).str.strip().str.lower().isin(["ok", "", "nan", "none"]))]


def _latest(df: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    order = [c for c in ("analysed_at", "inspection_id") if c in df.columns]
    if order:
        df = df.sort_values(order, kind="stable")
    return df.drop_duplicates(keys, keep="last")


def _float_col(s: pd.Series) -> pd.Series:
    return pd.to_numeric(s, errors="coerce").astype(float)


def specimen_series(panels: pd.DataFrame, specimens: pd.DataFrame) -> pd.DataFrame:
    """One row per specimen and exposure time: the ratings (numbers) from ``panels`` rows.

    ``rust_grade``, ``ri_degree`` and ``creep_rating`` become numbers ("7", "Ri 2" -> 7.0,
    2.0); ``rust_grade_label`` keeps grade and distribution letter as reported ("7-G").
    """
    df = _ok(panels)
    df = df[df["specimen_id"].notna() & pd.to_numeric(df["exposure_h"], errors="coerce").notna()].copy()
    if df.empty:
        return pd.DataFrame(columns=SERIES_COLUMNS)
    df["exposure_h"] = _float_col(df["exposure_h"])
    df = _latest(df, ["specimen_id", "exposure_h"])
    out = pd.DataFrame({"specimen_id": df["specimen_id"].astype(str).to_numpy(),
                        "exposure_h": df["exposure_h"].to_numpy()})
    for c in ("rust_area_pct", "creep_mean_mm", "creep_max_mm"):
        out[c] = _float_col(df[c]).to_numpy()
    for c in ("rust_grade", "ri_degree", "creep_rating"):
        out[c] = [rating_number(v if not (isinstance(v, float) and math.isnan(v)) else None) for v in df[c]]
    labels = []
    for g, d in zip(df["rust_grade"], df["rust_distribution"]):
        g_txt = "" if pd.isna(g) else str(g)
        d_txt = "" if pd.isna(d) else str(d)
        labels.append(f"{g_txt}-{d_txt}" if g_txt and d_txt and "-" not in g_txt else g_txt)
    out["rust_grade_label"] = labels
    out["image"] = df["image"].to_numpy()
    out["overlay"] = df["overlay"].to_numpy()
    spec = specimens[["specimen_id", "system", "replicate"]].astype({"specimen_id": str})
    out = out.merge(spec, on="specimen_id", how="left")
    out["system"] = out["system"].fillna(UNASSIGNED).astype(str)
    return out[SERIES_COLUMNS].sort_values(["system", "specimen_id", "exposure_h"], kind="stable",
                                           ignore_index=True)


def system_series(series: pd.DataFrame) -> pd.DataFrame:
    """Per system, exposure time and rating: mean, min, max and count over replicates (long format)."""
    cols = ["system", "exposure_h", "metric", "mean", "min", "max", "n"]
    if series.empty:
        return pd.DataFrame(columns=cols)
    parts = []
    for metric in RATING_METRICS:
        g = series.dropna(subset=[metric]).groupby(["system", "exposure_h"])[metric]
        agg = g.agg(["mean", "min", "max", "count"]).reset_index().rename(columns={"count": "n"})
        agg.insert(2, "metric", metric)
        parts.append(agg)
    out = pd.concat([p for p in parts if not p.empty], ignore_index=True) if any(not p.empty for p in parts) \
        else pd.DataFrame(columns=cols)
    return out[cols].sort_values(["metric", "system", "exposure_h"], ignore_index=True)


def _fails_at(row: pd.Series, criteria: Criteria) -> list:
    return [c.fails(row[c.metric]) for c in criteria.criteria]


def specimen_ttf(one: pd.DataFrame, criteria: Criteria) -> dict:
    """Time to failure of one specimen's series (rows of :func:`specimen_series`, any order)."""
    s = one.sort_values("exposure_h", ignore_index=True)
    h = s["exposure_h"].to_numpy(dtype=float)
    flags = [_fails_at(r, criteria) for _, r in s.iterrows()]
    failing = [any(f is True for f in fl) for fl in flags]
    base = {"specimen_id": s["specimen_id"].iloc[0], "system": s["system"].iloc[0],
            "replicate": s["replicate"].iloc[0], "n_inspections": len(s), "first_h": h[0], "last_h": h[-1]}
    nan = math.nan
    if not any(failing):
        evaluable = any(f is not None for fl in flags for f in fl)
        status = f"not failed by {h[-1]:g} h" if evaluable else "no rating to judge (criteria metrics missing)"
        return base | {"failed": False, "last_pass_h": h[-1] if evaluable else nan, "first_fail_h": nan,
                       "ttf_h": nan, "ttf_low_h": h[-1] if evaluable else nan, "ttf_high_h": math.inf,
                       "method": "censored", "criterion": "", "status": status}
    k = failing.index(True)
    hit = [c for c, f in zip(criteria.criteria, flags[k]) if f is True]
    if k == 0:
        return base | {"failed": True, "last_pass_h": nan, "first_fail_h": h[0], "ttf_h": h[0],
                       "ttf_low_h": nan, "ttf_high_h": h[0], "method": "first inspection",
                       "criterion": "; ".join(c.describe() for c in hit),
                       "status": f"failed at the first inspection ({h[0]:g} h): time to failure <= {h[0]:g} h"}
    t0, t1 = h[k - 1], h[k]
    best_t, best_c, method = math.inf, None, "interpolated"
    for c in hit:
        v0 = float(s.at[k - 1, c.continuous_column]) if pd.notna(s.at[k - 1, c.continuous_column]) else nan
        v1 = float(s.at[k, c.continuous_column]) if pd.notna(s.at[k, c.continuous_column]) else nan
        thr = c.continuous_threshold
        if math.isfinite(v0) and math.isfinite(v1) and v1 != v0:
            frac = min(1.0, max(0.0, (thr - v0) / (v1 - v0)))
            t, m = t0 + frac * (t1 - t0), "interpolated"
        else:
            t, m = 0.5 * (t0 + t1), "midpoint"
        if t < best_t:
            best_t, best_c, method = t, c, m
    return base | {"failed": True, "last_pass_h": t0, "first_fail_h": t1, "ttf_h": best_t, "ttf_low_h": t0,
                   "ttf_high_h": t1, "method": method, "criterion": best_c.describe(),
                   "status": f"failed between {t0:g} h and {t1:g} h (estimate {best_t:.0f} h, "
                             f"{best_c.describe()})"}


def time_to_failure(series: pd.DataFrame, criteria: Criteria) -> pd.DataFrame:
    """:func:`specimen_ttf` for every specimen in ``series``."""
    if series.empty:
        return pd.DataFrame(columns=TTF_COLUMNS)
    rows = [specimen_ttf(g, criteria) for _, g in series.groupby("specimen_id", sort=False)]
    return pd.DataFrame(rows, columns=TTF_COLUMNS).sort_values(["system", "specimen_id"], ignore_index=True)


def _line_fit(x: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """(slope, intercept, r2) of the least-squares line; NaN with fewer than two distinct x."""
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if len(np.unique(x)) < 2:
        return math.nan, math.nan, math.nan
    xm, ym = x.mean(), y.mean()
    sxx, sxy, syy = ((x - xm) ** 2).sum(), ((x - xm) * (y - ym)).sum(), ((y - ym) ** 2).sum()
    slope = sxy / sxx
    r2 = (sxy * sxy) / (sxx * syy) if syy > 0 else 1.0
    return float(slope), float(ym - slope * xm), float(r2)


def growth_rates(series: pd.DataFrame) -> pd.DataFrame:
    """Rust growth rate per specimen: slope of rust area % vs hours, in percentage points per 100 h."""
    rows = []
    for sid, g in series.groupby("specimen_id", sort=False):
        x, y = g["exposure_h"].to_numpy(float), g["rust_area_pct"].to_numpy(float)
        slope, icpt, r2 = _line_fit(x, y)
        rows.append({"specimen_id": sid, "system": g["system"].iloc[0],
                     "n_points": int((np.isfinite(x) & np.isfinite(y)).sum()),
                     "growth_pp_per_100h": slope * 100.0, "intercept_pct": icpt, "r2": r2})
    return pd.DataFrame(rows, columns=GROWTH_COLUMNS)


def system_growth(series: pd.DataFrame) -> dict[str, float]:
    """Per system: slope of one line through all replicates' points (pp per 100 h)."""
    return {str(sysname): _line_fit(g["exposure_h"].to_numpy(float), g["rust_area_pct"].to_numpy(float))[0] * 100
            for sysname, g in series.groupby("system")}


def system_summary(series: pd.DataFrame, ttf: pd.DataFrame) -> pd.DataFrame:
    """Per system: replicates failed, median time to failure, final rust area, growth; ranked."""
    if ttf.empty:
        return pd.DataFrame(columns=SYSTEM_TTF_COLUMNS)
    growth = system_growth(series)
    rows = []
    for sysname, g in ttf.groupby("system"):
        est = np.where(g["failed"].astype(bool), g["ttf_h"].astype(float), np.inf)
        judged = g["status"].str.startswith("no rating") == False  # noqa: E712 - pandas element-wise
        est = est[judged.to_numpy()]
        med = float(np.median(est)) if len(est) else math.nan
        failed_t = est[np.isfinite(est)]
        s = series[series["system"] == sysname]
        final_h = float(s["exposure_h"].max()) if len(s) else math.nan
        final = s[s["exposure_h"] == final_h]["rust_area_pct"].mean() if len(s) else math.nan
        if math.isinf(med):
            text = f"not reached by {g['last_h'].max():g} h"
            med = math.nan
        elif math.isnan(med):
            text = "no ratings"
        else:
            text = f"{med:.0f} h"
        rows.append({"system": sysname, "n_specimens": len(g), "n_failed": int(g["failed"].astype(bool).sum()),
                     "median_ttf_h": med, "median_text": text,
                     "min_ttf_h": float(failed_t.min()) if len(failed_t) else math.nan,
                     "max_ttf_h": float(failed_t.max()) if len(failed_t) else math.nan,
                     "final_h": final_h, "final_rust_area_pct_mean": float(final),
                     "growth_pp_per_100h": growth.get(str(sysname), math.nan)})
    df = pd.DataFrame(rows)
    key_ttf = df["median_ttf_h"].fillna(np.inf).where(df["median_text"] != "no ratings", -np.inf)
    df = df.assign(_k1=-key_ttf, _k2=df["n_failed"], _k3=df["final_rust_area_pct_mean"].fillna(np.inf),
                   _k4=df["growth_pp_per_100h"].fillna(np.inf))
    df = df.sort_values(["_k1", "_k2", "_k3", "_k4", "system"], ignore_index=True)
    df.insert(0, "rank", np.arange(1, len(df) + 1))
    return df[SYSTEM_TTF_COLUMNS]


def missing_inspections(series: pd.DataFrame, specimens: pd.DataFrame, schedule_h: list[float]) -> list[str]:
    """Sentences like 'P07 has no 504 h inspection' for every panel specimen and expected time.

    Expected times are the campaign's schedule if one was given at ``campaign init``,
    otherwise every exposure time at which any panel was rated.
    """
    panels = specimens[specimens["kind"].fillna("panel") == "panel"]
    expected = sorted({round(float(h), 3) for h in (schedule_h or series["exposure_h"].dropna().tolist())})
    out = []
    for sid in panels["specimen_id"].astype(str):
        have = {round(float(h), 3) for h in series.loc[series["specimen_id"] == sid, "exposure_h"]}
        if not have:
            out.append(f"{sid} has no rated inspection")
            continue
        for h in expected:
            if h not in have:
                out.append(f"{sid} has no {h:g} h inspection")
    return out


PIT_COLUMNS = ["specimen_id", "system", "image", "exposure_h", "pit_count", "analysed_area_mm2", "density_per_m2",
               "mean_area_mm2", "max_area_mm2", "pitted_area_pct", "g46_density", "g46_size", "g46_depth",
               "max_depth_mm", "corrosion_rate_mm_y", "corrosion_rate_mpy", "pitting_factor", "overlay"]


def pits_per_coupon(pit_summary: pd.DataFrame, specimens: pd.DataFrame) -> pd.DataFrame:
    """One row per coupon image (status ok): density, ratings, corrosion rate, with the system."""
    df = _ok(pit_summary).copy()
    if df.empty:
        return pd.DataFrame(columns=PIT_COLUMNS)
    df = _latest(df, ["inspection_image"])
    df["exposure_h"] = _float_col(df["inspection_exposure_h"])
    spec = specimens[["specimen_id", "system"]].astype({"specimen_id": str})
    df["specimen_id"] = df["specimen_id"].where(df["specimen_id"].notna(), None)
    out = df.merge(spec, on="specimen_id", how="left")
    out["system"] = out["system"].fillna(UNASSIGNED)
    out["specimen_id"] = out["specimen_id"].fillna(out["inspection_image"].map(lambda p: str(p)))
    return out[PIT_COLUMNS].reset_index(drop=True)


def droplet_key(df: pd.DataFrame) -> pd.Series:
    """Series key of droplet rows: the specimen, else the series name, else the frames' folder."""
    from pathlib import Path

    folder = df["inspection_image"].map(lambda p: Path(str(p)).parent.name or str(p))
    key = df["specimen_id"].where(df["specimen_id"].notna(), df["inspection_series"])
    return key.where(key.notna(), folder).astype(str)


@dataclass
class CampaignAnalysis:
    """Everything a report needs, computed from one campaign store."""

    meta: dict
    criteria: Criteria
    specimens: pd.DataFrame
    systems: pd.DataFrame
    inspections: pd.DataFrame
    panels: pd.DataFrame
    series: pd.DataFrame
    by_system: pd.DataFrame
    ttf: pd.DataFrame
    ranking: pd.DataFrame
    growth: pd.DataFrame
    pits: pd.DataFrame
    pit_summary: pd.DataFrame
    coupons: pd.DataFrame
    droplet: pd.DataFrame
    radial: pd.DataFrame
    droplet_summary: pd.DataFrame
    missing: list[str] = field(default_factory=list)
    unassigned: list[str] = field(default_factory=list)


def analyse_campaign(store, criteria: Criteria) -> CampaignAnalysis:
    """Read every table of ``store`` (a :class:`~coupon.campaign.store.CampaignStore`) and derive the ratings."""
    specimens = store.specimens()
    panels = store.table("panels")
    series = specimen_series(panels, specimens)
    ttf = time_to_failure(series, criteria)
    pit_summary = store.table("pit_summary")
    droplet = store.table("droplet")
    radial = store.table("radial_profile")
    for d in (droplet, radial):
        d["series_key"] = droplet_key(d) if len(d) else pd.Series(dtype=object)
    known = set(specimens["specimen_id"].astype(str))
    unassigned = sorted({str(s) for s in panels["specimen_id"].dropna()} - known)
    return CampaignAnalysis(
        meta=store.meta(), criteria=criteria, specimens=specimens, systems=store.systems(),
        inspections=store.inspections(), panels=panels, series=series, by_system=system_series(series), ttf=ttf,
        ranking=system_summary(series, ttf), growth=growth_rates(series), pits=store.table("pits"),
        pit_summary=pit_summary, coupons=pits_per_coupon(pit_summary, specimens), droplet=droplet, radial=radial,
        droplet_summary=store.table("droplet_summary"),
        missing=missing_inspections(series, specimens, store.schedule_h()), unassigned=unassigned)
