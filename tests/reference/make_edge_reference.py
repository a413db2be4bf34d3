#!/usr/bin/env python3
"""Outside references for the cases beyond the main reference set.

Usage: python3 make_edge_reference.py OUTPUT_FOLDER

`make_reference.py` checks the thresholds and the default chain (fill on, 8 or
4 connected, no filters). This script adds two things, written as TIFF files
(tifffile) and one JSON document, `edge_references.json`, that
tests/reference_edges.rs checks framewarden against.

1. Settings cases: the rest of `[segment]` and `[measure]`. Hole filling off,
   both connectivities on masks made to stress them (holes that leak only
   diagonally, islands inside holes, diagonal-only contacts), the area limits,
   removal of objects touching the border, multi-Otsu with a chosen class
   boundary, and intensities measured on another page inside the segmented
   page's objects. Each case carries a TOML fragment for framewarden's own
   config parser and the objects SciPy and scikit-image find, in framewarden's
   field names. The chain on this side, named again in each case's `source`:

  pixel > level                       (framewarden's threshold convention)
  scipy.ndimage.binary_fill_holes     (structure = background connectivity:
                                       4-connected cross for 8-connected objects,
                                       3x3 square for 4-connected objects)
  skimage.measure.label               (connectivity 2 = 8, 1 = 4; asserted to
                                       agree with scipy.ndimage.label's count
                                       and with the areas, boxes and centroids
                                       of cv2.connectedComponentsWithStats)
  skimage.segmentation.clear_border   (objects touching the frame edge)
  area limits                         (numpy.bincount of the labels;
                                       keep min <= area <= max, max 0 = none)
  skimage.segmentation.relabel_sequential (1.. in raster order of first pixel)
  skimage.measure.regionprops         (via make_reference.objects_of;
                                       circularity = 4*pi*area/perimeter^2)

2. Histogram cases: 16-bit images whose histograms are wide and dense (a
   picture spread over all 65,536 levels) or wide and sparse (a few hundred or
   a handful of occupied levels far apart). For each, the thresholds as
   partitions (every level from the highest occupied level at or below a
   threshold up to the next occupied level splits the pixels the same way):
   - Otsu: the exact optimum of Otsu's criterion (Otsu 1979), found with
     Python integers over every occupied level, ties to the lowest level;
     skimage.filters.threshold_otsu beside it. skimage keeps its histogram in
     float32, and on dense 16-bit pictures that can move its answer off the
     optimum by a near-tie; the exact value is the reference, skimage's answer
     and the size of its shortfall are recorded with it.
   - triangle: skimage.filters.threshold_triangle; Li: skimage.filters
     .threshold_li (both on the full integer histogram).
   - multi-Otsu, three classes: make_reference.multi_otsu_3_exhaustive (numpy,
     every pair of occupied levels), and skimage.filters.threshold_multiotsu
     where its table fits.
"""

import json
import sys
from fractions import Fraction
from pathlib import Path

import cv2
import numpy as np
import scipy.ndimage as ndi
import skimage.data
from skimage.filters import threshold_li, threshold_multiotsu, threshold_otsu, threshold_triangle
from skimage.measure import label, regionprops
from skimage.segmentation import clear_border, relabel_sequential

from make_reference import (
    MULTI_OTSU_MAX_RANGE,
    SEED,
    multi_otsu_3_exhaustive,
    noisy,
    objects_of,
    paint,
    scene_masks,
    write_tiff,
)

SQUARE = np.ones((3, 3), bool)  # 8-connectivity
CROSS = ndi.generate_binary_structure(2, 1)  # 4-connectivity

SOURCE = (
    "pixel > level; scipy.ndimage.binary_fill_holes(structure=background connectivity); "
    "skimage.measure.label (== scipy.ndimage.label count, == cv2.connectedComponentsWithStats stats); "
    "skimage.segmentation.clear_border; "
    "area limits by numpy.bincount; skimage.segmentation.relabel_sequential; "
    "skimage.measure.regionprops"
)


# --------------------------------------------------------------------------
# Images
# --------------------------------------------------------------------------


