#!/usr/bin/env python3
"""Outside references for splitting touching objects (tests/reference_split.rs).

Usage: python3 make_split_reference.py OUTPUT_FOLDER

Two steps, chosen by what the folder holds:

1. No OUTPUT_FOLDER/markers.json yet: writes OUTPUT_FOLDER/masks.json, binary
   masks (random, smoothed-noise blobs, clusters of overlapping discs and
   ellipses, objects cut by the frame's edge) with their exact squared
   Euclidean distance transform from scipy.ndimage.distance_transform_edt:
   the squared distance to the nearest background pixel returned by its
   `return_indices`, in integers, checked against round(distance ** 2).
   Pixels outside the array are not background in scipy.
2. With OUTPUT_FOLDER/markers.json (marker label images the Rust test wrote
   for each mask and connectivity): writes OUTPUT_FOLDER/watershed.json,
   skimage.segmentation.watershed(-distance, markers, mask=mask,
   connectivity=1 or 2) for each, with no watershed line and compactness 0.

Deterministic: a fixed numpy seed, no downloads.
"""

import json
import sys
from pathlib import Path

import numpy as np
import scipy
import scipy.ndimage as ndi
import skimage
from skimage.segmentation import watershed

SEED = 20250611


def versions():
    return {"numpy": np.__version__, "scipy": scipy.__version__, "skimage": skimage.__version__}


def discs(h, w, shapes):
    """Union of filled ellipses (cy, cx, a, b, angle); discs have a == b."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    m = np.zeros((h, w), bool)
    for cy, cx, a, b, ang in shapes:
        c, s = np.cos(ang), np.sin(ang)
        u = (xx - cx) * c + (yy - cy) * s
        v = -(xx - cx) * s + (yy - cy) * c
        m |= (u / a) ** 2 + (v / b) ** 2 <= 1.0
    return m


def masks():
    rng = np.random.default_rng(SEED)
    out = []
    # Random masks of several densities and shapes, thin ones included.
    for h, w, density in [
        (17, 23, 0.3),
        (17, 23, 0.5),
        (17, 23, 0.7),
        (23, 17, 0.9),
        (31, 29, 0.97),
        (64, 48, 0.8),
        (48, 64, 0.95),
        (1, 40, 0.9),
        (40, 1, 0.9),
        (2, 2, 0.5),
    ]:
        m = rng.random((h, w)) < density
        if m.all():
            m[h // 2, w // 2] = False
        out.append((f"random {h}x{w} p={density}", m))
    # Smoothed noise: blobby, touching objects of irregular shape.
    for h, w, sigma, q in [(128, 128, 3.0, 0.6), (96, 160, 5.0, 0.5), (150, 150, 4.0, 0.45)]:
        f = ndi.gaussian_filter(rng.standard_normal((h, w)), sigma)
        out.append((f"blobs {h}x{w} sigma={sigma}", f > np.quantile(f, q)))
    # Clusters of overlapping discs and ellipses: the case the split is for.
    for k, (h, w, n, rmin, rmax, elong) in enumerate(
        [(200, 200, 18, 6, 16, 1.0), (200, 240, 25, 5, 12, 1.6), (160, 160, 12, 8, 20, 2.0)]
    ):
        shapes = []
        for _ in range(n):
            r = rng.uniform(rmin, rmax)
            e = rng.uniform(1.0, elong)
            shapes.append(
                (rng.uniform(0, h), rng.uniform(0, w), r * e, r / np.sqrt(e), rng.uniform(0, np.pi))
            )
        out.append((f"clusters {k} {h}x{w}", discs(h, w, shapes)))
    # Pairs of discs overlapping by a quarter to three quarters of a radius,
    # some cut by the frame's edge (the outside is not background).
    shapes = []
    for i, (r, ov) in enumerate([(6, 0.25), (8, 0.5), (10, 0.5), (12, 0.75), (15, 0.3)]):
        d = 2 * r - ov * r
        cy = 20 + 45 * i
        shapes += [(cy, 30, r, r, 0), (cy, 30 + d, r, r, 0)]
    shapes += [(0, 120, 14, 14, 0), (0, 140, 12, 12, 0), (230, 0, 10, 10, 0), (230, 15, 10, 10, 0)]
    out.append(("pairs and edges 240x160", discs(240, 160, shapes)))
    return out


def exact_squared_edt(m):
    dist, (iy, ix) = ndi.distance_transform_edt(m, return_indices=True)
    yy, xx = np.mgrid[0 : m.shape[0], 0 : m.shape[1]]
    sq = (iy - yy).astype(np.int64) ** 2 + (ix - xx).astype(np.int64) ** 2
    # The distances themselves say the same (squared, rounded).
    assert np.array_equal(np.rint(dist**2).astype(np.int64), sq), "indices and distances disagree"
    return sq


def write_masks(out):
    cases = []
    for name, m in masks():
        h, w = m.shape
        cases.append(
            {
                "name": name,
                "width": w,
                "height": h,
                "mask": m.astype(np.uint8).ravel().tolist(),
                "edt_sq": exact_squared_edt(m).ravel().tolist(),
                "source": "scipy.ndimage.distance_transform_edt(mask, return_indices=True)",
            }
        )
    (out / "masks.json").write_text(json.dumps({"versions": versions(), "cases": cases}))


def write_watershed(out):
    masks_doc = json.loads((out / "masks.json").read_text())
    by_name = {c["name"]: c for c in masks_doc["cases"]}
    runs = json.loads((out / "markers.json").read_text())
    cases = []
    for run in runs["cases"]:
        c = by_name[run["name"]]
        shape = (c["height"], c["width"])
        m = np.array(c["mask"], bool).reshape(shape)
        markers = np.array(run["markers"], np.int32).reshape(shape)
        dist = ndi.distance_transform_edt(m)
        labels = watershed(
            -dist, markers, mask=m, connectivity=1 if run["connectivity"] == 4 else 2
        )
        cases.append(
            {
                "name": run["name"],
                "connectivity": run["connectivity"],
                "labels": labels.astype(np.int64).ravel().tolist(),
            }
        )
    doc = {
        "versions": versions(),
        "source": "skimage.segmentation.watershed(-scipy.ndimage.distance_transform_edt(mask), markers, mask=mask, connectivity=1|2)",
        "cases": cases,
    }
    (out / "watershed.json").write_text(json.dumps(doc))


def main():
    out = Path(sys.argv[1])
    out.mkdir(parents=True, exist_ok=True)
    if (out / "markers.json").exists():
        write_watershed(out)
    else:
        write_masks(out)


if __name__ == "__main__":
    main()
