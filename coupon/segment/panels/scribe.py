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

from coupon.calibrate import colourspace as cs
from coupon.segment.panels.rust import ColourModel, _strips


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

#: A piece of band shorter than this (mm) at the end of a scribe, behind a gap, is a rust spot ...
END_PIECE_MM = 8
#: ... as is one shorter than this share of the whole chain: a cluster of spots 9 mm long, 3 mm past the end
#: of a 100 mm line, carried the line (and its corridor, left out of the rating) over itself, and the
#: panel read 0.37 of its rust (tenth session's randomised trays, seed 3 scene 6).
END_PIECE_SHARE = 0.12

#: A scribe band is long and narrow: a line must be at least this many times as long as the mean width of
#: the corroded zone measured at its stations.  A broad mark that is long enough, such as a glare patch of
#: 42 x 25 mm on a green panel (ratio 2.7; read as a scribe with 7.6 mm creep before), is not a scribe; a
#: 100 mm line keeps up to 12 mm of creep a side (coupon's choice).
SCRIBE_MIN_ELONGATION = 4.0

#: A second line (X scribe) must be at least this share as long as the first.
SECOND_LINE_SHARE = 0.6

#: Share of a coarse (0.5 mm) cell that must hold defect pixels for the line search.
COARSE_CELL_SHARE = 0.3

#: The outer band of the rectified panel (mm) left out of the scribe search.  The grid's border pixels
#: can take in a little of the tray (the corners are placed to a fraction of a photo pixel), and on a
#: dark coating that bright line along a whole edge was taken for a scribe (creep 0 mm, rating 10, and
#: its zone left out of the rust rating).  A scribe is cut well inside the panel; its ends in this band
#: are not measured anyway (the stations leave out ``end_mm`` at each end).
SCRIBE_MARGIN_MM = 2.0

#: A creep station is left out when its corroded zone comes this close (mm) to pixels not seen as
#: coating (the margin above, masks, label boxes): the zone may go on beneath them.
HIDDEN_REACH_MM = 0.5


@dataclass(frozen=True)
class ScribeResult:
    """Scribe lines found and the creepage measured from them.

    ``lines``: list of (start_xy_mm, end_xy_mm); ``stations``: one dict per
    station (line, t_mm, centre_xy_mm, normal_xy, left_mm, right_mm, creep_mm);
    ``corridor_profiles``: per line, the band left out of the rust rating (dict of ``t_mm`` along the
    line from its start and the reach ``neg_mm`` against and ``pos_mm`` along the normal ``(-u_y, u_x)`` of
    the line's direction ``u``, from :func:`_corridor_profile`): a zone that crept further at some stations,
    or on one side, takes no more coating elsewhere; ``corridor_sides_mm``: its largest reach on either
    side (against the normal, along it); ``corridor_half_mm``: the wider of the two.
    """

    lines: list = field(default_factory=list)
    stations: list = field(default_factory=list)
    corridor_half_mm: list = field(default_factory=list)
    note: str = ""
    corridor_sides_mm: list = field(default_factory=list)
    corridor_profiles: list = field(default_factory=list)

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
        """Pixels of the scribe zones (left out of the rust rating): along each line, as far on either side
        as its corridor profile reaches at each station (``corridor_profiles``, from :func:`_corridor_profile`),
        with square ends 2 mm past the scribe's ends (round caps of the zone's half width would take in rust
        beyond the ends of a wide corrosion zone); without profiles, one band of ``corridor_sides_mm``."""
        mask = np.zeros(shape_rc, np.uint8)
        profiles = self.corridor_profiles or [
            {"t_mm": None, "neg_mm": [h_neg] * 2, "pos_mm": [h_pos] * 2}
            for h_neg, h_pos in (self.corridor_sides_mm or [(h, h) for h in self.corridor_half_mm])]
        for (p0, p1), pr in zip(self.lines, profiles):
            p0, p1 = np.asarray(p0), np.asarray(p1)
            length = float(np.linalg.norm(p1 - p0))
            u = (p1 - p0) / length
            n = np.array([-u[1], u[0]])
            t = np.asarray(pr["t_mm"] if pr["t_mm"] is not None else [-2.0, length + 2.0], float)
            lo = np.maximum(np.asarray(pr["neg_mm"], float), 0.5 / px_per_mm)
            hi = np.maximum(np.asarray(pr["pos_mm"], float), 0.5 / px_per_mm)
            centre = p0[None, :] + t[:, None] * u[None, :]
            poly = np.vstack([centre + hi[:, None] * n, (centre - lo[:, None] * n)[::-1]])
            pts = np.rint((poly * px_per_mm - 0.5) * 16).astype(np.int32).reshape(-1, 1, 2)
            cv2.fillPoly(mask, [pts], 1, lineType=cv2.LINE_8, shift=4)
        return mask.astype(bool)


