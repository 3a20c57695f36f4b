"""Regenerate the committed ``demo_images/`` folder: ``python -m coupon.synth.demo_images demo_images``.

The images are the demo's own scenes (the same seeds ``coupon demo`` uses),
written with their ground truth.  ``coupon demo`` regenerates them itself, so
the folder is a sample to look at, not an input the demo needs.
"""

from __future__ import annotations

import sys
from pathlib import Path

from coupon.demo import SCENE_WRITERS, DemoContext


def main(out: str | Path) -> None:
    out = Path(out)
    ctx = DemoContext(out, small=True, images_dir=out)
    for writer in SCENE_WRITERS:
        writer(ctx)
    print(f"demo images written to {out}")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "demo_images")
