"""Write complete TIFF files whose compressed data ends the file, with tifffile,
so that cutting their last bytes leaves a page that is not yet complete: what a
reader sees while a writer pauses before the end of its last strip or tile.

Usage: python3 make_short_streams.py OUT_DIR

Writes NAME.tif for LZW and Deflate, in strips and in tiles, and names.json.
Each file's directory comes before its pixel data (tifffile's layout), which the
script checks: the last strip or tile must end exactly at the end of the file.
"""
import json
import sys
from pathlib import Path

import numpy as np
import tifffile

out = Path(sys.argv[1])
out.mkdir(parents=True, exist_ok=True)
rng = np.random.default_rng(20261202)
pixels = rng.integers(0, 4096, (64, 80), dtype=np.uint16)
names = []
for compression in ("lzw", "zlib"):
    for tiled in (False, True):
        name = f"{compression}_{'tiles' if tiled else 'strips'}"
        path = out / f"{name}.tif"
        kwargs = dict(tile=(32, 32)) if tiled else dict(rowsperstrip=16)
        tifffile.imwrite(path, pixels, compression=compression, **kwargs)
        with tifffile.TiffFile(path) as tif:
            page = tif.pages[0]
            end = max(o + c for o, c in zip(page.dataoffsets, page.databytecounts))
        assert end == path.stat().st_size, f"{name}: data does not end the file"
        names.append(name)
(out / "names.json").write_text(json.dumps(names))