#: Bare steel in a scribe or a scraped creep zone: a mid grey (sRGB; coupon's reference, from memory:
#: abraded carbon steel photographs as a neutral grey about half-way between black and white).  Only
#: its lightness against the coating's is used: on which side of the coating bare steel lies, and how far.
BARE_STEEL_SRGB = (0.5, 0.5, 0.5)

#: A coating this many times lighter (or darker) than :data:`BARE_STEEL_SRGB` has steel on one side only.
STEEL_SIDE_RATIO = 1.2


def metal_scale(coating_linear: np.ndarray) -> tuple[int, float]:
    """(side, scale) of the bare-steel evidence on a coating: ``metal = clip((side * neutral_dev / scale -
    0.25) * 4, 0, 1)``.

    ``neutral_dev`` is ``1 - b`` with ``b`` the pixel's brightness relative to the coating, so on a coating
    lighter than steel (white, light colours) steel is darker (side +1) and a lighter mark (glare, a
    reflection) is not steel; on a coating darker than steel (black, dark grey) steel is lighter (side -1)
    and the scale is the whole way to steel's brightness (``b_s - 1``, about 13 on black): a soft glare
    tail that lightens a black coating by half is not bare steel.  Between the two (mid greys, where steel
    and coating look alike) both sides count, on the coating's own scale (side 0, scale 1), as before.
    """
    c = np.asarray(coating_linear, np.float64)
    steel = cs.srgb_to_linear(np.asarray(BARE_STEEL_SRGB, np.float64))
    b_s = float(steel @ c) / max(float(c @ c), 1e-12)  # steel's brightness along the coating colour
    if b_s * STEEL_SIDE_RATIO < 1:
        return 1, 1.0
    if b_s > STEEL_SIDE_RATIO:
        return -1, max(b_s - 1.0, 1.0)
    return 0, 1.0


def defect_map(model: ColourModel) -> tuple[np.ndarray, np.ndarray]:
    """(defect, metal): rust fraction or bare-steel evidence in [0, 1], and the bare-steel part
    (:func:`metal_scale`)."""
    # float32 in place: bare steel is a strong neutral deviation where no rust colour won.  Strip by
    # strip (STRIP_ROWS rows), so that a strip's four passes and its copy into the defect map run in
    # cache instead of five passes over 4.5 MB maps
    side, scale = metal_scale(model.coating_linear)
    nd = model.neutral_dev
    metal = np.empty(nd.shape, np.float32)
    defect = np.empty(nd.shape, np.float32)
    k = np.float32(4.0 / scale)
    for r0, r1 in _strips(nd.shape[0]):
        m = metal[r0:r1]
        if side == 0:
            np.abs(nd[r0:r1], out=m, dtype=np.float32)
        else:
            np.multiply(nd[r0:r1], np.float32(side), out=m, dtype=np.float32)
        m *= k  # / (0.25 scale)
        m -= np.float32(1.0)
        np.clip(m, 0, 1, out=m)
        defect[r0:r1] = m
    # rust wins on a few per cent of a panel: the selection below touches only those pixels (a
    # whole-panel np.where and clip took 2.4 ms a panel, these sparse steps about 1 ms); both parts
    # are >= 0 and at most one is non-zero per pixel, so the maximum is a selection
    wins = model.rust_pixels()
    metal.ravel()[wins] = 0
    defect.ravel()[wins] = np.clip(model.fraction.ravel()[wins], 0, 1)
    return defect, metal


def _projection(xy: np.ndarray, w: np.ndarray, theta: float, bin_mm: float):
    rho = xy[:, 0] * np.cos(theta) + xy[:, 1] * np.sin(theta)
    lo = rho.min()
    idx = np.floor((rho - lo) / bin_mm).astype(np.int64)
    return np.bincount(idx, weights=w), lo


#: Angles per block of :func:`_projection_peaks`: the block's (angles, points) temporaries stay in cache
#: (all 180 angles at once made 4 MB float64 arrays for 2 800 coarse cells, each in fresh pages).
_PEAK_ANGLES = 60


