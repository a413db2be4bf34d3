"""Frames of one real fluorescence field, sharp, dimmed and blurred, as a
camera would give them: the focus test's real image (tests/focus.rs).

Usage:
  python3 make_real_focus_frames.py OUT_DIR
      writes OUT_DIR/<name>.tif (16-bit, tifffile) for the names printed, one
      per line, as "<name> <lamp> <blur sigma px> <seed>".

The field: nuclear.png, "a fluorescent microscopy image of cell nuclei" that
the mahotas package ships as demo data (mahotas 1.4.19 from PyPI, MIT
licence; mahotas/demos/data/nuclear.png, 1344 x 1024, 8-bit grey stored as
RGB with three equal channels). Only the file is read; no mahotas code runs.

The model: the 8-bit grey value v above the image's own floor (its minimum,
19) is the field's light, scaled to 4,000 ADU at full scale and multiplied by
the lamp; blurred with scipy.ndimage.gaussian_filter (sigma in px, reflect
edges) for a defocused frame; then shot noise (Poisson photoelectrons at a
gain of 2 ADU per electron, numpy's generator with the given seed) and a
camera offset of 100 ADU that no lamp changes.
"""
import sys
from importlib import resources
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image
from scipy import ndimage as ndi

FRAMES = [
    # name, lamp, blur sigma (px), seed
    ("baseline1", 1.0, 0.0, 1),
    ("baseline2", 1.0, 0.0, 2),
    ("baseline3", 1.0, 0.0, 3),
    ("baseline4", 1.0, 0.0, 4),
    ("lamp50", 0.5, 0.0, 5),
    ("lamp30", 0.3, 0.0, 6),
    ("blur2", 1.0, 2.0, 7),
    ("blur3", 1.0, 3.0, 8),
    ("blur2_lamp50", 0.5, 2.0, 9),
]

GAIN = 2.0
OFFSET = 100.0
FULL_SCALE_ADU = 4000.0


def main():
    out = Path(sys.argv[1])
    out.mkdir(parents=True, exist_ok=True)
    png = resources.files("mahotas") / "demos" / "data" / "nuclear.png"
    with resources.as_file(png) as path:
        grey = np.asarray(Image.open(path))[..., 0].astype(np.float64)
    field = (grey - grey.min()) / 255.0 * FULL_SCALE_ADU
    for name, lamp, sigma, seed in FRAMES:
        light = field * lamp
        if sigma > 0:
            light = ndi.gaussian_filter(light, sigma, mode="reflect")
        rng = np.random.default_rng(seed)
        adu = GAIN * rng.poisson(light / GAIN) + OFFSET
        tifffile.imwrite(out / f"{name}.tif", np.clip(np.rint(adu), 0, 65535).astype(np.uint16))
        print(name, lamp, sigma, seed)


if __name__ == "__main__":
    main()
