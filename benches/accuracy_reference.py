#!/usr/bin/env python3
"""The accuracy benchmark's Python side (see benches/README.md).

Usage:

  accuracy_reference.py run MANIFEST.json
      For every case of the manifest (an image, its truth label image and the
      label images of framewarden's pipelines, all TIFF), runs the reference
      pipelines on scikit-image + SciPy, writes their label images beside the
      others, and scores every pipeline against the truth with ONE
      implementation of the matching. Prints JSON on stdout.

Matching (as in the nucleus-segmentation literature, e.g. Caicedo et al. 2019,
Nature Methods 16:1247): a predicted and a true object match at threshold t
when their IoU >= t, each object matching at most one other. For t >= 0.5 the
pairing is unique: an object overlapping two others with IoU >= 0.5 each must
contain both exactly (IoU = 0.5 on the nose), and those two then have no other
candidate, so every maximal one-to-one assignment has the same size; greedy by
descending IoU is one. TP = matched pairs, FP = unmatched predictions, FN =
unmatched truths, F1 = 2TP / (2TP + FP + FN).

The reference pipelines:
  skimage-otsu+fill+size  Otsu (threshold_otsu; foreground is pixel > t, as
                          ours), binary_fill_holes, 8-connected label, objects
                          of fewer than min_area_px pixels dropped.
  skimage+split           the same mask, then the usual split: Euclidean
                          distance transform, peak_local_max(min_distance,
                          labels = the components) as markers, watershed of
                          the negated distance inside the mask.
"""

import json
import os
import sys

# IoU thresholds 0.50, 0.55, ..., 0.95 (as tests/accuracy_support THRESHOLDS).
THRESHOLDS = [0.5, 0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95]


def score(truth, pred):
    """TP at each threshold, and the object counts."""
    import numpy as np

    t = truth.astype(np.int64).ravel()
    p = pred.astype(np.int64).ravel()
    n_truth = int(np.count_nonzero(np.bincount(t)[1:]))
    n_pred = int(np.count_nonzero(np.bincount(p)[1:]))
    both = (t > 0) & (p > 0)
    keys, inter = np.unique(t[both] * (1 << 32) + p[both], return_counts=True)
    ti, pi = keys >> 32, keys & 0xFFFFFFFF
    area_t, area_p = np.bincount(t), np.bincount(p)
    iou = inter / (area_t[ti] + area_p[pi] - inter)
    # Descending IoU, ties by (truth, prediction) label.
    order = np.lexsort((pi, ti, -iou))
    tp = []
    for th in THRESHOLDS:
        used_t, used_p, n = set(), set(), 0
        for i in order:
            if iou[i] < th - 1e-12:
                break
            if ti[i] in used_t or pi[i] in used_p:
                continue
            used_t.add(ti[i])
            used_p.add(pi[i])
            n += 1
        tp.append(n)
    return {"truth": n_truth, "predicted": n_pred, "tp": tp}


def reference_labels(image, min_area_px, min_distance):
    import numpy as np
    from scipy import ndimage as ndi
    from skimage import feature, filters, measure, segmentation

    t = filters.threshold_otsu(image)
    mask = ndi.binary_fill_holes(image > t)
    comps = measure.label(mask, connectivity=2)
    areas = np.bincount(comps.ravel())
    small = areas < min_area_px
    small[0] = False
    mask &= ~small[comps]
    plain = measure.label(mask, connectivity=2)

    dist = ndi.distance_transform_edt(mask)
    peaks = feature.peak_local_max(dist, min_distance=min_distance, labels=plain,
                                   exclude_border=False)
    markers = np.zeros(mask.shape, dtype=np.int32)
    markers[tuple(peaks.T)] = np.arange(1, len(peaks) + 1)
    split = segmentation.watershed(-dist, markers, mask=mask)
    return {"skimage-otsu+fill+size": plain, "skimage+split": split}, int(t)


def run(manifest_path):
    import numpy as np
    import tifffile

    with open(manifest_path) as f:
        manifest = json.load(f)
    out = {"thresholds": THRESHOLDS, "cases": []}
    for case in manifest["cases"]:
        image = tifffile.imread(case["image"])
        truth = tifffile.imread(case["truth"])
        labels = {name: tifffile.imread(path) for name, path in case["ours"].items()}
        ref, level = reference_labels(image, manifest["min_area_px"], manifest["min_distance"])
        written = {}
        for name, lab in ref.items():
            if lab.max() > 65535:
                sys.exit(f"{case['name']}: {name} has more than 65535 objects")
            path = os.path.join(case["out_dir"], f"{name}.tif")
            tifffile.imwrite(path, lab.astype(np.uint16), photometric="minisblack")
            written[name] = path
            labels[name] = lab
        out["cases"].append({
            "name": case["name"],
            "otsu_level": level,
            "written": written,
            "scores": {name: score(truth, lab) for name, lab in labels.items()},
        })
    print(json.dumps(out))


def main():
    if len(sys.argv) == 3 and sys.argv[1] == "run":
        run(sys.argv[2])
    else:
        sys.exit(__doc__)


if __name__ == "__main__":
    main()