def _projection_peaks(xy: np.ndarray, thetas: np.ndarray, bin_mm: float) -> np.ndarray:
    """Highest bin of the unit-weight :func:`_projection` at each angle (the same binning).

    One row per angle, the points along it: numpy broadcasts over a long contiguous inner axis much
    faster than over 60 angles (1.35 ms against 2.0 ms a panel for the demo tray's 2 800 cells).
    """
    out = np.empty(len(thetas))
    x, y = xy[:, 0][None, :], xy[:, 1][None, :]
    for a in range(0, len(thetas), _PEAK_ANGLES):
        th = thetas[a:a + _PEAK_ANGLES]
        rho = np.cos(th)[:, None] * x + np.sin(th)[:, None] * y  # (angles, n)
        lo = rho.min(axis=1, keepdims=True)
        idx = np.floor((rho - lo) / bin_mm).astype(np.int64)
        width = int(idx.max()) + 1
        idx += (np.arange(len(th)) * width)[:, None]
        counts = np.bincount(idx.ravel(), minlength=len(th) * width)
        out[a:a + len(th)] = counts.reshape(len(th), width).max(axis=1)
    return out


def _find_lines(defect: np.ndarray, px_per_mm: float, settings: ScribeSettings, want: int | None,
                hidden: np.ndarray | None = None):
    coarse = 2.0  # px/mm of the search
    f = coarse / px_per_mm
    # share of defect pixels per coarse cell: a thin band (a cut with little creep, 2 to 3 photo
    # pixels wide) fills a fifth to a half of a 0.5 mm cell, and averaging the defect values
    # themselves would lose it
    hot = defect > 0.5
    small = cv2.resize(hot.astype(np.float32), (max(2, int(defect.shape[1] * f)),
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
    taken = np.zeros(len(xy), bool)  # the cells of the bands found
    for _ in range(want or 2):
        if taken.any():
            # a second line from the cells outside the first band: a chord across a wide corroded zone
            # (28 mm wide along a 100 mm line with 12 mm creep) with the rust beside it was long enough
            # for an X arm (tenth session); an X's real second arm loses only its crossing
            if np.count_nonzero(~taken) < 10:
                break
            peaks = _projection_peaks(xy[~taken], thetas, 0.5) / coarse
        # the longest projection at least 30 degrees from the lines found (the first on a tie)
        free = np.ones(len(thetas), bool)
        for t0, _ in found:
            # the angle between two lines on the doubled angle (lines repeat every 180 degrees): 30 degrees
            # apart is 60 there (it was compared with 30 once, which let a second line within 15 degrees)
            free &= ~(np.abs(np.angle(np.exp(2j * (thetas - t0)))) < np.deg2rad(60))
        best = None
        if free.any():
            i = int(np.flatnonzero(free)[np.argmax(peaks[free])])
            best = (float(peaks[i]), thetas[i])
        if best is None or best[0] < settings.min_length_mm:
            break
        if found and best[0] < SECOND_LINE_SHARE * found[0][1]:
            break  # the arms of an X are about equally long; a weaker band is scattered rust
        # fine angle: the projection of the band's own cells (the bins around the peak above half its
        # height, and 3 mm beyond) is sharpest when aligned with it; rust elsewhere on the panel (and,
        # before SCRIBE_MARGIN_MM, the border) would pull the angle its way.  A corroded zone 20 mm wide
        # along a 100 mm scribe projects nearly as long at 10 degrees off (its diagonal), and the first
        # angle on a tie was taken: the line ran across the zone and a chord of it was read as a second
        # arm (tenth session)
        h0, lo0 = _projection(xy, wts, best[1], 0.5)
        a0, b0 = _half_run(h0)
        rho = xy[:, 0] * np.cos(best[1]) + xy[:, 1] * np.sin(best[1])
        near = (rho > lo0 + a0 * 0.5 - 3.0) & (rho < lo0 + (b0 + 1) * 0.5 + 3.0)
        taken |= near
        band, band_w = xy[near], wts[near]
        # tilt the band's width allows (the diagonal of its width over the line's length), at least 1.5 degrees
        tilt = max(1.5, min(15.0, float(np.rad2deg(np.arctan2((b0 - a0 + 1) * 0.5, best[0])))))
        sharp = lambda t: float((_projection(band, band_w, t, 0.25)[0] ** 2).sum())  # noqa: E731
        th = best[1]
        if tilt > 1.5:
            th = max(best[1] + np.deg2rad(np.arange(-np.floor(tilt), np.floor(tilt) + 0.1, 1.0)), key=sharp)
        th = max(th + np.deg2rad(np.arange(-1.5, 1.51, 0.1)), key=sharp)
        found.append((th, best[0]))
    lines = []
    if not found:
        return lines  # no band long enough: skip the full-resolution pixel list (2 ms a panel)
    # flat indices split into rows and columns: np.nonzero on the 2-D map took 3 ms a panel
    full_r, full_c = np.divmod(np.flatnonzero(hot), defect.shape[1])
    pts = np.column_stack([(full_c + 0.5) / px_per_mm, (full_r + 0.5) / px_per_mm])
    for th, _ in found:
        h, lo = _projection(pts, np.ones(len(pts)), th, 0.1)
        k = int(np.argmax(np.convolve(h, np.ones(5), "same")))
        # centre of the band: centroid of the bins above half the peak, contiguous with it
        hs = np.convolve(h, np.ones(5) / 5, "same")
        a, b = _half_run(hs, k)
        idx = np.arange(a, b + 1)
        rho = lo + (np.sum(idx * hs[idx]) / np.sum(hs[idx]) + 0.5) * 0.1
        nrm = np.array([np.cos(th), np.sin(th)])
        u = np.array([-np.sin(th), np.cos(th)])
        d = pts @ nrm - rho
        near = np.abs(d) < 1.0
        t = pts[near] @ u
        if t.size < 10:
            continue
        # extent: longest run of 1 mm cells along the line that hold defect pixels (gaps <= 3 mm, or
        # hidden: a mask, a label or glare across the scribe does not cut it in two)
        cells = np.floor(t - t.min()).astype(int)
        bridge = None
        if hidden is not None:
            tc = t.min() + np.arange(int(cells.max()) + 1) + 0.5
            xy_px = np.rint((rho * nrm[None, :] + tc[:, None] * u[None, :]) * px_per_mm - 0.5).astype(int)
            inside = ((xy_px[:, 0] >= 0) & (xy_px[:, 0] < defect.shape[1]) & (xy_px[:, 1] >= 0)
                      & (xy_px[:, 1] < defect.shape[0]))
            bridge = np.zeros(len(tc), bool)
            bridge[inside] = hidden[xy_px[inside, 1], xy_px[inside, 0]] > 0
        s0, s1 = _longest_run(cells, px_per_mm, bridge=bridge)
        if s1 - s0 < settings.min_length_mm:
            continue
        t0, t1 = t.min() + s0, t.min() + s1 + 1
        lines.append((rho * nrm + t0 * u, rho * nrm + t1 * u))
    return lines


def _half_run(h: np.ndarray, k: int | None = None) -> tuple[int, int]:
    """First and last bin of the run of bins above half of ``h[k]`` that holds bin ``k`` (default: the peak)."""
    k = int(np.argmax(h)) if k is None else k
    below = np.flatnonzero(~(h > 0.5 * h[k]))
    left, right = below[below < k], below[below > k]
    return (int(left[-1]) + 1 if left.size else 0), (int(right[0]) - 1 if right.size else len(h) - 1)


def _longest_run(cells: np.ndarray, px_per_mm: float, share: float = 0.5, max_gap: int = 3,
                 bridge: np.ndarray | None = None) -> tuple[int, int]:
    """First and last 1 mm cell of the longest chain of occupied cells along a line.

    A cell is occupied when it holds ``share * px_per_mm`` defect pixels.  Pieces of occupied cells
    join across gaps of up to ``max_gap`` cells (a stretch of cut without corrosion), but a short
    piece (under :data:`END_PIECE_MM` or :data:`END_PIECE_SHARE` of the chain) at either end of a chain,
    behind a gap of 2 cells or more, is dropped: that is a rust spot just past the scribe end, and it would
    carry the scribe zone (left out of the rust rating) over itself.  Pieces at the end parted by gaps
    of one cell count as one piece (a cluster of spots 9 mm long behind a gap of 3 cells, in pieces of 3
    and 5 cells, carried a line 12 mm past its end: random-tray study, seed 6 scene 12).  ``bridge`` (per cell, optional): cells that cannot be
    seen (masked, under glare); a gap of such cells joins its pieces whatever its length.
    """
    occ = np.bincount(cells) >= share * px_per_mm
    if not occ.any():
        return 0, 0
    edges = np.diff(np.r_[0, occ.astype(np.int8), 0])
    pieces = list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))
    chains, cur = [], [pieces[0]]
    for pc in pieces[1:]:
        # the gap's cells that can be seen (not hidden) must be at most max_gap
        gap = np.arange(cur[-1][1] + 1, pc[0])
        seen = gap.size - (int(np.count_nonzero(bridge[gap])) if bridge is not None else 0)
        if seen <= max_gap:
            cur.append(pc)
        else:
            chains.append(cur)
            cur = [pc]
    chains.append(cur)
    best = (0, 0)
    for ch in chains:
        short = max(END_PIECE_MM, END_PIECE_SHARE * (ch[-1][1] - ch[0][0] + 1))
        # groups of pieces parted by gaps of one cell; groups are parted by gaps of 2 cells or more
        groups = [[ch[0]]]
        for pc in ch[1:]:
            if pc[0] - groups[-1][-1][1] - 1 < 2:
                groups[-1].append(pc)
            else:
                groups.append([pc])
        while len(groups) > 1 and groups[-1][-1][1] - groups[-1][0][0] + 1 < short:
            groups.pop()
        while len(groups) > 1 and groups[0][-1][1] - groups[0][0][0] + 1 < short:
            groups.pop(0)
        ch = [pc for g in groups for pc in g]
        if ch[-1][1] - ch[0][0] > best[1] - best[0]:
            best = (int(ch[0][0]), int(ch[-1][1]))
    return best


