"""Reference values for the corrections and frame-quality measures, computed
with SciPy and numpy on images written by tifffile.

Usage: python3 make_quality_reference.py OUT_DIR

Writes q_*.tif and quality_references.json with, per image:
- gaussian: scipy.ndimage.gaussian_filter(float64 image, sigma, mode="reflect",
  truncate=4.0), rounded and clipped to the bit depth (raw little-endian uint16
  in q_NAME.gauss.bin);
- focus: with B = scipy.ndimage.convolve(float64 image, k_B)[1:-1, 1:-1],
  k_B = [1 2 1]^T [1 2 1] / 16; L = scipy.ndimage.laplace(B)[1:-1, 1:-1];
  v = numpy.var(convolve(image, [1 -2 1]^T [1 -2 1])[1:-1, 1:-1]) / 36
  (Immerkaer 1996); k_L = laplace of k_B padded by one; b = background_level:
  (numpy.var(L) - v sum(k_L^2)) / (numpy.mean((B - b)^2) - v sum(k_B^2)), 0
  unless both are positive (the documented definition);
- background_level: numpy.median(image[image <= t]) at the given threshold;
- saturation_fraction: numpy.mean(image == top of the bit depth);
- bimodality: Sarle's coefficient (G1^2 + 1) / (G2 + 3 (n-1)^2 / ((n-2)(n-3)))
  with G1 = scipy.stats.skew(bias=False), G2 = scipy.stats.kurtosis(bias=False);
- illumination_change: the documented definition (16 x 16 block means of the
  background, blocks at least a quarter background, quadratic surface
  z = a + b u + c v + d u^2 + e v^2 + f u v by numpy.linalg.lstsq, evaluated on
  a 33 x 33 grid over [-1, 1]^2, (max - min) / mean);
- flat_field: (raw - dark) / (flat - dark) * mean(flat - dark) in float64,
  rounded and clipped (q_NAME.flat.bin), for the cases that carry flat frames;
- rolling-ball background (Sternberg 1983: the grey opening by a ball whose
  height equals its radius): scipy.ndimage.grey_erosion then grey_dilation of
  the float64 image with footprint = the disc d^2 <= r^2 and structure = the
  ball's height sqrt(r^2 - d^2) over it, offsets beyond the frame ignored
  (mode "constant" with cval +inf for the erosion, -inf for the dilation),
  rounded (q_NAME.rball.bin, radius `ball_radius`).
"""
import json
import sys
from pathlib import Path

import numpy as np
import tifffile
from scipy import ndimage as ndi
from scipy import stats
from skimage import data
from skimage.filters import threshold_otsu

out = Path(sys.argv[1])
out.mkdir(parents=True, exist_ok=True)
rng = np.random.default_rng(7)
GRID = 16


