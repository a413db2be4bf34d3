"""The report's outlines against the frame's label image.

Reads <out>/input.json ({"report": path, "label_images": {frame id: path}}),
finds every picture of the report of a frame given there, decodes its PNG with
Pillow, and compares the outline-coloured pixels with the object borders of
the label image (read with tifffile) at the picture's scale: labels[::f, ::f]
(f = data-shrink), borders by
skimage.segmentation.find_boundaries(connectivity=1, mode="inner").
Writes <out>/result.json: pictures checked (with each label's pixel count in
the full-size image, by numpy.unique), and each mismatch.
"""

import base64
import io
import json
import re
import sys
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image
from skimage.segmentation import find_boundaries

OUTLINE = (230, 159, 0)

out = Path(sys.argv[1])
spec = json.loads((out / "input.json").read_text())
html = Path(spec["report"]).read_text(encoding="utf-8")
checked, mismatches = [], []
for tag in re.findall(r"<img [^>]*>", html):
    attrs = dict(re.findall(r'([a-z-]+)="([^"]*)"', tag))
    frame_id = attrs.get("data-frame-id")
    if frame_id not in spec["label_images"]:
        continue
    f = int(attrs["data-shrink"])
    png = base64.b64decode(attrs["src"].split(",", 1)[1])
    rgb = np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))
    drawn = np.all(rgb == OUTLINE, axis=-1)
    full = tifffile.imread(spec["label_images"][frame_id])
    values, counts = np.unique(full[full > 0], return_counts=True)
    areas = {str(int(v)): int(n) for v, n in zip(values, counts)}
    labels = full[::f, ::f]
    expected = find_boundaries(labels, connectivity=1, mode="inner")
    if drawn.shape != expected.shape:
        mismatches.append(f"frame {frame_id}: picture {drawn.shape}, labels at scale {expected.shape}")
        continue
    off_border = np.argwhere(drawn & ~expected)
    missing = np.argwhere(expected & ~drawn)
    if len(off_border) or len(missing):
        mismatches.append(
            f"frame {frame_id}: {len(off_border)} outline pixels off the borders "
            f"(first {off_border[:3].tolist()}), {len(missing)} border pixels not drawn "
            f"(first {missing[:3].tolist()})"
        )
    checked.append(
        {"frame": frame_id, "shrink": f, "outline_px": int(drawn.sum()), "areas": areas}
    )
(out / "result.json").write_text(json.dumps({"checked": checked, "mismatches": mismatches}))
