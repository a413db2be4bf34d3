#!/usr/bin/env python3
"""Reference pipelines for the speed benchmark: the same per-frame work as
framewarden's analysis, written once on scikit-image/SciPy and once on OpenCV.

Per frame: decode the TIFF; Otsu threshold over the full integer histogram
(foreground = pixel > t); fill holes (background not 4-connected to the
border); label 8-connected objects; measure each object (area, centroid, bbox,
mean/max/integrated intensity, perimeter, circularity, major/minor axis and
eccentricity from second central moments); frame quality (median of
background pixels, saturation fraction, variance of the 4-neighbour Laplacian
over interior pixels, quadratic fit of 16 x 16 block means of the background
summarised as (max - min) / mean of the fitted surface).

"opencv_split" is the OpenCV pipeline with touching objects split between
hole filling and labelling: distanceTransform (L2, precise), markers, and
watershed restricted to the mask. OpenCV has no h-maxima, so its markers are
the cheaper plain local maxima of the distance (3 x 3 dilation, at least
SPLIT_MIN_DEPTH_PX deep from the background); its watershed floods an 8-bit
3-channel image and leaves one-pixel lines, which connectedComponentsWithStats
then sees as gaps. It is there for the time of the same steps, not for the
same pieces.

Everything runs on one thread. Usage:

    reference_pipelines.py [--reps N] [--json] FILE...

Prints per-pipeline median ms/frame (or one JSON object with --json) and each
frame's count, threshold and quality values, so the caller can check that all
pipelines did the same work.
"""

import os

