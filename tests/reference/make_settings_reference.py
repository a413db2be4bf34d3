#!/usr/bin/env python3
"""Outside references for the segmentation settings beyond the defaults.

Usage: python3 make_settings_reference.py OUTPUT_FOLDER

`make_reference.py` checks the thresholds and the default chain (fill on, 8 or
4 connected, no filters). This script covers the rest of `[segment]` and
`[measure]`: hole filling off, both connectivities on masks made to stress them
(holes that leak only diagonally, islands inside holes, diagonal-only contacts),
the area limits, removal of objects touching the border, multi-Otsu with a
chosen class boundary, and intensities measured on other pages inside the
segmented page's objects.

Each case is a TIFF file written with tifffile, a `[segment]`/`[measure]` TOML
fragment, and the objects SciPy and scikit-image find with those settings, in
framewarden's field names. tests/reference_settings.rs parses the fragment with
framewarden's own config parser, runs `analyze_frame`, and compares. The chain
on this side, named again in each case's `source`:

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
"""

import json
import sys
from pathlib import Path

import cv2
import numpy as np
import scipy.ndimage as ndi
import skimage.data
from skimage.filters import threshold_multiotsu
from skimage.measure import label, regionprops
from skimage.segmentation import clear_border, relabel_sequential

from make_reference import SEED, noisy, objects_of, paint, scene_masks, write_tiff

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


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: make_settings_reference.py OUTPUT_FOLDER")
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
    level, src = 107, "skimage.filters.threshold_otsu(coins) = 107"
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

    doc = {"generator": "tests/reference/make_settings_reference.py", "cases": cases}
    (out / "settings_references.json").write_text(json.dumps(doc, indent=1))


if __name__ == "__main__":
    main()