def _close_rows(mask: np.ndarray, size: int) -> np.ndarray:
    """``scipy.ndimage.binary_closing(mask, structure=np.ones((1, size)))`` of a 2-D bool array.

    By OpenCV for an odd ``size`` (dilation and erosion with the outside counted as 0, scipy's
    ``border_value=0``): 0.08 ms against 3.6 ms for the 171 profiles of an X scribe.  An even
    ``size`` (where the two libraries centre the structure differently) goes to scipy.
    """
    if size % 2 == 0 or mask.size == 0:
        return ndi.binary_closing(mask, structure=np.ones((1, size)))
    kernel = np.ones((1, size), np.uint8)
    u8 = np.ascontiguousarray(mask, dtype=bool).view(np.uint8)
    grown = cv2.dilate(u8, kernel, borderType=cv2.BORDER_CONSTANT, borderValue=0)
    return cv2.erode(grown, kernel, borderType=cv2.BORDER_CONSTANT, borderValue=0).view(bool)


def _band_run_walk(closed: np.ndarray, mid: int, win: int):
    """:func:`_band_runs` of one profile: its nearest set sample, then a walk to either end of the run."""
    seg = closed[mid - win:mid + win + 1]
    if not seg.any():
        return None
    start = mid - win + int(np.flatnonzero(seg)[np.argmin(np.abs(np.flatnonzero(seg) - win))])
    a_i, b_i = start, start
    while a_i > 0 and closed[a_i - 1]:
        a_i -= 1
    while b_i < len(closed) - 1 and closed[b_i + 1]:
        b_i += 1
    return a_i, b_i


