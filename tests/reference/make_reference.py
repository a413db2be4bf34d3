#!/usr/bin/env python3
"""Writes the outside-reference test set for framewarden's analysis engine.

Usage: python3 make_reference.py OUTPUT_FOLDER

Writes greyscale TIFF files into OUTPUT_FOLDER with tifffile (an outside
writer, several encodings), then computes reference results for every page
with scikit-image, SciPy, OpenCV and numpy, and writes them to
OUTPUT_FOLDER/references.json. tests/reference.rs reads that file and checks
the engine against it. Each value names the library function that made it.

Everything is deterministic: synthetic images come from a fixed numpy seed,
sample images are the ones scikit-image ships inside its wheel (no download).
"""

import json
import sys
from fractions import Fraction
from pathlib import Path

import cv2
import numpy as np
import scipy
import scipy.ndimage as ndi
import skimage
import skimage.data
import tifffile
from skimage.filters import (
    threshold_li,
    threshold_multiotsu,
    threshold_otsu,
    threshold_triangle,
)
from skimage.measure import label, regionprops

SEED = 20240601

# skimage's multi-Otsu builds a (levels x levels) lookup table over the image's
# min..max range (its histogram must have equally spaced bins, so the empty
# levels cannot be dropped). Above this many levels it is too slow and large for
# a quick test and the skimage reference is left out (null, with the reason).
MULTI_OTSU_MAX_RANGE = 4096
# Independent exhaustive search (numpy) over the occupied levels: used up to
# this many distinct values, which covers the wide-range 16-bit images.
EXHAUSTIVE_MAX_VALUES = 5000


# --------------------------------------------------------------------------
# Drawing helpers for the synthetic scenes
# --------------------------------------------------------------------------


def grid(h, w):
    return np.mgrid[0:h, 0:w].astype(np.float64)


