"""The strip-by-strip passes of the pit analysis (and its reused scratch arrays) against full-frame references.

The pit analysis never makes a full-frame float array of a scan, nor a full-frame label map (its objects are
labelled from the runs of its pixel lists, ``label_runs``): the enlarged
signed distance, the background and the smoothed grey level exist one strip of
rows at a time (``RowUpsampler``, ``candidate_pixels``).  Each is checked here
against the full-frame computation it replaces, made with the reference
libraries: OpenCV's ``resize`` (bilinear enlargement) and scikit-image's
``h_maxima`` (markers of the watershed split).
"""

from __future__ import annotations

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage.morphology import h_maxima

from coupon.io.images import float01
from coupon.segment.pits import (
    STRIP_ROWS,
    RowUpsampler,
    _split_object,
    background_level,
    background_map,
    candidate_pixels,
    find_region,
    h_maxima_small,
    object_moments,
    plain_disc,
    smooth_grey,
)


def _bilinear(small: np.ndarray, shape) -> np.ndarray:
    """OpenCV's INTER_LINEAR sampling (pixel centres aligned, border replicated), in float64."""
    h, w = shape
    n, m = small.shape

    def axis(k, size):
        t = np.clip((np.arange(size) + 0.5) * k / size - 0.5, 0, k - 1)
        i = np.minimum(np.floor(t).astype(int), max(k - 2, 0))
        return i, np.minimum(i + 1, k - 1), t - i

    y0, y1, ay = axis(n, h)
    x0, x1, ax = axis(m, w)
    s = small.astype(np.float64)
    ay, ax = ay[:, None], ax[None, :]
    return ((1 - ay) * ((1 - ax) * s[y0][:, x0] + ax * s[y0][:, x1])
            + ay * ((1 - ax) * s[y1][:, x0] + ax * s[y1][:, x1]))


@pytest.mark.parametrize("small_shape, shape", [((5, 7), (3 * STRIP_ROWS + 5, 301)), ((1, 9), (70, 40)),
                                                ((2, 3), (200, 7)), ((37, 53), (500, 800)),
                                                ((40, 30), (40, 30))])
