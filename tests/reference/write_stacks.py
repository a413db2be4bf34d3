"""Write three growing stacks page by page with tifffile, as an acquisition
that appends one page per time point: a classic TIFF and a BigTIFF grown with
`imwrite(..., append=True)` (the file reopened for each page), and an OME-TIFF
kept open by one TiffWriter (`ome=True`, one page per write, flushed after
each; its OME-XML is written when it closes).

Usage: python3 write_stacks.py ACQ_DIR COUNTS_JSON PAGES PAUSE_MS HOLD_AT

First writes COUNTS_JSON: for each stack file name, the number of separate
discs drawn on each page, checked here with skimage.measure.label (the outside
reference the test compares framewarden's counts with). Then writes the pages
round-robin, pausing PAUSE_MS between rounds; after HOLD_AT rounds it waits
until the file COUNTS_JSON + ".go" exists (so that a test can stop the service
while the stacks are surely half written).
"""
import json
import sys
import time
from pathlib import Path

import numpy as np
import tifffile
from skimage.draw import disk
from skimage.filters import threshold_otsu
from skimage.measure import label

acq = Path(sys.argv[1])
counts_path = Path(sys.argv[2])
pages = int(sys.argv[3])
pause = int(sys.argv[4]) / 1000.0
hold_at = int(sys.argv[5])
rng = np.random.default_rng(20261202)
names = ["classic.tif", "big.tif", "grow.ome.tif"]


def page(stack, t):
    """A 96 x 96 16-bit page with 2 to 8 discs on a grid, apart and off the border."""
    k = 2 + (3 * t + stack) % 7
    img = rng.normal(300, 20, (96, 96)).clip(0, 65535).astype(np.uint16)
    slots = [(12 + 24 * (i // 4), 12 + 24 * (i % 4)) for i in range(16)]
    for i in rng.permutation(16)[:k]:
        rr, cc = disk(slots[i], 6, shape=img.shape)
        img[rr, cc] = 3000 + rng.integers(0, 200)
    found = label(img > threshold_otsu(img)).max()
    assert found == k, (stack, t, found, k)
    return img, k


frames = {n: [] for n in names}
counts = {n: [] for n in names}
for s, n in enumerate(names):
    for t in range(pages):
        img, k = page(s, t)
        frames[n].append(img)
        counts[n].append(int(k))
counts_path.write_text(json.dumps(counts))

ome = tifffile.TiffWriter(acq / names[2], ome=True)
for t in range(pages):
    if t == hold_at:
        go = counts_path.with_name(counts_path.name + ".go")
        while not go.exists():
            time.sleep(0.02)
    tifffile.imwrite(acq / names[0], frames[names[0]][t], append=True)
    tifffile.imwrite(acq / names[1], frames[names[1]][t], append=True, bigtiff=True)
    ome.write(frames[names[2]][t][None], contiguous=False, metadata={"axes": "TYX"})
    ome._fh.flush()
    time.sleep(pause)
ome.close()