def _band_runs(closed: np.ndarray, mid: int, win: int) -> list:
    """Per profile (a row of ``closed``): first and last sample of the run of set samples around the
    set sample nearest ``mid`` within ``win`` (the first of two as near), or None when none is set there.

    The same choice as a search of each row in turn (its nearest sample, then a walk to either end
    of the run), for all rows in a few array operations.
    """
    n_rows, n = closed.shape
    if mid - win < 0:  # a search shorter than the scribe window (settings out of the usual range)
        return [_band_run_walk(c, mid, win) for c in closed]
    seg = closed[:, mid - win:mid + win + 1]
    if seg.shape[1] == 0:
        return [None] * n_rows
    has = seg.any(axis=1)
    dist = np.where(seg, np.abs(np.arange(seg.shape[1]) - win)[None, :], np.iinfo(np.int64).max)
    start = mid - win + np.argmin(dist, axis=1)  # argmin: the first of equal distances
    pos = np.arange(n)
    last_gap = np.maximum.accumulate(np.where(closed, -1, pos[None, :]), axis=1)  # last unset at or before
    next_gap = np.minimum.accumulate(np.where(closed, n, pos[None, :])[:, ::-1], axis=1)[:, ::-1]
    rows = np.arange(n_rows)
    first = last_gap[rows, start] + 1
    last = next_gap[rows, start] - 1
    return [(int(a), int(b)) if h else None for h, a, b in zip(has, first, last)]


def _station_maps(centres: np.ndarray, along: np.ndarray, offs: np.ndarray, u: np.ndarray, nrm: np.ndarray,
                  px_per_mm: float) -> tuple[np.ndarray, np.ndarray]:
    """Pixel coordinates (x and y maps for cv2.remap, float32) of every station's sample points.

    Row ``s * len(along) + a`` holds station ``s``, line ``a`` along the scribe; its columns are the
    offsets across it: ``(centre + along * u + offs * nrm) * px_per_mm - 0.5`` (a pixel's centre at
    (i + 0.5) / px_per_mm mm).  The same float64 operations as on the (stations, along, offsets, 2)
    broadcast array, one coordinate at a time into contiguous maps (that array was 5 MB of fresh pages
    and remap copied each strided coordinate out of it).
    """
    base = (centres[:, None, :] + (along[:, None] * u)[None]).reshape(-1, 2)  # (stations * along, 2)
    maps = []
    for k in range(2):
        t = base[:, k:k + 1] + (offs * nrm[k])[None, :]
        t *= px_per_mm
        t -= 0.5
        maps.append(t.astype(np.float32))
    return maps[0], maps[1]


