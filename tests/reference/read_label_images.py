"""Reads the label images `framewarden watch` wrote, with tifffile, and
computes each label's pixel count and centroid with numpy.

Usage: read_label_images.py FOLDER

Reads every `*.tif` in every `*-labels` folder directly inside FOLDER and
writes FOLDER/label_images.json:

    {"<labels folder>/<file>": {"dtype": "uint16", "compression": 5,
                                "shape": [height, width],
                                "labels": {"<label>": [pixels, centroid_x, centroid_y]}}}

Label 0 (background) is left out. The centroid is the mean column (x) and
mean row (y) of the label's pixels, 0-based, as in `skimage.measure.regionprops`
(`centroid` is (row, column) there).
"""

import json
import pathlib
import sys

import numpy as np
import tifffile


def label_stats(image):
    flat = image.ravel().astype(np.int64)
    rows, cols = np.indices(image.shape)
    pixels = np.bincount(flat)
    sum_x = np.bincount(flat, weights=cols.ravel().astype(np.float64))
    sum_y = np.bincount(flat, weights=rows.ravel().astype(np.float64))
    return {
        str(label): [int(pixels[label]), sum_x[label] / pixels[label], sum_y[label] / pixels[label]]
        for label in np.nonzero(pixels)[0]
        if label != 0
    }


def main():
    folder = pathlib.Path(sys.argv[1])
    out = {}
    for labels_folder in sorted(folder.glob("*-labels")):
        for path in sorted(labels_folder.glob("*.tif")):
            with tifffile.TiffFile(path) as tif:
                page = tif.pages[0]
                image = page.asarray()
                out[f"{labels_folder.name}/{path.name}"] = {
                    "dtype": str(image.dtype),
                    "compression": int(page.compression),
                    "shape": list(image.shape),
                    "labels": label_stats(image),
                }
    (folder / "label_images.json").write_text(json.dumps(out))


if __name__ == "__main__":
    main()
