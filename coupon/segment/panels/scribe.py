"""Scribe lines (single or X) and creepage from them, on a rectified panel.

A scribe is a long, straight, thin cut; corrosion and lifted coating spread
from it as a band.  We build a *defect* map (rust fraction where rust wins,
strong neutral deviation - bare steel - elsewhere), find long straight bands
by a projection (Radon-style) search over angles, refine the angle to 0.1
degree by the sharpness of the projection, then measure the band's width
perpendicular to the line at stations every 1 mm along it (a 1 mm wide strip
per station), leaving out ``end_mm`` at each end of the scribe and, for an X,
``end_mm`` around the crossing.

Creepage per station is ``c = (w_c - w) / 2`` (ASTM D1654: ``w_c`` the width
of the corrosion zone, ``w`` the original scribe width); per side, the distance
from the scribe centre (the bare-steel core where it shows, else the band's
centre line) to the zone edge minus ``w / 2``.  All lengths in mm.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np
from scipy import ndimage as ndi

from coupon.segment.panels.rust import ColourModel


@dataclass(frozen=True)
class ScribeSettings:
    """``mode``: "auto", "none", "line" or "x"; ``width_mm``: nominal scribe width w;
    ``end_mm``: length left out at each scribe end (and around an X crossing);
    ``min_length_mm``: shortest band accepted as a scribe; ``search_mm``: how far
    from the scribe a corrosion zone is followed."""

    mode: str = "auto"
    width_mm: float = 0.5
    end_mm: float = 10.0
    min_length_mm: float = 40.0
    search_mm: float = 25.0

    def to_dict(self) -> dict:
        return dict(mode=self.mode, width_mm=self.width_mm, end_mm=self.end_mm,
                    min_length_mm=self.min_length_mm, search_mm=self.search_mm)


SCRIBE_MODES = ("auto", "none", "line", "x")

#: A piece of band shorter than this (mm) at the end of a scribe, behind a gap, is a rust spot.
END_PIECE_MM = 8

#: A second line (X scribe) must be at least this share as long as the first.
SECOND_LINE_SHARE = 0.6

#: Share of a coarse (0.5 mm) cell that must hold defect pixels for the line search.
COARSE_CELL_SHARE = 0.3


@dataclass(frozen=True)
class ScribeResult:
    """Scribe lines found and the creepage measured from them.

    ``lines``: list of (start_xy_mm, end_xy_mm); ``stations``: one dict per
    station (line, t_mm, centre_xy_mm, normal_xy, left_mm, right_mm, creep_mm);
    ``corridor_half_mm``: half width of the band left out of the rust rating.
    """

    lines: list = field(default_factory=list)
    stations: list = field(default_factory=list)
    corridor_half_mm: list = field(default_factory=list)
    note: str = ""

    @property
    def found(self) -> bool:
        return bool(self.lines)

    @property
    def kind(self) -> str:
        return {0: "none", 1: "line"}.get(len(self.lines), "x")

    def _vals(self, key):
        return np.array([s[key] for s in self.stations], float)

    @property
    def creep_mean_mm(self) -> float:
        v = self._vals("creep_mm")
        return float(v.mean()) if v.size else float("nan")

    @property
    def creep_max_mm(self) -> float:
        v = self._vals("creep_mm")
        return float(v.max()) if v.size else float("nan")

    @property
    def creep_min_mm(self) -> float:
        v = self._vals("creep_mm")
        return float(v.min()) if v.size else float("nan")

    def side_means_mm(self) -> tuple[float, float]:
        if not self.stations:
            return float("nan"), float("nan")
        return float(self._vals("left_mm").mean()), float(self._vals("right_mm").mean())

    def corridor_mask(self, shape_rc, px_per_mm: float) -> np.ndarray:
        """Pixels of the scribe zones (left out of the rust rating)."""
        mask = np.zeros(shape_rc, np.uint8)
        for (p0, p1), half in zip(self.lines, self.corridor_half_mm):
            p0, p1 = np.asarray(p0), np.asarray(p1)
            u = (p1 - p0) / np.linalg.norm(p1 - p0)
            a, b = p0 - 2 * u, p1 + 2 * u
            n = np.array([-u[1], u[0]]) * max(half, 0.5 / px_per_mm)
            # square ends 2 mm past the scribe ends (round caps of the zone's half width would take
            # in rust beyond the ends of a wide corrosion zone)
            quad = (np.array([a + n, b + n, b - n, a - n]) * px_per_mm - 0.5) * 16
            cv2.fillPoly(mask, [np.rint(quad).astype(np.int32).reshape(-1, 1, 2)], 1, lineType=cv2.LINE_8, shift=4)
        return mask.astype(bool)


def defect_map(model: ColourModel) -> tuple[np.ndarray, np.ndarray]:
    """(defect, metal): rust fraction or bare-steel evidence in [0, 1], and the bare-steel part."""
    # float32 in place: bare steel is a strong neutral deviation where no rust colour won
    metal = np.abs(model.neutral_dev, dtype=np.float32)
    metal -= np.float32(0.25)
    metal *= np.float32(4.0)  # / 0.25
    np.clip(metal, 0, 1, out=metal)
    metal[model.rust_wins] = 0
    # both parts are >= 0 and at most one is non-zero per pixel, so the maximum is a selection
    defect = np.where(model.rust_wins, np.clip(model.fraction, 0, 1), metal).astype(np.float32, copy=False)
    return defect, metal


def _projection(xy: np.ndarray, w: np.ndarray, theta: float, bin_mm: float):
    rho = xy[:, 0] * np.cos(theta) + xy[:, 1] * np.sin(theta)
    lo = rho.min()
    idx = np.floor((rho - lo) / bin_mm).astype(np.int64)
    return np.bincount(idx, weights=w), lo


def _projection_peaks(xy: np.ndarray, thetas: np.ndarray, bin_mm: float) -> np.ndarray:
    """Highest bin of the unit-weight :func:`_projection` at each angle (the same binning)."""
    rho = xy[:, :1] * np.cos(thetas)[None, :] + xy[:, 1:2] * np.sin(thetas)[None, :]  # (n, angles)
    lo = rho.min(axis=0)
    idx = np.floor((rho - lo) / bin_mm).astype(np.int64)
    width = int(idx.max()) + 1
    counts = np.bincount((idx + np.arange(len(thetas)) * width).ravel(), minlength=len(thetas) * width)
    return counts.reshape(len(thetas), width).max(axis=1).astype(float)


def _find_lines(defect: np.ndarray, px_per_mm: float, settings: ScribeSettings, want: int | None):
    coarse = 2.0  # px/mm of the search
    f = coarse / px_per_mm
    # share of defect pixels per coarse cell: a thin band (a cut with little creep, 2 to 3 photo
    # pixels wide) fills a fifth to a half of a 0.5 mm cell, and averaging the defect values
    # themselves would lose it
    small = cv2.resize((defect > 0.5).astype(np.float32), (max(2, int(defect.shape[1] * f)),
                       max(2, int(defect.shape[0] * f))), interpolation=cv2.INTER_AREA)
    rr, cc = np.nonzero(small > COARSE_CELL_SHARE)
    if rr.size < 10:
        return []
    xy = np.column_stack([(cc + 0.5) / coarse, (rr + 0.5) / coarse])
    wts = np.ones(len(xy))
    found = []
    thetas = np.deg2rad(np.arange(0.0, 180.0, 1.0))
    # the peak of every angle's projection at once (the same bins as _projection, one bincount for all
    # 180 angles instead of one call per angle)
    peaks = _projection_peaks(xy, thetas, 0.5) / coarse  # pixels along the line at 2 px/mm: count / 2 = mm
    for _ in range(want or 2):
        best = None
        for th, length in zip(thetas, peaks):
            if any(abs(np.angle(np.exp(2j * (th - t0)))) < np.deg2rad(30) for t0, _ in found):
                continue
            if best is None or length > best[0]:
                best = (float(length), th)
        if best is None or best[0] < settings.min_length_mm:
            break
        if found and best[0] < SECOND_LINE_SHARE * found[0][1]:
            break  # the arms of an X are about equally long; a weaker band is scattered rust
        # fine angle: the projection is sharpest when aligned with the band
        fine = best[1] + np.deg2rad(np.arange(-1.5, 1.51, 0.1))
        th = max(fine, key=lambda t: float((_projection(xy, wts, t, 0.25)[0] ** 2).sum()))
        found.append((th, best[0]))
    lines = []
    if not found:
        return lines  # no band long enough: skip the full-resolution pixel list (2 ms a panel)
    full_r, full_c = np.nonzero(defect > 0.5)
    pts = np.column_stack([(full_c + 0.5) / px_per_mm, (full_r + 0.5) / px_per_mm])
    for th, _ in found:
        h, lo = _projection(pts, np.ones(len(pts)), th, 0.1)
        k = int(np.argmax(np.convolve(h, np.ones(5), "same")))
        # centre of the band: centroid of the bins above half the peak, contiguous with it
        hs = np.convolve(h, np.ones(5) / 5, "same")
        above = hs > 0.5 * hs[k]
        a = k
        while a > 0 and above[a - 1]:
            a -= 1
        b = k
        while b < len(hs) - 1 and above[b + 1]:
            b += 1
        idx = np.arange(a, b + 1)
        rho = lo + (np.sum(idx * hs[idx]) / np.sum(hs[idx]) + 0.5) * 0.1
        nrm = np.array([np.cos(th), np.sin(th)])
        u = np.array([-np.sin(th), np.cos(th)])
        d = pts @ nrm - rho
        near = np.abs(d) < 1.0
        t = pts[near] @ u
        if t.size < 10:
            continue
        # extent: longest run of 1 mm cells along the line that hold defect pixels (gaps <= 3 mm)
        s0, s1 = _longest_run(np.floor(t - t.min()).astype(int), px_per_mm)
        if s1 - s0 < settings.min_length_mm:
            continue
        t0, t1 = t.min() + s0, t.min() + s1 + 1
        lines.append((rho * nrm + t0 * u, rho * nrm + t1 * u))
    return lines


def _longest_run(cells: np.ndarray, px_per_mm: float, share: float = 0.5, max_gap: int = 3) -> tuple[int, int]:
    """First and last 1 mm cell of the longest chain of occupied cells along a line.

    A cell is occupied when it holds ``share * px_per_mm`` defect pixels.  Pieces of occupied cells
    join across gaps of up to ``max_gap`` cells (a stretch of cut without corrosion), but a short
    piece (under :data:`END_PIECE_MM`) at either end of a chain, behind a gap of 2 cells or more,
    is dropped: that is a rust spot just past the scribe end, and it would carry the scribe zone
    (left out of the rust rating) over itself.
    """
    occ = np.bincount(cells) >= share * px_per_mm
    if not occ.any():
        return 0, 0
    edges = np.diff(np.r_[0, occ.astype(np.int8), 0])
    pieces = list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))
    chains, cur = [], [pieces[0]]
    for pc in pieces[1:]:
        if pc[0] - cur[-1][1] - 1 <= max_gap:
            cur.append(pc)
        else:
            chains.append(cur)
            cur = [pc]
    chains.append(cur)
    best = (0, 0)
    for ch in chains:
        while len(ch) > 1 and ch[-1][1] - ch[-1][0] + 1 < END_PIECE_MM and ch[-1][0] - ch[-2][1] - 1 >= 2:
            ch = ch[:-1]
        while len(ch) > 1 and ch[0][1] - ch[0][0] + 1 < END_PIECE_MM and ch[1][0] - ch[0][1] - 1 >= 2:
            ch = ch[1:]
        if ch[-1][1] - ch[0][0] > best[1] - best[0]:
            best = (int(ch[0][0]), int(ch[-1][1]))
    return best


def measure_scribe(model: ColourModel, px_per_mm: float, size_mm: tuple[float, float],
                   settings: ScribeSettings = ScribeSettings()) -> ScribeResult:
    """Find the scribe(s) on a rectified panel and measure the creepage.

    Returns an empty :class:`ScribeResult` (``found`` False) when no band of at
    least ``min_length_mm`` exists or ``mode`` is "none".
    """
    if settings.mode == "none":
        return ScribeResult(note="scribe search off")
    defect, metal = defect_map(model)
    want = {"line": 1, "x": 2}.get(settings.mode)
    lines = _find_lines(defect, px_per_mm, settings, want)
    if want and len(lines) != want:
        return ScribeResult(note=f"expected {'one scribe line' if want == 1 else 'an X scribe'}, found {len(lines)} line(s)")
    if not lines:
        return ScribeResult(note="no scribe found")
    crossing = None
    if len(lines) == 2:
        from coupon.segment.panels.detect import _intersect, _line_through

        try:
            crossing = _intersect(_line_through(*lines[0]), _line_through(*lines[1]))
        except Exception:  # noqa: BLE001 - parallel lines: no crossing to avoid
            crossing = None
    w = settings.width_mm
    step = 0.1
    offs = np.arange(-settings.search_mm, settings.search_mm + 1e-9, step)
    along = np.linspace(-0.4, 0.4, 5)
    stations, halves = [], []
    for li, (p0, p1) in enumerate(lines):
        p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
        length = float(np.linalg.norm(p1 - p0))
        u = (p1 - p0) / length
        nrm = np.array([-u[1], u[0]])
        ts = np.arange(settings.end_mm, length - settings.end_mm + 1e-9, 1.0)
        widest = 0.0
        centres = [p0 + t * u for t in ts]
        use = [crossing is None or np.linalg.norm(ctr - crossing) > settings.end_mm for ctr in centres]
        ts = ts[np.asarray(use, bool)]
        centres = np.array([ctr for ctr, ok in zip(centres, use) if ok]).reshape(-1, 2)
        if not len(ts):
            halves.append(max(widest, w / 2) + 1.0)
            continue
        # every station's strip sampled in one remap of the defect and one of the metal map (the same
        # bilinear samples as one remap per station, 0.1 ms of call overhead each saved), and the gap
        # closing of all profiles in one call
        pts = (centres[:, None, None, :] + (along[:, None, None] * u)[None]) + (offs[None, :, None] * nrm)[None]
        px = (pts * px_per_mm - 0.5).astype(np.float32).reshape(-1, len(offs), 2)
        n_st = len(ts)
        profs = cv2.remap(defect, px[..., 0], px[..., 1], cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                          borderValue=0).reshape(n_st, len(along), len(offs)).mean(axis=1)
        cores = cv2.remap(metal, px[..., 0], px[..., 1], cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                          borderValue=0).reshape(n_st, len(along), len(offs)).mean(axis=1)
        profs = np.array([np.convolve(pr, np.ones(3) / 3, "same") for pr in profs])
        mid = len(offs) // 2
        win = int(round((w / 2 + 1.0) / step))
        aboves = profs > 0.5
        # the cut itself may not look corroded (bare steel as light as the coating):
        # close gaps up to the scribe width + 0.6 mm inside the band (along each profile only)
        gap_px = int(round((w + 0.6) / step))
        closeds = ndi.binary_closing(aboves, structure=np.ones((1, gap_px))) | aboves
        for t, centre, prof, core, above, closed in zip(ts, centres, profs, cores, aboves, closeds):
            seg = closed[mid - win:mid + win + 1]
            if not seg.any():
                continue  # no corroded band here (a gap in the scribe)
            start = mid - win + int(np.flatnonzero(seg)[np.argmin(np.abs(np.flatnonzero(seg) - win))])
            a_i, b_i = start, start
            while a_i > 0 and closed[a_i - 1]:
                a_i -= 1
            while b_i < len(closed) - 1 and closed[b_i + 1]:
                b_i += 1
            if a_i == 0 or b_i == len(closed) - 1:
                continue  # the zone reaches the search limit: not measurable here
            # sub-sample edges: where the profile crosses one half at the run's ends
            lo_i = a_i - (prof[a_i] - 0.5) / max(prof[a_i] - prof[a_i - 1], 1e-9)
            hi_i = b_i + (prof[b_i] - 0.5) / max(prof[b_i] - prof[b_i + 1], 1e-9)
            left_edge, right_edge = offs[0] + lo_i * step, offs[0] + hi_i * step
            # scribe centre: a filled gap (uncorroded cut), else the bare-steel core, else the line
            c0 = 0.0
            gaps = closed[a_i:b_i + 1] & ~above[a_i:b_i + 1]
            cwin = core[mid - win:mid + win + 1]
            if gaps.any():
                gi = np.flatnonzero(gaps) + a_i
                c0 = float(offs[gi].mean())
            elif cwin.max() > 0.5:
                sel = cwin > 0.5 * cwin.max()
                c0 = float(np.sum(offs[mid - win:mid + win + 1][sel] * cwin[sel]) / np.sum(cwin[sel]))
            wc = right_edge - left_edge
            stations.append({
                "line": li, "t_mm": float(t), "centre_xy_mm": centre.tolist(), "normal_xy": nrm.tolist(),
                "left_edge_mm": float(left_edge), "right_edge_mm": float(right_edge),
                "left_mm": float(max(0.0, c0 - left_edge - w / 2)), "right_mm": float(max(0.0, right_edge - c0 - w / 2)),
                "zone_width_mm": float(wc), "creep_mm": float(max(0.0, (wc - w) / 2)),
            })
            widest = max(widest, -left_edge, right_edge)
        halves.append(max(widest, w / 2) + 1.0)
    return ScribeResult([(np.asarray(a).tolist(), np.asarray(b).tolist()) for a, b in lines], stations, halves,
                        note="" if stations else "scribe found but no station could be measured")
