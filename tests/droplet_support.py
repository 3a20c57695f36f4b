"""Shared pieces of the droplet tests: the indicator calibrated as a user would, and series on disk."""

from __future__ import annotations

import functools
from pathlib import Path

from coupon.calibrate.indicator import fit_from_drops
from coupon.calibrate.profile import Profile, save_profile
from coupon.calibrate.scale import scale_given
from coupon.synth.droplet import DropletSeriesSpec, droplet_series, public_truth
from coupon.synth.indicator import buffer_strip_scene
from tests.conftest import write_rgb

BUFFER_PH = [3, 4, 5, 6, 7, 8, 9, 10, 11]


@functools.lru_cache(maxsize=1)
def calibrated_model():
    """Buffer drops photographed on the same steel, fitted with coupon.calibrate.indicator.fit_from_drops."""
    photo, _ = buffer_strip_scene(BUFFER_PH, seed=103)
    model, _ = fit_from_drops(photo, BUFFER_PH, name="test buffers")
    return model


def write_profile(path: Path, px_per_mm: float | None, with_indicator: bool = True) -> Path:
    prof = Profile(scale=None if px_per_mm is None else scale_given(px_per_mm),
                   indicator=calibrated_model() if with_indicator else None)
    return save_profile(prof, path)


def write_series(folder: Path, spec: DropletSeriesSpec, seed: int = 1, name="drop_t{t:03d}min.jpg"):
    """Frames as JPEG (the generator's own JPEG off: the file is the one compression), truths in order."""
    folder.mkdir(parents=True, exist_ok=True)
    truths, paths = [], []
    for rgb, truth in droplet_series(spec, seed=seed):
        p = write_rgb(folder / name.format(t=int(round(truth["t_min"])), i=len(paths)), rgb, quality=90)
        paths.append(p)
        truths.append(public_truth(truth))
    return paths, truths
