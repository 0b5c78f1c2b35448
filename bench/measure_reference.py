"""The per-section measure done with scipy and scikit-image, for the speed comparison with ductline.

Reads the phantom stack and the 400 section planes that `bench_measure` wrote (same centres, axes,
partition points, half-sizes and pitch), and for every section: resamples the plane
(scipy.ndimage.map_coordinates, order=1), finds Otsu's threshold (skimage.filters.threshold_otsu),
takes the fluid/bone levels from the class medians, grows each scala from a seed on its side of the
partition line (scipy.ndimage.label), and sums partial-volume fractions over the region and a
two-voxel band (binary_dilation). Prints the time and how its areas compare with ductline's.

    python3 bench/measure_reference.py DIR        # DIR holds phantom.tif and sections.json

It starts from ductline's section planes (no centreline fit of its own), so it does less than
`ductline measure`; the comparison is still end to end: imports, loading and all sections.
"""
import time

T_START = time.perf_counter()
import json
import pathlib
import sys
import time

import numpy as np
import tifffile
from scipy import ndimage
from skimage.filters import threshold_otsu

d = pathlib.Path(sys.argv[1])
vol = tifffile.imread(d / sys.argv[2] if len(sys.argv) > 2 else d / "phantom.tif").astype(np.float32)  # (z, y, x)
meta = json.loads((d / "sections.json").read_text())
vox = np.array(meta["voxel_mm"])

t0 = time.perf_counter()
areas = []
for s in meta["sections"]:
    half, pitch = s["half_mm"], s["pitch_mm"]
    n = int(round(2 * half / pitch))
    n += n % 2
    coords = (np.arange(n) - (n - 1) / 2) * pitch
    uu, vv = np.meshgrid(coords, coords)  # rows = v
    c, u, v = (np.array(s[k]) for k in ("centre", "u", "v"))
    pts = c[:, None, None] + u[:, None, None] * uu + v[:, None, None] * vv  # (3, n, n) in mm
    idx = pts / vox[:, None, None]
    img = ndimage.map_coordinates(vol, [idx[2], idx[1], idx[0]], order=1, mode="constant", cval=np.nan)
    finite = np.isfinite(img)
    t = threshold_otsu(img[finite])
    r = int(np.ceil(1.5 * vox.max() / pitch))
    box = np.ones((2 * r + 1, 2 * r + 1), bool)
    fluid = np.median(img[ndimage.binary_erosion(finite & (img < t), box)])
    bone = np.median(img[ndimage.binary_erosion(finite & (img >= t), box)])
    lam, lig = np.array(s["lamina_uv"]), np.array(s["ligament_uv"])
    dvec = lig - lam
    nrm = np.array([-dvec[1], dvec[0]]) / np.hypot(*dvec)
    if nrm[1] < 0:
        nrm = -nrm
    side = (uu - lam[0]) * nrm[0] + (vv - lam[1]) * nrm[1]
    mid = 0.5 * (lam + lig)
    band = int(np.ceil(2 * vox.max() / pitch))
    e = int(np.ceil(vox.max() / pitch))

    def regions(thr):
        dark = finite & (img < thr)
        out = []
        for sign in (1.0, -1.0):
            on_side = side * sign > 0
            lab, _ = ndimage.label(dark & on_side)
            seed = mid + sign * 3 * vox.max() * nrm
            a = int(round((seed[0] + (n - 1) / 2 * pitch) / pitch))
            b = int(round((seed[1] + (n - 1) / 2 * pitch) / pitch))
            out.append((lab == lab[b, a] if lab[b, a] > 0 else np.zeros_like(dark), on_side, dark))
        return out

    # fluid level from the interiors of the scalae themselves, then segment again
    thr = 0.5 * (fluid + bone)
    inner = [ndimage.binary_erosion(reg, np.ones((2 * e + 1, 2 * e + 1), bool)) for reg, _, _ in regions(thr)]
    vals = img[inner[0] | inner[1]]
    if vals.size >= 4:
        fluid = np.median(vals)
        thr = 0.5 * (fluid + bone)
    res = []
    for region, on_side, dark in regions(thr):
        # band: pixels within two voxels of the region, nearer to it than to any other dark pixel
        d_reg = ndimage.distance_transform_edt(~region)
        d_other = ndimage.distance_transform_edt(~(dark & on_side & ~region))
        grown = region | ((d_reg <= band) & (d_reg <= d_other) & on_side & finite)
        frac = (bone - img) / (bone - fluid)
        res.append(float(np.nansum(frac[grown]) * pitch * pitch))
    # wall: profile outward along the partition, mean of four lines beside it
    h = 0.5 * pitch
    dd = np.arange(0, 3.0, h)
    direc = dvec / np.hypot(*dvec)
    prof = 0
    for o in (-2, -1, 1, 2):
        q = mid[:, None] + direc[:, None] * dd + o * pitch * np.array([-direc[1], direc[0]])[:, None]
        p3 = c[:, None] + u[:, None] * q[0] + v[:, None] * q[1]
        prof = prof + ndimage.map_coordinates(vol, (p3 / vox[:, None])[::-1], order=1, mode="constant", cval=np.nan) / 4
    areas.append(res)
dt = time.perf_counter() - t0
ours = np.array([[s["sv_area_mm2"] or np.nan, s["st_area_mm2"] or np.nan] for s in meta["sections"]])
rel = np.abs(np.array(areas) - ours) / ours
total = time.perf_counter() - T_START
print(f"scipy/scikit-image: {len(areas)} sections in {dt:.2f} s (ductline's measure step {meta['seconds']:.2f} s: "
      f"{dt / meta['seconds']:.1f}×); end to end with imports and loading {total:.2f} s; "
      f"areas agree with ductline's to median {100 * np.nanmedian(rel):.2f} %")
