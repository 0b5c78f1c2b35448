"""Writes an 8 GB uint16 stack (2048 × 2048 × 1000, uncompressed, pages back to back) with a
phantom cochlea pasted in its middle, and the phantom's landmarks moved to match.

    python3 bench/make_large.py PHANTOM_DIR OUT_DIR [nx ny nz]

PHANTOM_DIR holds phantom.tif and landmarks.csv (e.g. from `bench_measure 19.5 DIR`).
"""
import csv
import pathlib
import sys

import numpy as np
import tifffile

src, out = pathlib.Path(sys.argv[1]), pathlib.Path(sys.argv[2])
nx, ny, nz = (int(x) for x in sys.argv[3:6]) if len(sys.argv) > 5 else (2048, 2048, 1000)
out.mkdir(parents=True, exist_ok=True)
ph = tifffile.imread(src / "phantom.tif")  # (z, y, x)
with tifffile.TiffFile(src / "phantom.tif") as t:
    desc = t.pages[0].description
vox_um = float(desc.split('PhysicalSizeX="')[1].split('"')[0])
off = [(nx - ph.shape[2]) // 2, (ny - ph.shape[1]) // 2, (nz - ph.shape[0]) // 2]
rng = np.random.default_rng(3)
background = int(np.median(ph[0]))
page = np.empty((ny, nx), np.uint16)
with tifffile.TiffWriter(out / "large.tif", bigtiff=True) as tif:
    for k in range(nz):
        page[:] = background + rng.integers(-500, 500, (ny, nx), dtype=np.int32).astype(np.uint16)
        kk = k - off[2]
        if 0 <= kk < ph.shape[0]:
            page[off[1]:off[1] + ph.shape[1], off[0]:off[0] + ph.shape[2]] = ph[kk]
        tif.write(page, contiguous=True, photometric="minisblack")
with open(src / "landmarks.csv") as f, open(out / "landmarks.csv", "w", newline="") as g:
    r = csv.DictReader(f)
    w = csv.writer(g)
    w.writerow(["kind", "x_mm", "y_mm", "z_mm"])
    for row in r:
        w.writerow([row["kind"]] + [float(row[c]) + off[a] * vox_um / 1000 for a, c in enumerate(["x_mm", "y_mm", "z_mm"])])
print(f"wrote {out / 'large.tif'} ({nx}×{ny}×{nz}), phantom at voxel offset {off}, voxel {vox_um} µm")
