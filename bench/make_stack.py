"""Writes a 512³ uint16 test stack twice with tifffile: uncompressed and Deflate (zlib).

    python3 bench/make_stack.py OUTDIR [size]
"""
import pathlib
import sys

import numpy as np
import tifffile

out = pathlib.Path(sys.argv[1])
n = int(sys.argv[2]) if len(sys.argv) > 2 else 512
out.mkdir(parents=True, exist_ok=True)
rng = np.random.default_rng(1)
z, y, x = np.ogrid[:n, :n, :n]
# a smooth field with texture, so Deflate has something realistic to do
vol = (20000 + 8000 * np.sin(x / 23.0) * np.cos(y / 31.0) + 40 * z).astype(np.float32)
vol += rng.normal(0, 300, vol.shape).astype(np.float32)
vol = np.clip(vol, 0, 65535).astype(np.uint16)
tifffile.imwrite(out / "plain.tif", vol, photometric="minisblack")
tifffile.imwrite(out / "deflate.tif", vol, photometric="minisblack", compression="zlib")
print("wrote", out / "plain.tif", out / "deflate.tif")