def test_row_upsampler_equals_opencv_bilinear_sampling(small_shape, shape):
    """Every strip equals the same rows of OpenCV's INTER_LINEAR enlargement: its formula in float64
    (float32 rounding apart), and cv2.resize itself (reference library) within its own rounding."""
    rng = np.random.default_rng(3)
    small = rng.random(small_shape).astype(np.float32) * 4 - 2
    exact = _bilinear(small, shape)
    opencv = cv2.resize(small, (shape[1], shape[0]), interpolation=cv2.INTER_LINEAR)
    up = RowUpsampler(small, shape)
    whole = up.rows(0, shape[0])
    for r0, r1 in [(0, shape[0]), (0, 1), (shape[0] - 3, shape[0]), (shape[0] // 3, shape[0] // 2 + 1)]:
        assert np.array_equal(up.rows(r0, r1), whole[r0:r1])  # a strip is exactly those rows of the whole
    # the enlargement along rows is OpenCV's own, which without its IPP path (coupon turns IPP off) rounds
    # its weights: about 1e-5 on values of +-2
    np.testing.assert_allclose(whole, exact, rtol=0, atol=2e-5)
    np.testing.assert_allclose(whole, opencv, rtol=0, atol=3e-5)


@pytest.mark.parametrize("threshold", [0.0, 3.5, 40.0])
def test_row_upsampler_threshold_equals_thresholded_resize(threshold):
    """The mask made only about the outlines equals thresholding the full enlargement (OpenCV)."""
    # the signed distance of a tilted rectangle, as find_region makes it on its reduced copy
    small = np.zeros((90, 130), np.uint8)
    cv2.fillPoly(small, [np.array([[12, 20], [118, 8], [124, 70], [18, 84]], np.int32)], 1)
    inside = cv2.distanceTransform(np.pad(small, 1), cv2.DIST_L2, 5)[1:-1, 1:-1]
    outside = cv2.distanceTransform(np.pad(1 - small, 1, constant_values=1), cv2.DIST_L2, 5)[1:-1, 1:-1]
    sd = (np.where(small > 0, inside - 0.5, 0.5 - outside) * 7.5).astype(np.float32)
    shape = (675, 975)
    up = RowUpsampler(sd, shape)
    got = up.greater(threshold, np.empty(shape, bool))
    # the same as thresholding the whole enlargement strip by strip ...
    assert np.array_equal(got, up.rows(0, shape[0]) > np.float32(threshold))
    # ... and as thresholding OpenCV's bilinear sampling, but for pixels within float rounding of the threshold
    exact = _bilinear(sd, shape)
    clear = np.abs(exact - threshold) > 1e-4
    assert clear.mean() > 0.99
    assert np.array_equal(got[clear], (exact > threshold)[clear])


def test_h_maxima_small_equals_scikit_image():
    """Markers of the split: the iterated-dilation h-maxima equal skimage.morphology.h_maxima (reference library)."""
    rng = np.random.default_rng(11)
    for _ in range(60):
        m = np.zeros((70, 110), np.uint8)
        for _ in range(int(rng.integers(1, 5))):
            cv2.circle(m, (int(rng.integers(15, 95)), int(rng.integers(15, 55))), int(rng.integers(3, 22)), 1, -1)
        d = cv2.distanceTransform(np.pad(m, 1), cv2.DIST_L2, cv2.DIST_MASK_PRECISE)[1:-1, 1:-1]
        for h in (0.5, 1.0, 3.0):
            assert np.array_equal(h_maxima_small(d, h), h_maxima(d, h).astype(bool))
    noise = rng.random((40, 40)).astype(np.float32) * 3
    assert np.array_equal(h_maxima_small(noise, 0.5), h_maxima(noise, 0.5).astype(bool))
    big = cv2.GaussianBlur(rng.random((260, 260)).astype(np.float32), (0, 0), 6) * 50  # the hand-over path
    assert np.array_equal(h_maxima_small(big, 0.2), h_maxima(big, 0.2).astype(bool))
    assert not h_maxima_small(np.ones((5, 5), np.float32), 0.5).any()


def _scene(seed=5, shape=(700, 1000)):
    """A lit metal plate on a dark table with dark round pits (synthetic ground truth)."""
    rng = np.random.default_rng(seed)
    h, w = shape
    yy, xx = np.mgrid[:h, :w]
    grey = 0.55 + 0.15 * xx / w - 0.1 * yy / h
    plate = (yy > 60) & (yy < h - 60) & (xx > 80) & (xx < w - 80)
    grey = np.where(plate, grey, 0.08)
    for _ in range(120):
        r, c, rad = rng.integers(80, h - 80), rng.integers(100, w - 100), rng.uniform(2, 9)
        grey = np.where((yy - r) ** 2 + (xx - c) ** 2 <= rad * rad, grey * rng.uniform(0.3, 0.7), grey)
    grey = grey + rng.normal(0, 0.01, grey.shape)
    return np.clip(np.rint(grey * 255), 0, 255).astype(np.uint8)


@pytest.mark.parametrize("look", ["dark", "bright-rim"])
def test_candidate_pixels_equal_the_full_frame_contrast(look):
    """The strips give the candidates and strengths of the full-frame contrast smooth / background - 1."""
    grey = _scene()
    region = find_region(grey, 10.0)
    window = 120.0
    bg_small = background_map(grey, region.coupon, window)
    got = candidate_pixels(grey, bg_small, region.coupon, region.analysed, look, 0.12)
    # the reference: full-frame arrays as the analysis made them before it worked in strips
    contrast = smooth_grey(float01(grey)) / background_level(grey, region.coupon, window) - 1.0
    strength = -contrast if look == "dark" else contrast
    ref_idx = np.flatnonzero((strength >= np.float32(0.12)) & region.coupon)
    # a product and a quotient round differently: pixels exactly at the threshold may go either way
    assert np.setxor1d(got.idx, ref_idx).size <= max(2, ref_idx.size // 10_000)
    common, gi, ri = np.intersect1d(got.idx, ref_idx, return_indices=True)
    assert common.size > 200
    np.testing.assert_allclose(got.strength[gi], strength.ravel()[ref_idx[ri]], rtol=0, atol=2e-6)
    nstep = max(1, int(np.sqrt(grey.size / 2.5e5)))
    sample = contrast[::nstep, ::nstep][region.analysed[::nstep, ::nstep]]
    ref_noise = 1.4826 * np.median(np.abs(sample - np.median(sample)))
    assert got.noise_sigma == pytest.approx(ref_noise, rel=1e-4)


def _disc(radius, shape=(120, 120), centre=(60.3, 59.6)):
    yy, xx = np.mgrid[:shape[0], :shape[1]]
    return ((yy - centre[0]) ** 2 + (xx - centre[1]) ** 2 <= radius * radius).astype(np.int32)


def test_plain_disc_tells_discs_from_ellipses_and_pairs():
    """Moments of pixel discs pass as round; tilted ellipses and touching pairs do not (geometry)."""
    rng = np.random.default_rng(2)
    for radius in (3.5, 4, 4.5, 6, 10, 20, 40):
        for centre in rng.uniform(99, 101, (8, 2)):
            m = object_moments(_disc(radius, (200, 200), tuple(centre)))
            assert plain_disc(m["area"][1:], m["major"][1:], m["minor"][1:]).all(), (radius, centre)
    for axes, angle in [((10, 7), 0), ((20, 8), 30), ((12, 9), 45)]:
        e = np.zeros((120, 120), np.uint8)
        cv2.ellipse(e, (60, 60), axes, angle, 0, 360, 1, -1)
        m = object_moments(e.astype(np.int32))
        assert not plain_disc(m["area"][1:], m["major"][1:], m["minor"][1:]).any(), (axes, angle)
    for r1, r2, angle in [(10, 10, 0), (10, 8, 45), (15, 15, 30), (20, 7, 0), (10, 4, 20)]:
        m = np.zeros((200, 200), np.uint8)
        cv2.circle(m, (100, 100), r1, 1, -1)
        d = r1 + r2 - 2
        cv2.circle(m, (int(100 + d * np.cos(np.radians(angle))), int(100 + d * np.sin(np.radians(angle)))), r2, 1, -1)
        assert _split_object(m.astype(bool)) is not None
        mo = object_moments(m.astype(np.int32))
        assert not plain_disc(mo["area"][1:], mo["major"][1:], mo["minor"][1:]).any(), (r1, r2, angle)


@pytest.mark.parametrize("shape", [(400, 600), (399, 597), (101, 253)])
@pytest.mark.parametrize("k", [2, 3, 4, 7])
def test_overlay_block_centres_equal_slicing(shape, k):
    """The overlay's reduced picture is the centre pixel of each whole block, as numpy slicing picks it."""
    from coupon.report.pit_figures import block_centres

    rng = np.random.default_rng(k)
    rgb = rng.integers(0, 256, shape + (3,), dtype=np.uint8)
    hb, wb = shape[0] // k, shape[1] // k
    ref = rgb[k // 2::k, k // 2::k][:hb, :wb]
    assert np.array_equal(block_centres(rgb, k), ref)
    assert np.array_equal(block_centres(float01(rgb), k), float01(ref))
    labels = rng.integers(0, 70_000, shape, dtype=np.int32)
    assert np.array_equal(block_centres(labels, k), labels[k // 2::k, k // 2::k][:hb, :wb])


def test_candidate_pass_on_two_threads_equals_one(monkeypatch):
    """Splitting the strips over two threads changes nothing (same pixels, strengths and noise)."""
    import coupon.segment.pits as pits

    grey = _scene(seed=8, shape=(2 * pits.PARALLEL_MIN_STRIPS * STRIP_ROWS + 37, 640))
    region = find_region(grey, 10.0)
    bg = background_map(grey, region.coupon, 120.0)
    two = candidate_pixels(grey, bg, region.coupon, region.analysed, "dark", 0.12)
    monkeypatch.setattr(pits, "PARALLEL_MIN_STRIPS", 10**9)
    one = candidate_pixels(grey, bg, region.coupon, region.analysed, "dark", 0.12)
    assert two.idx.size > 100
    assert np.array_equal(two.idx, one.idx) and np.array_equal(two.strength, one.strength)
    assert two.noise_sigma == one.noise_sigma


def test_results_do_not_share_the_reused_scratch_arrays():
    """Two analyses in turn on one thread: the first result is unchanged by the second (its labels are
    its own pixel list, not the reused label map), and both equal a fresh analysis."""
    from coupon.segment.pits import PitLabels, PitSettings, analyse_pits

    rgb_a = np.repeat(_scene(seed=21)[..., None], 3, axis=2)
    rgb_b = np.repeat(_scene(seed=22)[..., None], 3, axis=2)
    st = PitSettings(px_per_mm=10.0)
    a = analyse_pits(rgb_a, st)
    a_labels = np.asarray(a.labels).copy()
    b = analyse_pits(rgb_b, st)
    assert isinstance(a.labels, PitLabels) and a.labels.shape == rgb_a.shape[:2]
    assert np.array_equal(np.asarray(a.labels), a_labels)
    a2 = analyse_pits(rgb_a, st)
    assert np.array_equal(np.asarray(a2.labels), a_labels)
    assert not np.array_equal(np.asarray(b.labels), a_labels)
    # the map agrees with the table: pixels per pit_id = area x scale^2, ids 1..n
    counts = np.bincount(a_labels.ravel())[1:]
    assert len(counts) == len(a.pits) > 20
    np.testing.assert_allclose(counts, a.pits["area_mm2"].to_numpy() * 100.0)
    for k in (2, 3, 5):
        hb, wb = a_labels.shape[0] // k, a_labels.shape[1] // k
        assert np.array_equal(a.labels.block_centres(k), a_labels[k // 2::k, k // 2::k][:hb, :wb])


def test_run_sums_equal_pixel_sums():
    """Moments summed over horizontal runs equal the sums over the runs' pixels, exactly (integer sums)."""
    from coupon.segment.pits import _moment_sums, label_components, pixel_runs

    rng = np.random.default_rng(4)
    mask = rng.random((300, 411)) < 0.35
    mask[:, -1] = mask[:, 0] = True  # runs that end on the last column and restart on the next row
    n, lab = label_components(mask)
    idx = np.flatnonzero(lab)
    runs = pixel_runs(idx, lab.shape[1])
    # the runs cover the pixels exactly, each within one row and one object
    ends = runs.start + runs.length
    assert runs.start[0] == 0 and ends[-1] == idx.size and np.array_equal(runs.start[1:], ends[:-1])
    rebuilt = np.concatenate([np.arange(r * 411 + c, r * 411 + c + m) for r, c, m in
                              zip(runs.row, runs.col0, runs.length)])
    assert np.array_equal(rebuilt, idx)
    assert (runs.col0 + runs.length <= 411).all()  # no run wraps onto the next row
    for w in (1, 2, 7):  # narrow frames: every row break found by the row search
        sub = np.flatnonzero(rng.random(500) < 0.7)
        r = pixel_runs(sub, w)
        assert (r.col0 + r.length <= w).all() and r.length.sum() == sub.size
    run_lab = lab.ravel()[idx[runs.start]]
    assert np.array_equal(np.repeat(run_lab, runs.length), lab.ravel()[idx])
    assert np.array_equal(runs.sums(run_lab, n + 1), _moment_sums(idx, lab.ravel()[idx], n + 1, lab.shape[1]))


@pytest.mark.parametrize("shape", [(400, 600), (401, 599), (37, 1000), (5, 7)])
def test_pit_labels_samples_equal_slicing_the_map(shape):
    """The overlay's and the reference surface's label samples from the pixel list equal slicing the full
    map (numpy)."""
    from coupon.segment.pits import PitLabels

    rng = np.random.default_rng(shape[0])
    full = ((rng.random(shape) < 0.3) * rng.integers(1, 50, shape)).astype(np.int32)
    idx = np.flatnonzero(full)
    labels = PitLabels(shape, idx, full.ravel()[idx])
    assert np.array_equal(np.asarray(labels), full)
    for k in (1, 2, 3, 4, 7):
        hb, wb = shape[0] // k, shape[1] // k
        assert np.array_equal(labels.block_centres(k), full[k // 2::k, k // 2::k][:hb, :wb])
    # any regular sample (the reference surface's grid) equals slicing the map too
    for k in (1, 2, 3, 5, 20):
        for offset in {0, k // 2, k - 1}:
            assert np.array_equal(labels.sampled(k, offset), full[offset::k, offset::k])
    empty = PitLabels(shape, np.zeros(0, np.int64), np.zeros(0, np.int32))
    assert not empty.block_centres(3).any()


def _check_label_runs(mask: np.ndarray) -> None:
    """label_runs on the mask's pixel list: the same objects as OpenCV's and scipy's 8-connected labelling,
    numbered by their first 2 x 2 block in reading order."""
    from scipy import ndimage as ndi

    from coupon.segment.pits import label_runs, pixel_runs

    h, w = mask.shape
    idx = np.flatnonzero(mask)
    runs = pixel_runs(idx, w)
    n, run_lab = label_runs(runs, w)
    ours = np.zeros(mask.shape, np.int32)
    ours.ravel()[idx] = np.repeat(run_lab, runs.length)
    n_cv, lab_cv = cv2.connectedComponents(mask.astype(np.uint8), connectivity=8, ltype=cv2.CV_32S)
    lab_sp, n_sp = ndi.label(mask, structure=np.ones((3, 3)))
    assert n == n_cv - 1 == n_sp
    for ref in (lab_cv, lab_sp):  # the same partition: a one-to-one map between the labels
        pairs = np.unique(np.stack([ours[mask], ref[mask]]), axis=1)
        assert pairs.shape[1] == n
    if n:
        # numbering: by the first 2 x 2 block (block row, block column) each object touches
        rr, cc = np.nonzero(mask)
        first = np.full(n + 1, np.iinfo(np.int64).max)
        np.minimum.at(first, ours[rr, cc], (rr // 2) * (w + 2) + cc // 2)
        assert np.all(np.diff(first[1:]) > 0)


@pytest.mark.parametrize("seed,shape,p", [(0, (300, 411), 0.35), (1, (64, 64), 0.6), (2, (1, 500), 0.5),
                                          (3, (500, 1), 0.5), (4, (257, 129), 0.1), (5, (40, 40), 0.0)])
def test_label_runs_equals_opencv_and_scipy(seed, shape, p):
    rng = np.random.default_rng(seed)
    mask = rng.random(shape) < p
    _check_label_runs(mask)
    # blobs with holes and diagonal contacts (a dilated sparse mask, thinned again)
    blobs = cv2.dilate(mask.astype(np.uint8), np.ones((3, 3), np.uint8)).astype(bool) & (rng.random(shape) < 0.8)
    _check_label_runs(blobs)


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 40), st.integers(1, 40), st.floats(0.0, 0.9), st.integers(0, 2**31 - 1))
def test_label_runs_property(h, w, p, seed):
    """Any mask (hypothesis): the run labelling agrees with OpenCV's and scipy's."""
    _check_label_runs(np.random.default_rng(seed).random((h, w)) < p)


def test_opencv_distance_transform_is_repeatable_after_importing_coupon():
    """Importing coupon turns OpenCV's IPP paths off: the precise distance transform is then the same on
    every call and equals scipy's exact Euclidean distance transform (reference library). With IPP it
    differed in the last digits between calls (OpenCV issue 24082), so touching pits split differently
    from run to run."""
    from scipy import ndimage as ndi

    import coupon  # noqa: F401

    assert not cv2.ipp.useIPP()
    m = np.zeros((90, 140), np.uint8)
    cv2.circle(m, (45, 45), 33, 1, -1)
    cv2.circle(m, (100, 50), 27, 1, -1)
    m = np.pad(m, 1)
    ref = ndi.distance_transform_edt(m).astype(np.float32)
    seen = set()
    junk = []
    for i in range(60):  # other allocations in between move the buffers about
        junk.append(np.empty(int(1000 + 3001 * i % 150_000)))
        if len(junk) > 4:
            junk.pop(0)
        d = cv2.distanceTransform(m, cv2.DIST_L2, cv2.DIST_MASK_PRECISE)
        seen.add(d.tobytes())
    assert len(seen) == 1
    np.testing.assert_array_equal(d, ref)


def test_one_opencv_thread_means_no_extra_threads_and_the_same_result():
    """Batch workers hold OpenCV to one thread: the analysis then starts no threads of its own, same result."""
    import threading

    import coupon.segment.pits as pits

    grey = _scene(seed=8, shape=(2 * pits.PARALLEL_MIN_STRIPS * STRIP_ROWS + 37, 640))
    before = cv2.getNumThreads()
    try:
        region2 = find_region(grey, 10.0)
        two = candidate_pixels(grey, background_map(grey, region2.coupon, 120.0), region2.coupon,
                               region2.analysed, "dark", 0.12)
        cv2.setNumThreads(1)
        started = []
        real_start = threading.Thread.start
        threading.Thread.start = lambda self: (started.append(self.name), real_start(self))[1]
        try:
            region1 = find_region(grey, 10.0)
            one = candidate_pixels(grey, background_map(grey, region1.coupon, 120.0), region1.coupon,
                                   region1.analysed, "dark", 0.12)
        finally:
            threading.Thread.start = real_start
    finally:
        cv2.setNumThreads(before)
    assert started == []
    assert np.array_equal(region1.coupon, region2.coupon) and np.array_equal(region1.analysed, region2.analysed)
    assert np.array_equal(one.idx, two.idx) and np.array_equal(one.strength, two.strength)


def test_release_scratch_frees_the_reused_arrays():
    from coupon.segment import pits

    rgb = np.repeat(_scene(seed=3)[..., None], 3, axis=2)
    pits.analyse_pits(rgb, pits.PitSettings(px_per_mm=10.0))
    assert pits._SCRATCH.arrays
    pits.release_scratch()
    assert not pits._SCRATCH.arrays
    res = pits.analyse_pits(rgb, pits.PitSettings(px_per_mm=10.0))  # made again on the next analysis
    assert len(res.pits) > 0
    with pytest.raises(ValueError):
        np.asarray(res.labels, copy=False)


def test_split_of_many_objects_at_once_equals_one_at_a_time():
    """The objects offered for splitting are split side by side in one mosaic: each result must be the
    one of the object split alone (touching pairs and triples of discs, single discs, ellipses)."""
    from coupon.segment.pits import _split_objects

    rng = np.random.default_rng(12)
    objs = []
    for k in range(40):
        m = np.zeros((140, 160), np.uint8)
        n = k % 4  # 0: an ellipse, 1: one disc, 2: a pair, 3: a triple
        if n == 0:
            cv2.ellipse(m, (80, 70), (int(rng.integers(12, 40)), int(rng.integers(6, 20))),
                        float(rng.uniform(0, 180)), 0, 360, 1, -1)
        for _ in range(n):
            cv2.circle(m, (int(rng.integers(45, 115)), int(rng.integers(45, 95))), int(rng.integers(6, 30)), 1, -1)
        rows, cols = np.flatnonzero(m.any(axis=1)), np.flatnonzero(m.any(axis=0))
        objs.append(m[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1].astype(bool))
    together = _split_objects(objs)
    alone = [_split_objects([o])[0] for o in objs]
    assert sum(p is not None for p in alone) >= 15  # pairs and triples do split
    for a, b in zip(together, alone):
        assert (a is None) == (b is None)
        if a is not None:
            np.testing.assert_array_equal(a, b)