def disc(h, w, cy, cx, r):
    yy, xx = grid(h, w)
    return (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r


def ellipse(h, w, cy, cx, a, b, angle):
    """Filled ellipse, semi-axes a (along `angle`) and b, angle in radians."""
    yy, xx = grid(h, w)
    dy, dx = yy - cy, xx - cx
    c, s = np.cos(angle), np.sin(angle)
    u = dx * c + dy * s
    v = -dx * s + dy * c
    return (u / a) ** 2 + (v / b) ** 2 <= 1.0


def ring(h, w, cy, cx, r_out, r_in):
    return disc(h, w, cy, cx, r_out) & ~disc(h, w, cy, cx, r_in)


def noisy(rng, shape, mean, sd, lo, hi, dtype):
    img = rng.normal(mean, sd, size=shape)
    return np.clip(np.rint(img), lo, hi).astype(dtype)


def paint(rng, img, mask, mean, sd, lo, hi):
    vals = rng.normal(mean, sd, size=int(mask.sum()))
    img[mask] = np.clip(np.rint(vals), lo, hi).astype(img.dtype)


def scene_masks(h, w):
    """Object masks of the main synthetic scene (scaled to h x w).

    Discs, ellipses at several angles, two rings with holes, a dot inside one
    ring's hole, objects cut by all four borders, two objects touching only
    diagonally (one object under 8-connectivity, two under 4), and a ring
    whose hole touches the border through a one-pixel gap (not a hole).
    """
    s = h / 256.0
    m = []
    m.append(disc(h, w, 40 * s, 50 * s, 14 * s))
    m.append(disc(h, w, 200 * s, 60 * s, 9 * s))
    m.append(ellipse(h, w, 120 * s, 200 * s, 22 * s, 8 * s, 0.5))
    m.append(ellipse(h, w, 190 * s, 190 * s, 15 * s, 6 * s, -1.1))
    m.append(ellipse(h, w, 60 * s, 150 * s, 18 * s, 11 * s, 1.9))
    # ring with a dot inside its hole
    m.append(ring(h, w, 130 * s, 90 * s, 24 * s, 14 * s))
    m.append(disc(h, w, 130 * s, 90 * s, 4 * s))
    # plain ring
    m.append(ring(h, w, 220 * s, 130 * s, 16 * s, 8 * s))
    # border-touching objects (top, left, bottom, right)
    m.append(disc(h, w, 0, 110 * s, 10 * s))
    m.append(disc(h, w, 150 * s, 0, 12 * s))
    m.append(disc(h, w, h - 1, 230 * s, 11 * s))
    m.append(ellipse(h, w, 30 * s, w - 1, 14 * s, 7 * s, 0.3))
    # diagonal-only contact: two squares sharing one corner
    y0, x0 = int(90 * s), int(30 * s)
    k = max(3, int(6 * s))
    sq = np.zeros((h, w), bool)
    sq[y0 : y0 + k, x0 : x0 + k] = True
    sq[y0 + k : y0 + 2 * k, x0 + k : x0 + 2 * k] = True
    m.append(sq)
    # ring opened to the border by a gap: its "hole" is background
    op = ring(h, w, 245 * s, 20 * s, 14 * s, 7 * s)
    op[int(245 * s) :, int(18 * s) : int(22 * s)] = False
    m.append(op)
    return m


# --------------------------------------------------------------------------
# The test images
# --------------------------------------------------------------------------


def sample_images():
    """8-bit greyscale images that ship inside scikit-image (no network)."""
    out = []
    for name in [
        "camera",
        "coins",
        "moon",
        "page",
        "text",
        "clock",
        "checkerboard",
        "microaneurysms",
    ]:
        img = getattr(skimage.data, name)()
        out.append((name, f"skimage.data.{name}", np.ascontiguousarray(img, np.uint8)))
    horse = skimage.data.horse()
    out.append(
        (
            "horse",
            "skimage.data.horse (bool silhouette as 0/255)",
            np.where(horse, 0, 255).astype(np.uint8),
        )
    )
    cell = skimage.data.cell()[:320, :320]
    out.append(("cell", "skimage.data.cell, top-left 320x320", np.ascontiguousarray(cell)))
    return out


def synthetic_images(rng):
    out = []

    # 8-bit scene: bright objects on a dim noisy background.
    h = w = 256
    img = noisy(rng, (h, w), 30, 6, 0, 255, np.uint8)
    for i, mk in enumerate(scene_masks(h, w)):
        paint(rng, img, mk, 150 + 12 * (i % 6), 10, 0, 255)
    out.append(("scene8", "synthetic 8-bit scene", img))

    # 16-bit version of the same scene at a different size.
    h, w = 200, 240
    img = noisy(rng, (h, w), 2000, 300, 0, 65535, np.uint16)
    for i, mk in enumerate(scene_masks(h, w)):
        paint(rng, img, mk, 30000 + 4000 * (i % 5), 1500, 0, 65535)
    out.append(("scene16", "synthetic 16-bit scene", img))

    # Sparse 16-bit histogram: only five distinct values spread over 0..65535.
    h, w = 128, 160
    img = np.full((h, w), 3000, np.uint16)
    img[disc(h, w, 40, 40, 20)] = 21000
    img[ring(h, w, 80, 110, 30, 15)] = 40000
    img[disc(h, w, 80, 110, 5)] = 65535
    img[ellipse(h, w, 110, 30, 14, 6, 0.7)] = 9000
    img[disc(h, w, 10, 150, 8)] = 65535
    out.append(("sparse16", "synthetic 16-bit, five distinct values", img))

    # 16-bit data whose values occupy 1000..1200 only.
    h, w = 160, 160
    img = noisy(rng, (h, w), 1040, 10, 1000, 1200, np.uint16)
    for i, mk in enumerate(scene_masks(h, w)):
        paint(rng, img, mk, 1140 + 5 * (i % 4), 12, 1000, 1200)
    out.append(("narrow16", "synthetic 16-bit, values in 1000..1200", img))

    # Noisy, low-contrast 16-bit: objects barely above the noise.
    h, w = 128, 128
    yy, xx = grid(h, w)
    img = noisy(rng, (h, w), 10000, 700, 0, 65535, np.uint16)
    base = img.astype(np.float64) + 3.0 * xx  # slight illumination gradient
    for mk in scene_masks(h, w)[:8]:
        base[mk] += 900.0
    img = np.clip(np.rint(base), 0, 65535).astype(np.uint16)
    out.append(("lowcontrast16", "synthetic 16-bit, low contrast, noisy", img))

    # Small objects: fewer than 2 % of the pixels are foreground.
    h, w = 384, 384
    img = noisy(rng, (h, w), 40, 4, 0, 255, np.uint8)
    fg = np.zeros((h, w), bool)
    for _ in range(25):
        cy, cx = rng.uniform(5, h - 5), rng.uniform(5, w - 5)
        fg |= disc(h, w, cy, cx, rng.uniform(1.5, 4.0))
    paint(rng, img, fg, 200, 15, 0, 255)
    assert fg.mean() < 0.02
    out.append(("small8", "synthetic 8-bit, objects cover < 2 %", img))

    # Full-scale 16-bit with saturated objects touching each other.
    h, w = 96, 128
    img = noisy(rng, (h, w), 500, 50, 0, 65535, np.uint16)
    img[disc(h, w, 48, 40, 20) | disc(h, w, 48, 78, 20)] = 65535
    img[ring(h, w, 48, 40, 20, 10)] = 60000
    out.append(("saturated16", "synthetic 16-bit, saturated touching discs", img))

    # Constant frame: every method must cope with a single grey level.
    out.append(("flat8", "synthetic 8-bit, constant 77", np.full((64, 64), 77, np.uint8)))
    return out


def multipage_images(rng):
    """Three 16-bit pages of one scene, as a multi-page file."""
    h, w = 128, 128
    masks = scene_masks(h, w)
    pages = []
    for p in range(3):
        img = noisy(rng, (h, w), 1000 + 500 * p, 100, 0, 65535, np.uint16)
        for i, mk in enumerate(masks):
            if (i + p) % 3 != 0:
                paint(rng, img, mk, 20000 + 5000 * p, 800, 0, 65535)
        pages.append(img)
    return pages


# --------------------------------------------------------------------------
# Writing: vary the TIFF encoding across files
# --------------------------------------------------------------------------

ENCODINGS = [
    # (description, tifffile.TiffWriter.write keyword arguments, byte order)
    ("uncompressed strips, little endian", {}, "<"),
    ("zlib/deflate, horizontal predictor, strips of 16 rows",
     {"compression": "zlib", "predictor": True, "rowsperstrip": 16}, "<"),
    ("LZW, no predictor, big endian", {"compression": "lzw"}, ">"),
    ("PackBits, tiles 64x64", {"compression": "packbits", "tile": (64, 64)}, "<"),
    ("uncompressed tiles 32x48, big endian", {"tile": (32, 48)}, ">"),
    ("LZW, horizontal predictor, tiles 64x32, big endian",
     {"compression": "lzw", "predictor": True, "tile": (64, 32)}, ">"),
    ("zlib/deflate, no predictor, tiles 16x16",
     {"compression": "zlib", "tile": (16, 16)}, "<"),
    ("PackBits, strips of 7 rows, big endian",
     {"compression": "packbits", "rowsperstrip": 7}, ">"),
]


def write_tiff(path, pages, kwargs, byteorder):
    with tifffile.TiffWriter(path, byteorder=byteorder) as tw:
        for img in pages:
            tw.write(img, photometric="minisblack", metadata=None, **kwargs)
    # Read back with tifffile to be sure the file says what we meant.
    with tifffile.TiffFile(path) as tf:
        assert len(tf.pages) == len(pages), path
        for page, img in zip(tf.pages, pages):
            assert np.array_equal(page.asarray(), img), path


# --------------------------------------------------------------------------
# Reference values
# --------------------------------------------------------------------------


def separability_exact(img, t):
    """Otsu's η = σ_B² / σ_T² with class 0 = pixels <= t (Otsu 1979).

    Computed exactly with integers from the histogram:
    η = (n1·S0 − n0·S1)² / (n0·n1·(N·Q − S²)), S = Σv, Q = Σv².
    """
    v = img.astype(np.int64).ravel()
    counts = np.bincount(v)
    levels = np.arange(counts.size, dtype=object)
    c = counts.astype(object)
    below = levels <= t
    n0 = int(c[below].sum())
    n1 = int(c[~below].sum())
    s0 = int((c[below] * levels[below]).sum())
    s1 = int((c[~below] * levels[~below]).sum())
    n = n0 + n1
    s = s0 + s1
    q = int((c * levels * levels).sum())
    total = n * q - s * s
    if n0 == 0 or n1 == 0 or total == 0:
        return 0.0
    return float(Fraction((n1 * s0 - n0 * s1) ** 2, n0 * n1 * total))


def objects_of(labels, img):
    out = []
    # skimage.measure.regionprops (objects sorted by label)
    for r in regionprops(labels, intensity_image=img):
        vals = img[labels == r.label].astype(np.float64)
        min_row, min_col, max_row, max_col = r.bbox
        out.append(
            {
                "label": int(r.label),
                "area": int(r.area),
                "centroid_row": float(r.centroid[0]),
                "centroid_col": float(r.centroid[1]),
                "bbox": [int(min_row), int(min_col), int(max_row), int(max_col)],
                "intensity_mean": float(r.intensity_mean),
                "intensity_max": float(r.intensity_max),
                "intensity_sum": float(vals.sum()),
                "perimeter": float(r.perimeter),
                "major_axis_length": float(r.axis_major_length),
                "minor_axis_length": float(r.axis_minor_length),
                "eccentricity": float(r.eccentricity),
                "solidity": float(r.solidity),
            }
        )
    return out


def multi_otsu_3(img, nbins):
    """skimage.filters.threshold_multiotsu(classes=3), or None with the reason."""
    if np.unique(img).size < 3:
        return None, "fewer than 3 grey levels: skimage raises ValueError"
    levels = int(img.max()) - int(img.min()) + 1
    if levels > MULTI_OTSU_MAX_RANGE:
        return None, f"{levels} levels from min to max: too many for skimage's lookup table here"
    # Integer images: one bin per level from min to max (nbins is ignored).
    return [int(x) for x in threshold_multiotsu(img, classes=3, nbins=nbins)], "skimage"


def multi_otsu_3_exhaustive(img):
    """All best cut pairs (t1, t2) for three classes (v <= t1 < v <= t2 < v).

    Every pair of occupied levels is scored with numpy by Σ_k S_k²/N_k (the
    between-class variance up to constants). A cut at an empty level scores as
    the cut at the occupied level below it, so occupied levels are enough.
    Returns every pair within 1e-12 relative of the best, in (t1, t2) order:
    exact ties in real arithmetic (symmetric histograms) are broken by rounding,
    differently by each implementation, so all tied pairs are right answers.
    """
    values, counts = np.unique(img, return_counts=True)
    n = values.size
    if n < 3 or n > EXHAUSTIVE_MAX_VALUES:
        return None
    cn = np.concatenate([[0.0], np.cumsum(counts, dtype=np.float64)])
    cs = np.concatenate([[0.0], np.cumsum(counts * values.astype(np.float64))])

    def score(a, b):  # a class made of occupied levels a..b (exclusive end)
        return (cs[b] - cs[a]) ** 2 / (cn[b] - cn[a])

    def rows():
        for i in range(1, n - 1):  # class 1 = levels [0, i)
            j = np.arange(i + 1, n)  # class 2 = [i, j), class 3 = [j, n)
            yield i, j, score(0, i) + score(i, j) + score(j, n)

    best = max(float(total.max()) for _, _, total in rows())
    pairs = []
    for i, j, total in rows():
        for k in np.flatnonzero(total >= best * (1.0 - 1e-12)):
            pairs.append([int(values[i - 1]), int(values[j[k] - 1])])
    return pairs


def references(img):
    bit_depth = 8 if img.dtype == np.uint8 else 16
    nbins = 256 if bit_depth == 8 else 65536
    ref = {"bit_depth": bit_depth, "height": int(img.shape[0]), "width": int(img.shape[1])}
    # Decoder check: checksums of the pixels tifffile read back (raster order).
    flat = img.astype(np.uint64).ravel()
    ref["pixel_sum"] = int(flat.sum())
    ref["pixel_weighted_sum"] = int((flat * np.arange(1, flat.size + 1, dtype=np.uint64)).sum())

    # skimage.filters.threshold_otsu: skimage histograms integer images at one
    # bin per integer level (nbins is ignored for integer dtypes), so the
    # returned bin centre is an integer level t with class 0 = pixels <= t.
    t = int(threshold_otsu(img, nbins=nbins))
    ref["otsu"] = t
    if bit_depth == 8 and img.min() < img.max():
        # cv2.threshold(THRESH_BINARY | THRESH_OTSU): dst = 255 where src > t.
        t_cv, _ = cv2.threshold(img, 0, 255, cv2.THRESH_BINARY | cv2.THRESH_OTSU)
        ref["otsu_opencv"] = int(t_cv)
    elif bit_depth == 8:
        ref["otsu_opencv"] = None
        ref["otsu_opencv_note"] = "constant frame: OpenCV returns 0, a degenerate answer"
    else:
        ref["otsu_opencv"] = None
        ref["otsu_opencv_note"] = "OpenCV's Otsu accepts 8-bit input only"
    ref["triangle"] = int(threshold_triangle(img, nbins=nbins))
    ref["li"] = float(threshold_li(img))
    ref["multi_otsu_3"], ref["multi_otsu_3_note"] = multi_otsu_3(img, nbins)
    ref["multi_otsu_3_best_pairs"] = multi_otsu_3_exhaustive(img)
    if ref["multi_otsu_3"] is not None:
        # The two references must agree wherever both exist.
        assert ref["multi_otsu_3"] in ref["multi_otsu_3_best_pairs"], ref
    ref["separability"] = separability_exact(img, t)

    # Segmentation at Otsu's threshold: foreground is strictly above t.
    mask = img > t
    # scipy.ndimage.binary_fill_holes default structure = 4-connected background
    # (holes of 8-connected objects); a 3x3 structure = 8-connected background
    # (holes of 4-connected objects).
    filled8 = ndi.binary_fill_holes(mask)
    filled4 = ndi.binary_fill_holes(mask, structure=np.ones((3, 3), bool))
    # skimage.measure.label numbers objects in raster order of their first pixel.
    lab8 = label(filled8, connectivity=2)
    lab4 = label(filled4, connectivity=1)
    ref["segmentation"] = {
        "threshold": t,
        "connectivity8": {"count": int(lab8.max()), "objects": objects_of(lab8, img)},
        "connectivity4": {"count": int(lab4.max()), "objects": objects_of(lab4, img)},
    }
    return ref


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: make_reference.py OUTPUT_FOLDER")
    outdir = Path(sys.argv[1])
    outdir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)

    files = []  # (file name, origin, [pages])
    for name, origin, img in sample_images() + synthetic_images(rng):
        files.append((f"{name}.tif", origin, [img]))
    files.append(("multipage16.tif", "synthetic 16-bit, 3 pages", multipage_images(rng)))

    entries = []
    for i, (fname, origin, pages) in enumerate(files):
        desc, kwargs, byteorder = ENCODINGS[i % len(ENCODINGS)]
        if len(pages) > 1:
            # Pages of one file may differ in encoding; vary them too.
            desc = "page 0 uncompressed, page 1 zlib+predictor, page 2 LZW tiles; big endian"
            byteorder = ">"
            with tifffile.TiffWriter(outdir / fname, byteorder=byteorder) as tw:
                tw.write(pages[0], photometric="minisblack", metadata=None)
                tw.write(pages[1], photometric="minisblack", metadata=None,
                         compression="zlib", predictor=True, rowsperstrip=32)
                tw.write(pages[2], photometric="minisblack", metadata=None,
                         compression="lzw", tile=(32, 32))
            with tifffile.TiffFile(outdir / fname) as tf:
                assert len(tf.pages) == 3
                for page, img in zip(tf.pages, pages):
                    assert np.array_equal(page.asarray(), img)
        else:
            write_tiff(outdir / fname, pages, kwargs, byteorder)
        # Reference values come from what tifffile reads back, not from memory.
        with tifffile.TiffFile(outdir / fname) as tf:
            # Native byte order, whatever the file's.
            pages = [page.asarray().astype(page.dtype.newbyteorder("=")) for page in tf.pages]
        for p, img in enumerate(pages):
            entry = {"file": fname, "page": p, "origin": origin, "encoding": desc}
            entry.update(references(img))
            entries.append(entry)

    doc = {
        "generator": "tests/reference/make_reference.py",
        "versions": {
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "scikit-image": skimage.__version__,
            "opencv": cv2.__version__,
            "tifffile": tifffile.__version__,
        },
        "images": entries,
    }
    with open(outdir / "references.json", "w") as f:
        # json writes floats with repr(): the shortest string that round-trips.
        json.dump(doc, f, indent=1)


if __name__ == "__main__":
    main()