#: Margin of the corridor beyond the corroded zone at each station (mm, coupon's choice).
CORRIDOR_MARGIN_MM = 1.0


def _corridor_profile(t_mm: np.ndarray, reach: np.ndarray, length_mm: float, width_mm: float,
                      shared: np.ndarray | None = None) -> dict:
    """The corridor's reach along one line, at each station (``t_mm``, 1 mm apart) and on either side.

    ``reach`` (n, 2) is the zone's reach against and along the normal.  Each value is at least the cut's
    half width and that side's median reach over the line (a zone washed out by glare read 0 mm creep over
    5 stations of a 3 mm zone, whose coating side was then rated as rust), then the larger of it and its
    neighbours' (a station stands for 1 mm of line, and the zone's edge moves between two), plus
    :data:`CORRIDOR_MARGIN_MM`.  A station whose zone runs to the search limit (inf) takes the line's
    widest seen reach on that side.  A station not seen (NaN: near the crossing of an X, where the two
    zones merge, or where no corroded band shows) takes the reach interpolated along the line between the
    nearest stations that saw the zone's own edge on that side: ``shared`` marks a reach cut at the bisector
    with the other arm (with heavy creep every station near the crossing has one, and interpolating those
    left the merged zone's outer part rated as rust).  A side with no reach seen at all keeps the cut's half
    width (as the uniform corridor did): a zone past the search limit all along is not one the tool can
    bound, and leaving 25 mm out would hide the rust of most of the panel.  The first and last stations'
    values hold to 2 mm past the line's ends (square ends).
    """
    r = np.array(reach, float).reshape(-1, 2)
    t = np.asarray(t_mm, float)
    shared = np.zeros(r.shape, bool) if shared is None else np.asarray(shared, bool).reshape(-1, 2)
    half = width_mm / 2
    for j in range(2):
        seen = np.isfinite(r[:, j])
        widest = r[seen, j].max() if seen.any() else half
        r[np.isposinf(r[:, j]), j] = widest
        gap = np.isnan(r[:, j])
        src = seen & ~shared[:, j]
        src = src if src.any() else seen
        r[gap, j] = np.interp(t[gap], t[src], r[src, j]) if src.any() else widest
    r = np.maximum(r, half)
    if len(r):
        r = np.maximum(r, np.median(r, axis=0))  # no narrower than the side's median reach
    if len(r) >= 2:
        pad = np.vstack([r[:1], r, r[-1:]])
        r = np.maximum(np.maximum(pad[:-2], pad[1:-1]), pad[2:])
    r = r + CORRIDOR_MARGIN_MM
    if not t.size:
        t, r = np.array([0.0, length_mm]), np.full((2, 2), half + CORRIDOR_MARGIN_MM)
    t = np.concatenate([[-2.0], t, [length_mm + 2.0]])
    r = np.vstack([r[:1], r, r[-1:]])
    return {"t_mm": t.tolist(), "neg_mm": r[:, 0].tolist(), "pos_mm": r[:, 1].tolist()}