def illumination(img, t):
    h, w = img.shape
    gx, gy = min(GRID, w), min(GRID, h)
    by = (np.arange(h) * gy) // h
    bx = (np.arange(w) * gx) // w
    bg = img <= t
    sums = np.zeros((gy, gx))
    counts = np.zeros((gy, gx))
    np.add.at(sums, (by[:, None].repeat(w, 1)[bg], bx[None, :].repeat(h, 0)[bg]), img[bg].astype(np.float64))
    np.add.at(counts, (by[:, None].repeat(w, 1)[bg], bx[None, :].repeat(h, 0)[bg]), 1)
    block_px = (w * h) // (gx * gy)
    coord = lambda i, g: 2.0 * i / (g - 1) - 1.0 if g > 1 else 0.0
    pts = [(coord(i % gx, gx), coord(i // gx, gy), sums.flat[i] / counts.flat[i])
           for i in range(gx * gy) if counts.flat[i] > 0 and counts.flat[i] * 4 >= block_px]
    if len(pts) < 3:
        return 0.0
    terms = 3 if len(pts) < 12 else 6
    basis = lambda u, v: np.array([1.0, u, v, u * u, v * v, u * v])[:terms]
    A = np.array([basis(u, v) for u, v, _ in pts])
    z = np.array([p[2] for p in pts])
    coef, *_ = np.linalg.lstsq(A, z, rcond=None)
    grid = [basis(coord(i, 33), coord(j, 33)) @ coef for i in range(33) for j in range(33)]
    mean = float(np.mean(grid))
    return 0.0 if mean < 1.0 else float((max(grid) - min(grid)) / mean)


def bimodality(img):
    # Sarle's coefficient with scipy's bias-corrected sample skewness and excess kurtosis.
    x = img.astype(np.float64).ravel()
    n = x.size
    g = stats.skew(x, bias=False)
    k = stats.kurtosis(x, fisher=True, bias=False)
    return float((g * g + 1.0) / (k + 3.0 * (n - 1) ** 2 / ((n - 2) * (n - 3))))


def scene16(h, w, gradient):
    yy, xx = np.mgrid[:h, :w]
    img = 2000.0 * (1.0 + gradient * (xx / w - 0.5)) + rng.normal(0, 60, (h, w))
    for _ in range(25):
        cy, cx, r = rng.integers(10, h - 10), rng.integers(10, w - 10), rng.integers(3, 8)
        img[(yy - cy) ** 2 + (xx - cx) ** 2 < r * r] += 9000
    img[5, 5] = 65535  # one saturated pixel
    return np.clip(img, 0, 65535).astype(np.uint16)


def rolling_ball_background(img, r):
    reach = int(np.floor(r))
    dy, dx = np.mgrid[-reach:reach + 1, -reach:reach + 1]
    d2 = (dx * dx + dy * dy).astype(np.float64)
    disc = d2 <= r * r
    height = np.where(disc, np.sqrt(np.maximum(r * r - d2, 0.0)), 0.0)
    f = img.astype(np.float64)
    eroded = ndi.grey_erosion(f, footprint=disc, structure=height, mode="constant", cval=np.inf)
    opened = ndi.grey_dilation(eroded, footprint=disc, structure=height, mode="constant", cval=-np.inf)
    return np.round(opened)


def focus(img, t):
    f = img.astype(np.float64)
    binomial = np.outer([1.0, 2.0, 1.0], [1.0, 2.0, 1.0]) / 16.0
    immerkaer = np.outer([1.0, -2.0, 1.0], [1.0, -2.0, 1.0])
    b = ndi.convolve(f, binomial)[1:-1, 1:-1]
    lap = ndi.laplace(b)[1:-1, 1:-1]
    v = float(np.var(ndi.convolve(f, immerkaer)[1:-1, 1:-1])) / 36.0
    log_kernel = ndi.laplace(np.pad(binomial, 1))
    background = float(np.median(img[img <= t]))
    top = float(np.var(lap)) - v * float(np.sum(log_kernel**2))
    bottom = float(np.mean((b - background) ** 2)) - v * float(np.sum(binomial**2))
    return top / bottom if top > 0 and bottom > 0 else 0.0


cases = []
# name: (image, bit depth, Gaussian sigma, rolling-ball radius)
images = {
    "camera8": (data.camera(), 8, 1.5, 6.0),
    "coins8": (data.coins(), 8, 0.8, 10.0),
    "plate16": (scene16(180, 240, 0.4), 16, 2.0, 30.0),
    "flat16": (scene16(96, 128, 0.0), 16, 1.0, 8.5),
}
for name, (img, bits, sigma, ball_radius) in images.items():
    tifffile.imwrite(out / f"q_{name}.tif", img)
    top = 255 if bits == 8 else 65535
    f = img.astype(np.float64)
    g = np.clip(np.round(ndi.gaussian_filter(f, sigma, mode="reflect", truncate=4.0)), 0, top)
    (out / f"q_{name}.gauss.bin").write_bytes(g.astype("<u2").tobytes())
    (out / f"q_{name}.rball.bin").write_bytes(rolling_ball_background(img, ball_radius).astype("<u2").tobytes())
    t = int(threshold_otsu(img))
    case = dict(
        name=name, file=f"q_{name}.tif", sigma=sigma, ball_radius=ball_radius, threshold=t,
        focus=focus(img, t),
        background_level=float(np.median(img[img <= t])),
        saturation_fraction=float(np.mean(img == top)),
        illumination_change=illumination(img, t),
        bimodality=bimodality(img),
        flat=None,
    )
    if bits == 16:
        h, w = img.shape
        yy, xx = np.mgrid[:h, :w]
        flat = (20000 * (1.0 - 0.3 * ((xx / w - 0.5) ** 2 + (yy / h - 0.5) ** 2))).astype(np.uint16)
        dark = np.full((h, w), 100, dtype=np.uint16)
        dark[::7, ::5] = 130
        tifffile.imwrite(out / f"q_{name}.flatframe.tif", flat)
        tifffile.imwrite(out / f"q_{name}.darkframe.tif", dark)
        d = flat.astype(np.float64) - dark
        corrected = (img.astype(np.float64) - dark) / d * d.mean()
        corrected = np.clip(np.round(corrected), 0, top)
        (out / f"q_{name}.flat.bin").write_bytes(corrected.astype("<u2").tobytes())
        case["flat"] = dict(flat=f"q_{name}.flatframe.tif", dark=f"q_{name}.darkframe.tif")
    cases.append(case)

(out / "quality_references.json").write_text(json.dumps(cases, indent=1))
print(f"wrote {len(cases)} quality cases")
