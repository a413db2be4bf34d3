"""Dim objects below a threshold, by their definition written on numpy and
scikit-image: the reference for tests/dim_objects.rs.

Usage:
  python3 make_dim_reference.py OUT_DIR
      writes OUT_DIR/<name>.tif (16-bit, tifffile) and OUT_DIR/dim_references.json,
      one entry per image: {name, file, threshold, level, dim_objects}.

The definition (framewarden's analysis::dim_objects, re-derived here):
  1. t = Otsu's level of the image's integer histogram (foreground > t; the
     first level that maximises the between-class variance).
  2. The background class, levels 0..=t, is split at its own Otsu level t2.
     Its parts are two populations when the upper part's mean lies at least
     4 standard deviations of the lower part above the lower part's mean,
     the lower part's variance taken with Sheppard's correction (+1/12).
     Otherwise level = None and dim_objects = 0.
  3. skimage.measure.label of image > t2 (8-connected); dim objects are the
     regions whose intensity_max (skimage.measure.regionprops) is <= t and
     whose area is at least 20 px (the default size filter).

Images:
  - real_field: nuclear.png, "a fluorescent microscopy image of cell nuclei"
    shipped as demo data by mahotas 1.4.19 (PyPI, MIT licence;
    mahotas/demos/data/nuclear.png), as make_real_focus_frames.py models it
    (4,000 ADU full scale, Poisson noise at 2 ADU per electron, offset 100);
    only the file is read, no mahotas code runs. Its few bright nuclei take
    Otsu's level; most nuclei are dimmer.
  - dim_and_bright: 30 bright and 30 dim discs on a flat background, Poisson
    noise (numpy, seed 11).
  - bright_only: the 30 bright discs alone, blurred (their rims are the
    only thing between background and objects).
  - gradient_only: bright discs on a background rising left to right.
"""
import json
import sys
from importlib import resources
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image
from scipy import ndimage as ndi
from skimage.measure import label, regionprops

MIN_CONTRAST = 4.0
MIN_AREA = 20


def otsu_level(counts):
    """Otsu's level over counts[0..]: foreground is > level."""
    levels = np.arange(len(counts), dtype=np.float64)
    c = counts.astype(np.float64)
    w0 = np.cumsum(c)
    s0 = np.cumsum(c * levels)
    n, s = w0[-1], s0[-1]
    w1 = n - w0
    with np.errstate(divide="ignore", invalid="ignore"):
        m0 = s0 / w0
        m1 = (s - s0) / w1
        between = w0 * w1 * (m0 - m1) ** 2
    between[~np.isfinite(between)] = -1.0
    between[w1 == 0] = -1.0
    return int(np.argmax(between))


def reference(img):
    counts = np.bincount(img.ravel(), minlength=65536)
    t = otsu_level(counts)
    below = counts[: t + 1]
    occupied = np.nonzero(below)[0]
    if len(occupied) < 2:
        return t, None, 0
    t2 = otsu_level(below)
    lv = np.arange(len(below), dtype=np.float64)
    dark, light = slice(0, t2 + 1), slice(t2 + 1, t + 1)
    dark_mean = np.average(lv[dark], weights=below[dark])
    dark_var = np.average((lv[dark] - dark_mean) ** 2, weights=below[dark])
    light_mean = np.average(lv[light], weights=below[light])
    if light_mean - dark_mean < MIN_CONTRAST * np.sqrt(dark_var + 1.0 / 12.0):
        return t, None, 0
    regions = regionprops(label(img > t2, connectivity=2), intensity_image=img)
    n = sum(1 for r in regions if r.intensity_max <= t and r.area >= MIN_AREA)
    return t, t2, n


def discs(shape, centres, radius, values):
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    out = np.zeros(shape)
    for (cy, cx), v in zip(centres, values):
        out[(yy - cy) ** 2 + (xx - cx) ** 2 <= radius**2] = v
    return out


def main():
    out = Path(sys.argv[1])
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(11)
    images = {}
    png = resources.files("mahotas") / "demos" / "data" / "nuclear.png"
    with resources.as_file(png) as path:
        grey = np.asarray(Image.open(path))[..., 0].astype(np.float64)
    field = (grey - grey.min()) / 255.0 * 4000.0
    images["real_field"] = 2.0 * rng.poisson(field / 2.0) + 100.0

    shape = (384, 384)
    grid = [(32 + 64 * (k // 6), 32 + 64 * (k % 6)) for k in range(36)]
    rng.shuffle(grid)

    def jitter(centres):
        return [(y + rng.integers(-8, 9), x + rng.integers(-8, 9)) for y, x in centres]

    bright = jitter(grid[:30])
    light_b = discs(shape, bright, 9, [3000.0] * 30)
    dim_centres = [(y + 32, x + 32) for y, x in jitter(grid[:30])]
    dim_centres = [(y % 384, x % 384) for y, x in dim_centres]
    light_d = discs(shape, dim_centres, 8, [700.0] * 30)
    light = np.maximum(ndi.gaussian_filter(light_b, 1.0), ndi.gaussian_filter(light_d, 1.0)) + 200.0
    images["dim_and_bright"] = rng.poisson(light).astype(np.float64)
    images["bright_only"] = rng.poisson(ndi.gaussian_filter(light_b, 2.0) + 200.0).astype(np.float64)
    ramp = np.linspace(150.0, 600.0, shape[1])[None, :]
    images["gradient_only"] = rng.poisson(ndi.gaussian_filter(light_b, 1.0) + ramp).astype(np.float64)

    cases = []
    for name, img in images.items():
        img = np.clip(np.rint(img), 0, 65535).astype(np.uint16)
        tifffile.imwrite(out / f"{name}.tif", img)
        t, level, n = reference(img)
        cases.append({"name": name, "file": f"{name}.tif", "threshold": t, "level": level, "dim_objects": n})
        print(name, t, level, n)
    (out / "dim_references.json").write_text(json.dumps(cases, indent=1))


if __name__ == "__main__":
    main()