def measure_scribe(model: ColourModel, px_per_mm: float, size_mm: tuple[float, float],
                   settings: ScribeSettings = ScribeSettings(), exclude: np.ndarray | None = None,
                   unsure: np.ndarray | None = None) -> ScribeResult:
    """Find the scribe(s) on a rectified panel and measure the creepage.

    ``exclude``: pixels that are not coating (masks, label boxes, glare), left out of the search and the
    measurement, as is the outer :data:`SCRIBE_MARGIN_MM` of the grid.  A station whose corroded
    zone reaches such pixels (within :data:`HIDDEN_REACH_MM`) is not measured: the zone's edge
    is hidden there, and the width up to the mask would read as too little creep.  ``unsure``: pixels
    seen less well (glare taken off): measured, but a scribe's extent runs on across them as across
    hidden ones (a glare patch washes the band out and would cut an X arm in two).

    Returns an empty :class:`ScribeResult` (``found`` False) when no band of at
    least ``min_length_mm`` exists or ``mode`` is "none".
    """
    if settings.mode == "none":
        return ScribeResult(note="scribe search off")
    defect, metal = defect_map(model)
    hidden = np.zeros(defect.shape, np.float32)  # 1 where the coating is not seen: margin, masks, labels
    m = int(round(SCRIBE_MARGIN_MM * px_per_mm))
    if m > 0:
        for a in (defect, metal):
            a[:m], a[-m:], a[:, :m], a[:, -m:] = 0, 0, 0, 0
        hidden[:m], hidden[-m:], hidden[:, :m], hidden[:, -m:] = 1, 1, 1, 1
    if exclude is not None:
        defect[exclude] = 0
        metal[exclude] = 0
        hidden[exclude] = 1
    want = {"line": 1, "x": 2}.get(settings.mode)
    lines = _find_lines(defect, px_per_mm, settings, want, hidden if unsure is None else np.maximum(hidden, unsure))
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
    stations, profiles = [], []  # profiles: the corridor's reach (against, along the normal) along each line
    n_hidden = n_cross = 0
    broad: list[int] = []
    for li, (p0, p1) in enumerate(lines):
        p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
        length = float(np.linalg.norm(p1 - p0))
        u = (p1 - p0) / length
        nrm = np.array([-u[1], u[0]])
        # the measured stations, and every 1 mm of the ends left out, which only widen the corridor: the
        # zone of a heavily crept X spread past the corridor of the measured stations at an arm's end
        # (a sliver of 6.7 mm2 rated as rust, D610 7 on a panel with none; tenth session)
        ts = np.arange(settings.end_mm, length - settings.end_mm + 1e-9, 1.0)
        tip = np.arange(1.0, min(settings.end_mm, length / 2) - 1e-9, 1.0)
        ts = np.concatenate([tip, ts, length - tip[::-1]])
        counts = (ts >= settings.end_mm - 1e-9) & (ts <= length - settings.end_mm + 1e-9)
        centres = [p0 + t * u for t in ts]
        use = np.array([crossing is None or np.linalg.norm(ctr - crossing) > settings.end_mm for ctr in centres],
                       bool)
        # the zone's reach against and along the normal at every station (NaN: not seen, near the crossing
        # of an X or where no band shows; inf: the zone runs to the search limit; see _corridor_profile)
        reach = np.full((len(ts), 2), np.nan)
        shared = np.zeros((len(ts), 2), bool)  # the reach is cut at the bisector with the other arm
        t_all = ts
        ts, counts = ts[use], counts[use]
        centres = np.array([ctr for ctr, ok in zip(centres, use) if ok]).reshape(-1, 2)
        if not len(ts):
            profiles.append(_corridor_profile(t_all, reach, length, w))
            continue
        reach_used, shared_used = reach[use], shared[use]
        # every station's strip sampled in one remap of the defect and one of the metal map (the same
        # bilinear samples as one remap per station, 0.1 ms of call overhead each saved), and the gap
        # closing of all profiles in one call
        map_x, map_y = _station_maps(centres, along, offs, u, nrm, px_per_mm)
        n_st = len(ts)
        profs = cv2.remap(defect, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                          borderValue=0).reshape(n_st, len(along), len(offs)).mean(axis=1)
        cores = cv2.remap(metal, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                          borderValue=0).reshape(n_st, len(along), len(offs)).mean(axis=1)
        # samples on or beside hidden pixels (any of the 5 lines along the station; off the grid counts)
        veiled = cv2.remap(hidden, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                           borderValue=1).reshape(n_st, len(along), len(offs)).max(axis=1) > 0
        near = int(round(HIDDEN_REACH_MM / step))
        # X scribe: samples nearer the other line than this one belong to the other arm's zone; near the
        # crossing the two zones merge, and a zone reaching there has no edge of its own
        foreign = None
        if crossing is not None:
            q0, q1 = (np.asarray(x, float) for x in lines[1 - li])
            uq = (q1 - q0) / max(float(np.linalg.norm(q1 - q0)), 1e-9)
            nq = np.array([-uq[1], uq[0]])
            d_other = np.abs(((centres - q0) @ nq)[:, None] + float(nrm @ nq) * offs[None, :])
            foreign = d_other < np.abs(offs)[None, :]
        profs = np.array([np.convolve(pr, np.ones(3) / 3, "same") for pr in profs])
        mid = len(offs) // 2
        win = int(round((w / 2 + 1.0) / step))
        aboves = profs > 0.5
        # the cut itself may not look corroded (bare steel as light as the coating):
        # close gaps up to the scribe width + 0.6 mm inside the band (along each profile only)
        gap_px = int(round((w + 0.6) / step))
        closeds = _close_rows(aboves, gap_px) | aboves
        # the corroded run of every station at once: the set sample nearest the line (the first on a
        # tie) and the run of set samples around it
        runs = _band_runs(closeds, mid, win)
        for si, (t, centre, prof, core, above, closed, run, veil) in enumerate(zip(ts, centres, profs, cores, aboves,
                                                                                 closeds, runs, veiled)):
            if run is None:
                # no corroded band seen here: a gap in the scribe, or a zone too faint to see (under corrected
                # glare); the corridor takes its neighbours' reach (NaN), not the cut's alone: narrowed to the
                # cut, a faint zone under glare was rated as rust (0.67 % for 0.39 %)
                continue
            a_i, b_i = run
            last = len(closed) - 1
            if foreign is not None and foreign[si, max(0, a_i - near):b_i + near + 1].any():
                # runs into the other arm's zone: no edge of its own on that side, whose run goes on across
                # the other zone (the other arm's corridor covers it), often to the search limit; the side
                # away from it still widens the corridor unless it too reaches the limit (the notch between
                # two arms: a sliver of zone was rated as rust).  Tested before the limit (review).
                # on the other arm's side this arm's corridor reaches as far as the samples nearer this line
                # (the other arm's corridor takes over there), on the free side as far as the zone
                n_cross += int(counts[si])
                f_neg = np.flatnonzero(foreign[si, :mid + 1])
                f_pos = np.flatnonzero(foreign[si, mid:]) + mid
                if f_neg.size and f_neg[-1] >= a_i - near:
                    reach_used[si, 0] = -float(offs[max(a_i, f_neg[-1] + 1)])
                    shared_used[si, 0] = True
                else:  # the free side's own edge, or the search limit (inf, as below)
                    reach_used[si, 0] = -float(offs[a_i]) if a_i > 0 else np.inf
                if f_pos.size and f_pos[0] <= b_i + near:
                    reach_used[si, 1] = float(offs[min(b_i, f_pos[0] - 1)])
                    shared_used[si, 1] = True
                else:
                    reach_used[si, 1] = float(offs[b_i]) if b_i < last else np.inf
                continue
            if a_i == 0 or b_i == last:
                # the zone reaches the search limit: not measurable here; on that side the corridor takes the
                # line's widest reach (inf), on the other it reaches the zone's end
                reach_used[si] = (np.inf if a_i == 0 else -float(offs[a_i]),
                                  np.inf if b_i == last else float(offs[b_i]))
                continue
            if veil[max(0, a_i - near):b_i + near + 1].any():
                # the zone runs into a mask, a label or the panel margin: its edge is hidden, so no creep
                # is measured here; the zone seen so far still widens the corridor left out of the rating
                n_hidden += int(counts[si])
                reach_used[si] = (-float(offs[a_i]), float(offs[b_i]))
                continue
            # sub-sample edges: where the profile crosses one half at the run's ends
            lo_i = a_i - (prof[a_i] - 0.5) / max(prof[a_i] - prof[a_i - 1], 1e-9)
            hi_i = b_i + (prof[b_i] - 0.5) / max(prof[b_i] - prof[b_i + 1], 1e-9)
            left_edge, right_edge = offs[0] + lo_i * step, offs[0] + hi_i * step
            reach_used[si] = (-float(left_edge), float(right_edge))
            if not counts[si]:
                continue  # an end station: the corridor only
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
        mine = [x["zone_width_mm"] for x in stations if x["line"] == li]
        if mine and length < SCRIBE_MIN_ELONGATION * float(np.mean(mine)):
            broad.append(li)  # a broad patch (glare, a stain) along a line, not a thin band
        reach[use], shared[use] = reach_used, shared_used
        profiles.append(_corridor_profile(t_all, reach, length, w, shared))
    if broad:
        keep = [i for i in range(len(lines)) if i not in broad]
        renum = {old: new for new, old in enumerate(keep)}
        stations = [dict(x, line=renum[x["line"]]) for x in stations if x["line"] in renum]
        lines, profiles = [lines[i] for i in keep], [profiles[i] for i in keep]
        what = f"{len(broad)} broad patch(es) along a line, not a thin band"
        if want and len(lines) != want:
            return ScribeResult(note=f"expected {'one scribe line' if want == 1 else 'an X scribe'}, found "
                                     f"{len(lines)} line(s) and {what}")
        if not lines:
            return ScribeResult(note=f"no scribe found ({what})")
    note = "" if stations else "scribe found but no station could be measured"
    if n_hidden:
        note = (f"{note}; " if note else "") + (f"{n_hidden} station(s) left out: the corroded zone runs under "
                                                "a mask, a label or the panel margin")
    if n_cross:
        note = (f"{note}; " if note else "") + (f"{n_cross} station(s) near the crossing left out: the corroded "
                                                "zone runs into the other arm's")
    sides = [(max(pr["neg_mm"]), max(pr["pos_mm"])) for pr in profiles]
    return ScribeResult([(np.asarray(a).tolist(), np.asarray(b).tolist()) for a, b in lines], stations,
                        [max(sd) for sd in sides], note=note, corridor_sides_mm=sides, corridor_profiles=profiles)
