"""Write files that once took a worker far past any memory bound, and run a
command on each while measuring its peak resident memory.

Usage:
  python3 make_memory_cases.py OUT_DIR [SIDE]  (SIDE defaults to 2000)
      writes inflating_icc.png (a 64 x 64 grey PNG whose ICC profile chunk
      inflates from about 1 MiB to 1 GiB) and dots.tif (SIDE x SIDE, 8-bit,
      one bright pixel at every other row and column: SIDE^2 / 4 separate
      objects) and noise.tif (SIDE x SIDE uniform 16-bit noise, the costliest
      frame to segment per pixel found so far), with tifffile and the standard
      library's zlib.
  python3 make_memory_cases.py --peak CMD...
      runs CMD and prints {"status": exit code, "peak_kib": peak RSS in KiB}
      (the child's ru_maxrss from getrusage, which Linux gives in KiB).
"""
import json
import resource
import struct
import subprocess
import sys
import zlib
from pathlib import Path

if sys.argv[1] == "--peak":
    status = subprocess.run(sys.argv[2:], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL).returncode
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    print(json.dumps({"status": status, "peak_kib": peak}))
    sys.exit(0)

import numpy as np
import tifffile

out = Path(sys.argv[1])
side = int(sys.argv[2]) if len(sys.argv) > 2 else 2000
out.mkdir(parents=True, exist_ok=True)


def chunk(kind, data):
    body = kind + data
    return struct.pack(">I", len(data)) + body + struct.pack(">I", zlib.crc32(body) & 0xFFFFFFFF)


# PNG (ISO/IEC 15948): signature, IHDR, iCCP (name, NUL, method 0, zlib
# stream), IDAT, IEND. The profile is 1 GiB of zeros compressed at level 9.
w = h = 64
ihdr = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
z = zlib.compressobj(9)
block = bytes(1 << 20)
profile = b"".join(z.compress(block) for _ in range(1024)) + z.flush()
rows = b"".join(b"\x00" + bytes((x * 3 + y) % 256 for x in range(w)) for y in range(h))
png = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"iCCP", b"profile\x00\x00" + profile)
       + chunk(b"IDAT", zlib.compress(rows)) + chunk(b"IEND", b""))
(out / "inflating_icc.png").write_bytes(png)

dots = np.zeros((side, side), dtype=np.uint8)
dots[::2, ::2] = 200
tifffile.imwrite(out / "dots.tif", dots)
rng = np.random.default_rng(20261202)
tifffile.imwrite(out / "noise.tif", rng.integers(0, 65536, (side, side), dtype=np.uint16))