def hole_tile():
    """A 16x16 tile of hand-drawn cases for hole filling and connectivity."""
    t = np.zeros((16, 16), bool)
    t[2:9, 2:9] = True  # square with a one-pixel hole
    t[5, 5] = False
    t[2:7, 11:15] = True  # ring whose hole leaks out diagonally only:
    t[3:6, 12:14] = False  # a hole for 8-connected objects (4-connected
    t[6, 13] = False  # background), not one for 4-connected objects
    t[7, 14] = True
    t[10, 2] = t[11, 3] = t[12, 4] = True  # diagonal line: 1 object at 8, 3 at 4
    t[10:15, 8:15] = True  # ring with an island inside its hole
    t[11:14, 9:14] = False
    t[12, 11] = True
    return t


def stress_images(rng):
    """8-bit images whose foreground at level 100 is known exactly."""
    out = []
    grid = np.pad(np.tile(hole_tile(), (6, 7)), 1)
    grid[0, 5:20] = True  # an object on the top edge
    grid[40:60, -1] = True  # and one on the right edge
    tex = rng.integers(0, 100, grid.shape)
    out.append(("holes_grid8", np.where(grid, 150 + tex, 10 + tex // 4).astype(np.uint8)))

    # A smoothed-noise maze: many holes, diagonal contacts and border objects.
    noise = ndi.gaussian_filter(rng.random((160, 200)), 1.2)
    maze = noise > np.quantile(noise, 0.55)
    tex = rng.integers(0, 60, maze.shape)
    out.append(("maze8", np.where(maze, 150 + tex, 20 + tex // 2).astype(np.uint8)))
    return out


def two_page_scene(rng):
    """16-bit scene on page 0 and a second channel on page 1 whose objects are
    partly the same and partly different, so inside-object intensities vary."""
    h, w = 192, 224
    masks = scene_masks(h, w)
    seg = noisy(rng, (h, w), 1500, 120, 0, 65535, np.uint16)
    other = noisy(rng, (h, w), 800, 300, 0, 65535, np.uint16)
    for i, mk in enumerate(masks):
        paint(rng, seg, mk, 24000 + 3000 * (i % 4), 900, 0, 65535)
        if i % 3:
            paint(rng, other, mk, 9000 + 2500 * (i % 5), 2000, 0, 65535)
    other[0:8, :] = 65535  # saturated rows on the second channel only
    return seg, other


# --------------------------------------------------------------------------
# The reference chain
# --------------------------------------------------------------------------


def segment(img, level, fill_holes, connectivity, min_area, max_area, exclude_border):
    mask = img > level
    if fill_holes:
        mask = ndi.binary_fill_holes(mask, structure=CROSS if connectivity == 8 else SQUARE)
    labels = label(mask, connectivity=2 if connectivity == 8 else 1)
    _, n_scipy = ndi.label(mask, structure=SQUARE if connectivity == 8 else CROSS)
    assert n_scipy == labels.max(), "scipy.ndimage.label and skimage.measure.label disagree"
    assert_opencv_agrees(mask, labels, connectivity)
    if exclude_border:
        labels = clear_border(labels)
    areas = np.bincount(labels.ravel())
    drop = areas < min_area
    if max_area:
        drop |= areas > max_area
    drop[0] = False
    labels[drop[labels]] = 0
    labels, _, _ = relabel_sequential(labels)
    return labels


def assert_opencv_agrees(mask, labels, connectivity):
    """cv2.connectedComponentsWithStats must find the same objects (area,
    bounding box, centroid) as skimage.measure.label + regionprops, so three
    libraries stand behind each labelling. OpenCV may number them in another
    order, so both sides are compared sorted."""
    n, _, stats, centroids = cv2.connectedComponentsWithStats(
        mask.astype(np.uint8), connectivity=connectivity, ltype=cv2.CV_32S
    )
    ours = sorted(
        (int(r.bbox[1]), int(r.bbox[0]), int(r.bbox[3] - r.bbox[1]), int(r.bbox[2] - r.bbox[0]), int(r.area),
         float(r.centroid[1]), float(r.centroid[0]))
        for r in regionprops(labels)
    )
    theirs = sorted(tuple(int(v) for v in stats[i]) + tuple(float(c) for c in centroids[i]) for i in range(1, n))
    assert len(ours) == len(theirs), "cv2.connectedComponentsWithStats count differs"
    for a, b in zip(ours, theirs):
        assert a[:5] == b[:5] and np.allclose(a[5:], b[5:], rtol=0, atol=1e-9), (a, b)


def raster_ordered(labels):
    ids, first = np.unique(labels.ravel(), return_index=True)
    keep = ids > 0
    return bool(np.array_equal(ids[keep][np.argsort(first[keep])], np.arange(1, keep.sum() + 1)))


def engine_names(obj):
    """make_reference.objects_of (skimage names) -> framewarden's field names."""
    r0, c0, r1, c1 = obj["bbox"]
    named = {
        "label": obj["label"],
        "area_px": obj["area"],
        "centroid_x": obj["centroid_col"],
        "centroid_y": obj["centroid_row"],
        "bbox": [c0, r0, c1, r1],
        "mean_intensity": obj["intensity_mean"],
        "integrated_intensity": obj["intensity_sum"],
        "max_intensity": obj["intensity_max"],
        "perimeter_px": obj["perimeter"],
        "major_axis_px": obj["major_axis_length"],
        "minor_axis_px": obj["minor_axis_length"],
        "eccentricity": obj["eccentricity"],
    }
    if obj["perimeter"] > 0:
        # The issue's definition 4*pi*A/P^2 on regionprops' area and perimeter;
        # left out where the perimeter is 0 (a single pixel) and it has no value.
        named["circularity"] = 4.0 * np.pi * obj["area"] / obj["perimeter"] ** 2
    return named


def toml_fragment(method, fill_holes, connectivity, min_area, max_area, exclude_border, measure_pages):
    lines = ["[segment]", "page = 0"]
    lines += [f"{k} = {json.dumps(v)}" for k, v in method.items()]
    lines += [
        f"fill_holes = {str(fill_holes).lower()}",
        f"connectivity = {connectivity}",
        f"min_area_px = {min_area}",
        f"max_area_px = {max_area}",
        f"exclude_border = {str(exclude_border).lower()}",
    ]
    if measure_pages:
        lines += ["[measure]", f"pages = {json.dumps([p for p, _ in measure_pages])}"]
    return "\n".join(lines) + "\n"


def case(file, pages, level, *, method=None, level_source=None, fill_holes=True, connectivity=8,
         min_area=0, max_area=0, exclude_border=False, measure_pages=()):
    """One settings case. `measure_pages` is a list of (page number, image)."""
    img = pages[0]
    method = method or {"method": "fixed", "fixed_level": int(level)}
    labels = segment(img, level, fill_holes, connectivity, min_area, max_area, exclude_border)
    assert raster_ordered(labels), "relabel_sequential did not keep raster order"
    objects = [engine_names(o) for o in objects_of(labels, img)]
    for page, other in measure_pages:
        for obj, o in zip(objects, objects_of(labels, other)):
            obj.setdefault("channels", []).append(
                {
                    "page": page,
                    "mean_intensity": o["intensity_mean"],
                    "integrated_intensity": o["intensity_sum"],
                    "max_intensity": o["intensity_max"],
                }
            )
    return {
        "file": file,
        "config": toml_fragment(method, fill_holes, connectivity, min_area, max_area, exclude_border, measure_pages),
        "threshold": int(level),
        "threshold_source": level_source or "fixed level",
        "object_count": len(objects),
        "foreground_px": int((labels > 0).sum()),
        "objects": objects,
        "source": SOURCE,
    }


# --------------------------------------------------------------------------
# Wide 16-bit histograms
# --------------------------------------------------------------------------


def wide16_images(rng):
    out = []
    # Dense: a real picture spread over the whole 16-bit range, plus dither.
    # With this dither (its own seed, kept fixed) skimage's float32 histogram
    # puts its Otsu level a few levels below the exact optimum (the shortfall
    # is recorded in the case).
    cam = skimage.data.camera().astype(np.uint32)
    dither = np.random.default_rng(6).integers(0, 257, cam.shape)
    out.append(("camera16_dense", (cam * 257 + dither).astype(np.uint16)))
    # Dense synthetic scene, objects at 20,000..50,000 on a noisy background.
    h, w = 200, 240
    img = noisy(rng, (h, w), 2000, 900, 0, 65535, np.uint16)
    for i, mk in enumerate(scene_masks(h, w)):
        paint(rng, img, mk, 20000 + 2500 * (i % 12), 900, 0, 65535)
    out.append(("scene16_wide", img))
    # Sparse: coins through a non-linear table onto 256 unevenly spread levels.
    lut = np.rint(65535 * (np.arange(256) / 255.0) ** 1.7).astype(np.uint16)
    out.append(("coins16_sparse_lut", lut[skimage.data.coins()]))
    # Very sparse: six levels, two pairs of neighbours, one saturated.
    levels = np.array([120, 121, 5000, 23000, 23007, 65535], np.uint16)
    idx = rng.choice(levels.size, size=(64, 96), p=[0.35, 0.15, 0.1, 0.2, 0.1, 0.1])
    out.append(("few_levels16", levels[ndi.median_filter(idx, 3)]))
    # Two narrow clusters 39,000 levels apart: Otsu's criterion is flat across
    # the gap, so the lowest level of the plateau is the answer.
    gap = np.where(rng.random((100, 120)) < 0.3, 40000, 900).astype(np.uint16)
    out.append(("gap16_two_clusters", gap + rng.integers(0, 30, gap.shape).astype(np.uint16)))
    # Small bright objects on a dim background (< 2 % foreground).
    h, w = 256, 256
    img = noisy(rng, (h, w), 500, 40, 0, 65535, np.uint16)
    yy, xx = np.mgrid[0:h, 0:w]
    for _ in range(8):
        cy, cx, r = rng.uniform(10, h - 10), rng.uniform(10, w - 10), rng.uniform(2, 5)
        paint(rng, img, (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r, 40000, 3000, 0, 65535)
    out.append(("small16_objects", img))
    return out


def partition(values, t):
    """[highest occupied level <= t, next occupied level) or null above."""
    below = values[values <= t]
    above = values[values > t]
    return [int(below[-1]) if below.size else None, int(above[0]) if above.size else None]


def otsu_exact(img):
    """The occupied level t maximising Otsu's criterion exactly, its eta, and
    the exact eta at any level (a function). With n0, n1 pixels and sums S0, S1
    below/above t, sigma_B^2 is proportional to (n1*S0 - n0*S1)^2 / (n0*n1);
    eta divides by N*Q - S^2 (Q = sum of squares). Candidates are screened in
    float64 and decided with Python integers (fractions.Fraction)."""
    values, counts = np.unique(img, return_counts=True)
    v = values.astype(np.float64)
    c = counts.astype(np.float64)
    n0 = np.cumsum(c)[:-1]
    s0 = np.cumsum(c * v)[:-1]
    n, s = c.sum(), (c * v).sum()
    approx = (n * s0 - n0 * s) ** 2 / (n0 * (n - n0))
    candidates = np.flatnonzero(approx >= approx.max() * (1 - 1e-9))

    cs = [int(x) for x in counts]
    vs = [int(x) for x in values]
    big_n = sum(cs)
    big_s = sum(ci * vi for ci, vi in zip(cs, vs))
    big_q = sum(ci * vi * vi for ci, vi in zip(cs, vs))

    def eta(t):
        n_lo = sum(ci for ci, vi in zip(cs, vs) if vi <= t)
        s_lo = sum(ci * vi for ci, vi in zip(cs, vs) if vi <= t)
        n_hi, s_hi = big_n - n_lo, big_s - s_lo
        if n_lo == 0 or n_hi == 0 or big_n * big_q == big_s * big_s:
            return Fraction(0)
        return Fraction((n_hi * s_lo - n_lo * s_hi) ** 2, n_lo * n_hi * (big_n * big_q - big_s * big_s))

    best = max(candidates, key=lambda i: (eta(vs[i]), -i))  # ties: lowest level
    return vs[best], eta


def histogram_case(file, img):
    values = np.unique(img)
    best, eta = otsu_exact(img)
    t_sk = int(threshold_otsu(img))
    shortfall = float(1 - eta(t_sk) / eta(best)) if eta(best) else 0.0
    # skimage may miss the optimum only by float32 rounding, never by more.
    assert shortfall < 1e-6, (file, t_sk, best, shortfall)
    case = {
        "file": file,
        "distinct_levels": int(values.size),
        "otsu": {
            "partition": partition(values, best),
            "separability": float(eta(best)),
            "source": "Otsu 1979 criterion, exact (Python integers) over every occupied level",
            "skimage_threshold_otsu": t_sk,
            "skimage_same_partition": partition(values, t_sk) == partition(values, best),
            "skimage_relative_shortfall": shortfall,
        },
        "triangle": {
            "partition": partition(values, threshold_triangle(img)),
            "source": "skimage.filters.threshold_triangle",
        },
        "li": {
            "partition": partition(values, threshold_li(img)),
            "value": float(threshold_li(img)),
            "source": "skimage.filters.threshold_li",
        },
    }
    pairs = multi_otsu_3_exhaustive(img)
    if pairs is not None:
        case["multi_otsu_3"] = {
            "partitions": [[partition(values, t) for t in pair] for pair in pairs],
            "source": "make_reference.multi_otsu_3_exhaustive (numpy, every pair of occupied levels)",
        }
        if int(img.max()) - int(img.min()) + 1 <= MULTI_OTSU_MAX_RANGE:
            sk = [int(t) for t in threshold_multiotsu(img, classes=3)]
            assert [partition(values, t) for t in sk] in case["multi_otsu_3"]["partitions"], (file, sk, pairs)
            case["multi_otsu_3"]["source"] += "; agrees with skimage.filters.threshold_multiotsu"
    return case


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: make_edge_reference.py OUTPUT_FOLDER")
    out = Path(sys.argv[1])
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED + 1)
    cases = []

    def write(name, pages):
        write_tiff(out / name, pages, {}, "<")
        return name

    # Hole filling and connectivity, every combination, on the stress images.
    for name, img in stress_images(rng):
        file = write(f"{name}.tif", [img])
        for fill in (True, False):
            for conn in (8, 4):
                cases.append(case(file, [img], 100, fill_holes=fill, connectivity=conn))
        cases.append(case(file, [img], 100, exclude_border=True, min_area=4, max_area=60))

    # Area limits and border removal on a real picture at Otsu's level.
    coins = skimage.data.coins()
    file = write("coins.tif", [coins])
    level = int(threshold_otsu(coins))
    src = f"skimage.filters.threshold_otsu(coins) = {level}"
    cases.append(case(file, [coins], level, level_source=src, exclude_border=True))
    cases.append(case(file, [coins], level, level_source=src, min_area=20, max_area=2000))
    cases.append(case(file, [coins], level, level_source=src, fill_holes=False, connectivity=4,
                      min_area=3, exclude_border=True))

    # Multi-Otsu with a chosen class boundary: skimage's thresholds, then the chain.
    camera = skimage.data.camera()
    file = write("camera.tif", [camera])
    for classes, boundary in ((3, 2), (4, 1), (4, 3)):
        t = threshold_multiotsu(camera, classes=classes)[boundary - 1]
        cases.append(case(
            file, [camera], t,
            method={"method": "multi-otsu", "classes": classes, "boundary": boundary},
            level_source=f"skimage.filters.threshold_multiotsu(camera, classes={classes})[{boundary - 1}]",
            min_area=10,
        ))

    # Intensities on another page inside the segmented page's objects.
    seg, other = two_page_scene(rng)
    file = write("two_pages16.tif", [seg, other])
    cases.append(case(file, [seg, other], 12000, measure_pages=[(1, other)]))
    cases.append(case(file, [seg, other], 12000, connectivity=4, fill_holes=False, exclude_border=True,
                      measure_pages=[(1, other)]))

    histogram_cases = []
    for name, img in wide16_images(rng):
        histogram_cases.append(histogram_case(write(f"{name}.tif", [img]), img))

    doc = {
        "generator": "tests/reference/make_edge_reference.py",
        "settings_cases": cases,
        "histogram_cases": histogram_cases,
    }
    (out / "edge_references.json").write_text(json.dumps(doc, indent=1))


if __name__ == "__main__":
    main()