# One thread everywhere, set before numpy/OpenCV load their thread pools.
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS"):
    os.environ[var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import cv2  # noqa: E402
import numpy as np  # noqa: E402
import tifffile  # noqa: E402
from scipy import ndimage as ndi  # noqa: E402
from skimage import filters, measure  # noqa: E402

cv2.setNumThreads(1)

GRID = 16


def fit_illumination(block_sum, block_n, block_px):
    """Quadratic least-squares fit of block background means; (max-min)/mean."""
    gy, gx = block_sum.shape
    v, u = np.meshgrid(np.linspace(-1, 1, gy), np.linspace(-1, 1, gx), indexing="ij")
    ok = (block_n > 0) & (block_n * 4 >= block_px)
    if ok.sum() < 3:
        return 0.0
    z = block_sum[ok] / block_n[ok]
    uu, vv = u[ok], v[ok]
    if ok.sum() >= 12:
        design = np.stack([np.ones_like(uu), uu, vv, uu * uu, vv * vv, uu * vv], axis=1)
    else:
        design = np.stack([np.ones_like(uu), uu, vv], axis=1)
    coef, *_ = np.linalg.lstsq(design, z, rcond=None)
    gv, gu = np.meshgrid(np.linspace(-1, 1, 64), np.linspace(-1, 1, 64), indexing="ij")
    terms = [np.ones_like(gu), gu, gv, gu * gu, gv * gv, gu * gv][: coef.size]
    surface = sum(c * t for c, t in zip(coef, terms))
    mean = surface.mean()
    return float((surface.max() - surface.min()) / mean) if mean > 0 else 0.0


# The focus measure (src/analysis/quality.rs): the variance of the Laplacian of
# the frame smoothed by BINOMIAL, less the noise's share (Immerkaer 1996:
# the variance behind NOISE_KERNEL / 36), per unit of the smoothed frame's
# energy above the background, less its noise share.
BINOMIAL = np.outer([1.0, 2.0, 1.0], [1.0, 2.0, 1.0]) / 16.0
NOISE_KERNEL = np.outer([1.0, -2.0, 1.0], [1.0, -2.0, 1.0])
LOG_ENERGY = 104.0 / 256.0
BINOMIAL_ENERGY = 36.0 / 256.0


def focus_ratio(lap_var, signal, noise):
    top = lap_var - noise * LOG_ENERGY
    bottom = signal - noise * BINOMIAL_ENERGY
    return top / bottom if top > 0 and bottom > 0 else 0.0


def frame_summary(count, t, background_level, saturation, focus, illumination):
    return {
        "object_count": int(count),
        "threshold": int(t),
        "background_level": float(background_level),
        "saturation_fraction": float(saturation),
        "focus": float(focus),
        "illumination_change": float(illumination),
    }


def block_edges(n):
    return np.array([i * n // GRID for i in range(GRID)])


# --------------------------------------------------------------------------
# scikit-image / SciPy


def skimage_pipeline(path):
    img = tifffile.imread(path)
    full = np.iinfo(img.dtype).max
    # Integer images: scikit-image's histogram is the full integer bincount.
    t = filters.threshold_otsu(img)
    mask = img > t
    filled = ndi.binary_fill_holes(mask)
    labels = measure.label(filled, connectivity=2)
    props = measure.regionprops_table(
        labels,
        intensity_image=img,
        properties=(
            "label",
            "area",
            "centroid",
            "bbox",
            "intensity_mean",
            "intensity_max",
            "perimeter",
            "axis_major_length",
            "axis_minor_length",
            "eccentricity",
        ),
    )
    area = props["area"]
    integrated = area * props["intensity_mean"]
    with np.errstate(divide="ignore", invalid="ignore"):
        circularity = 4 * math.pi * area / props["perimeter"] ** 2

    background = ~mask
    background_level = float(np.median(img[background]))
    saturation = np.count_nonzero(img == full) / img.size
    f = img.astype(np.float64)
    smooth = ndi.convolve(f, BINOMIAL)[1:-1, 1:-1]
    lap = ndi.laplace(smooth)[1:-1, 1:-1]
    noise = float(ndi.convolve(f, NOISE_KERNEL)[1:-1, 1:-1].var()) / 36.0
    focus = focus_ratio(float(lap.var()), float(np.mean((smooth - background_level) ** 2)), noise)
    h, w = img.shape
    ys, xs = block_edges(h), block_edges(w)
    bg_values = np.where(background, img, 0).astype(np.float64)
    block_sum = np.add.reduceat(np.add.reduceat(bg_values, ys, axis=0), xs, axis=1)
    block_n = np.add.reduceat(np.add.reduceat(background.astype(np.int64), ys, axis=0), xs, axis=1)
    illumination = fit_illumination(block_sum, block_n, h * w // (GRID * GRID))
    return frame_summary(len(area), t, background_level, saturation, focus, illumination)


# --------------------------------------------------------------------------
# OpenCV (with numpy where OpenCV has no 16-bit equivalent)


def otsu_full(hist):
    """Otsu's threshold over every integer level of `hist` (foreground > t)."""
    levels = np.arange(hist.size, dtype=np.float64)
    w0 = np.cumsum(hist)
    m0 = np.cumsum(hist * levels)
    total, mt = w0[-1], m0[-1]
    w1 = total - w0
    with np.errstate(divide="ignore", invalid="ignore"):
        between = (mt * w0 - total * m0) ** 2 / (w0 * w1)
    between[~((w0 > 0) & (w1 > 0))] = -1.0
    return int(np.argmax(between))


SPLIT_MIN_DEPTH_PX = 2.0


def opencv_split(filled):
    """Touching objects cut apart: distance, markers, watershed in the mask."""
    dist = cv2.distanceTransform(filled, cv2.DIST_L2, cv2.DIST_MASK_PRECISE)
    peaks = cv2.compare(dist, cv2.dilate(dist, np.ones((3, 3), np.uint8)), cv2.CMP_GE)
    peaks = cv2.bitwise_and(peaks, cv2.compare(dist, SPLIT_MIN_DEPTH_PX, cv2.CMP_GE))
    _, markers = cv2.connectedComponents(peaks, connectivity=8, ltype=cv2.CV_32S)
    # The background is one more marker, so flooding stays inside the mask.
    markers = markers + 1
    markers[filled == 0] = 1
    relief = cv2.normalize(dist, None, 0, 255, cv2.NORM_MINMAX).astype(np.uint8)
    relief = cv2.cvtColor(cv2.bitwise_not(relief), cv2.COLOR_GRAY2BGR)
    cv2.watershed(relief, markers)
    return cv2.compare(markers, 1.0, cv2.CMP_GT)


def opencv_pipeline(path, split=False):
    img = cv2.imread(path, cv2.IMREAD_UNCHANGED)
    full = np.iinfo(img.dtype).max
    levels = full + 1
    # cv2.THRESH_OTSU is 8-bit only: full-resolution histogram instead.
    hist = cv2.calcHist([img], [0], None, [levels], [0, levels]).ravel().astype(np.float64)
    t = otsu_full(hist)
    mask = cv2.compare(img, float(t), cv2.CMP_GT)

    # Holes: background not reached by a 4-connected flood from the border.
    h, w = img.shape
    outside = cv2.copyMakeBorder(cv2.bitwise_not(mask), 1, 1, 1, 1, cv2.BORDER_CONSTANT, value=255)
    cv2.floodFill(outside, None, (0, 0), 0, flags=4)
    filled = cv2.bitwise_or(mask, outside[1:-1, 1:-1])
    if split:
        filled = opencv_split(filled)

    n, labels, stats, centroids = cv2.connectedComponentsWithStats(filled, connectivity=8, ltype=cv2.CV_32S)
    contours, _ = cv2.findContours(filled, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    perimeter = np.zeros(n)
    for c in contours:
        x, y = c[0, 0]
        perimeter[labels[y, x]] = cv2.arcLength(c, True)
    objects = []
    for i in range(1, n):
        x, y, bw, bh, area = stats[i]
        roi = img[y : y + bh, x : x + bw]
        own_labels = labels[y : y + bh, x : x + bw]
        if bw * bh == 1:
            # OpenCV reads a 1 x 1 array beside a number as two scalars.
            own = np.where(own_labels == i, 255, 0).astype(np.uint8)
        else:
            own = cv2.compare(own_labels, float(i), cv2.CMP_EQ)
        mean = cv2.mean(roi, mask=own)[0]
        _, max_v, _, _ = cv2.minMaxLoc(roi, mask=own)
        mo = cv2.moments(own, binaryImage=True)
        cov_xx, cov_yy, cov_xy = mo["mu20"] / mo["m00"], mo["mu02"] / mo["m00"], mo["mu11"] / mo["m00"]
        root = math.sqrt(((cov_xx - cov_yy) / 2) ** 2 + cov_xy**2)
        l1 = (cov_xx + cov_yy) / 2 + root
        l2 = max((cov_xx + cov_yy) / 2 - root, 0.0)
        major, minor = 4 * math.sqrt(l1), 4 * math.sqrt(l2)
        ecc = math.sqrt(1 - l2 / l1) if l1 > 0 else 0.0
        p = perimeter[i]
        circ = 4 * math.pi * area / (p * p) if p > 0 else 0.0
        objects.append(
            (i, area, centroids[i], (x, y, x + bw, y + bh), mean, mean * area, max_v, p, circ, major, minor, ecc)
        )

    background = cv2.bitwise_not(mask)
    bg_hist = cv2.calcHist([img], [0], background, [levels], [0, levels]).ravel()
    cum = np.cumsum(bg_hist)
    background_level = float(np.searchsorted(cum, cum[-1] / 2)) if cum[-1] > 0 else 0.0
    saturation = hist[full] / img.size
    f = img.astype(np.float64)
    smooth = cv2.filter2D(f, cv2.CV_64F, BINOMIAL)[1:-1, 1:-1]
    lap = cv2.Laplacian(smooth, cv2.CV_64F, ksize=1)[1:-1, 1:-1]
    _, sd = cv2.meanStdDev(lap)
    _, noise_sd = cv2.meanStdDev(cv2.filter2D(f, cv2.CV_64F, NOISE_KERNEL)[1:-1, 1:-1])
    signal = cv2.mean(cv2.pow(smooth - background_level, 2))[0]
    focus = focus_ratio(float(sd[0, 0] ** 2), signal, float(noise_sd[0, 0] ** 2) / 36.0)
    bg_values = cv2.bitwise_and(img, img, mask=background)
    sum_int = cv2.integral(bg_values, sdepth=cv2.CV_64F)
    n_int = cv2.integral(background // 255, sdepth=cv2.CV_64F)
    ys = np.append(block_edges(h), h)
    xs = np.append(block_edges(w), w)

    def blocks(integ):
        c = integ[np.ix_(ys, xs)]
        return c[1:, 1:] - c[:-1, 1:] - c[1:, :-1] + c[:-1, :-1]

    illumination = fit_illumination(blocks(sum_int), blocks(n_int), h * w // (GRID * GRID))
    return frame_summary(len(objects), t, background_level, saturation, focus, illumination)


PIPELINES = {
    "skimage": skimage_pipeline,
    "opencv": opencv_pipeline,
    "opencv_split": lambda path: opencv_pipeline(path, split=True),
}


def run(files, reps):
    results = {}
    for name, fn in PIPELINES.items():
        fn(files[0])  # warm-up: imports, allocator, caches
        times_ms, frames = [], []
        for _ in range(reps):
            frames = []
            for f in files:
                t0 = time.perf_counter()
                summary = fn(f)
                times_ms.append((time.perf_counter() - t0) * 1e3)
                frames.append(summary)
        results[name] = {"ms_per_frame": statistics.median(times_ms), "min_ms": min(times_ms), "frames": frames}
    return results


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--reps", type=int, default=2)
    ap.add_argument("--json", action="store_true")
    ap.add_argument("files", nargs="+")
    args = ap.parse_args()
    results = run(args.files, args.reps)
    if args.json:
        json.dump(results, sys.stdout)
        print()
    else:
        for name, r in results.items():
            print(f"{name:8} {r['ms_per_frame']:9.1f} ms/frame")
            for f, summary in zip(args.files, r["frames"]):
                print(f"  {f}: {summary}")


if __name__ == "__main__":
    main()
