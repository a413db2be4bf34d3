"""Write image files in the formats framewarden must read, with outside libraries
(tifffile for TIFF, Pillow for PNG), plus the expected pixels and pixel sizes.

Usage: python3 make_format_cases.py OUT_DIR

For each case NAME it writes NAME.tif/.png, NAME.expected.bin (the page the
decoder should return, as little-endian uint16 after framewarden's documented
conversion) and one line in cases.json with the shape, bit depth and the pixel
size the file declares (with its source), or null.
"""
import json
import sys
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image

out = Path(sys.argv[1])
out.mkdir(parents=True, exist_ok=True)
rng = np.random.default_rng(20261201)
cases = []


def expect(name, pixels_u16, bit_depth, pixel_size=None, source=None, page=0):
    (out / f"{name}.expected.bin").write_bytes(pixels_u16.astype("<u2").tobytes())
    h, w = pixels_u16.shape
    cases.append(dict(name=name, file=next(p.name for p in out.iterdir() if p.stem == name and p.suffix in (".tif", ".png")),
                      width=w, height=h, bit_depth=bit_depth, page=page,
                      pixel_size_um=pixel_size, pixel_size_source=source))


u16 = rng.integers(0, 65536, (37, 53), dtype=np.uint16)
u8 = rng.integers(0, 256, (29, 41), dtype=np.uint8)

# BigTIFF (tifffile bigtiff=True), deflate-compressed.
tifffile.imwrite(out / "bigtiff16.tif", u16, bigtiff=True, compression="zlib")
expect("bigtiff16", u16, 16)

# Signed 16-bit: framewarden shifts by +32768 into the unsigned range.
i16 = rng.integers(-32768, 32768, (20, 30), dtype=np.int16)
tifffile.imwrite(out / "signed16.tif", i16)
expect("signed16", (i16.astype(np.int32) + 32768).astype(np.uint16), 16)

# 32-bit float: mapped linearly from [min, max] onto 0..65535, rounded.
f32 = rng.normal(5.0, 2.0, (16, 24)).astype(np.float32)
tifffile.imwrite(out / "float32.tif", f32)
lo, hi = float(f32.min()), float(f32.max())
mapped = np.round((f32.astype(np.float64) - lo) * (65535.0 / (hi - lo))).astype(np.uint16)
expect("float32", mapped, 16)

# OME-XML pixel size (tifffile writes OME-XML into the image description).
tifffile.imwrite(out / "ome.tif", u16, ome=True, metadata={"PhysicalSizeX": 0.325, "PhysicalSizeXUnit": "µm", "PhysicalSizeY": 0.325})
expect("ome", u16, 16, 0.325, "ome-xml")

# Resolution tags: 20000 pixels per centimetre = 0.5 µm per pixel.
tifffile.imwrite(out / "resolution_cm.tif", u8, resolution=(20000, 20000), resolutionunit="CENTIMETER")
expect("resolution_cm", u8.astype(np.uint16), 8, 0.5, "resolution-tags")

# Resolution in inches: 50800 pixels per inch = 0.5 µm per pixel.
tifffile.imwrite(out / "resolution_inch.tif", u8, resolution=(50800, 50800), resolutionunit="INCH")
expect("resolution_inch", u8.astype(np.uint16), 8, 0.5, "resolution-tags")

# A 72 dpi screen default is not a calibration.
tifffile.imwrite(out / "screen72.tif", u8, resolution=(72, 72), resolutionunit="INCH")
expect("screen72", u8.astype(np.uint16), 8)

# Multi-page: page 2 of three, PackBits, big-endian.
pages = rng.integers(0, 4096, (3, 18, 22), dtype=np.uint16)
tifffile.imwrite(out / "pages.tif", pages, photometric="minisblack", compression="packbits", byteorder=">")
expect("pages", pages[2], 16, page=2)

# PNG 8 and 16-bit greyscale, written by Pillow.
Image.fromarray(u8, mode="L").save(out / "grey8.png")
expect("grey8", u8.astype(np.uint16), 8)
Image.fromarray(u16.astype(np.uint16)).save(out / "grey16.png")
back = np.asarray(Image.open(out / "grey16.png")).astype(np.uint16)
assert (back == u16).all(), "Pillow did not round-trip the 16-bit PNG"
expect("grey16", u16, 16)

(out / "cases.json").write_text(json.dumps(cases, indent=1))
print(f"wrote {len(cases)} cases to {out}")
