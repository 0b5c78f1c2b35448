"""The per-section measure done with scipy and scikit-image, for the speed comparison with ductline.

Reads the phantom stack and the 400 section planes that `bench_measure` wrote (same centres, axes,
partition points, half-sizes and pitch), and for every section: resamples the plane
(scipy.ndimage.map_coordinates, order=1), finds Otsu's threshold (skimage.filters.threshold_otsu),
takes the fluid/bone levels from the class medians, grows each scala from a seed on its side of the
partition line (scipy.ndimage.label), and sums partial-volume fractions over the region and a
two-voxel band (binary_dilation). Prints the time and how its areas compare with ductline's.

    python3 bench/measure_reference.py DIR        # DIR holds phantom.tif and sections.json
"""
import json
import pathlib
import sys
import time

import numpy as np
import tifffile
from scipy import ndimage
from skimage.filters import threshold_otsu

d = pathlib.Path(sys.argv[1])
vol = tifffile.imread(d / "phantom.tif").astype(np.float32)  # (z, y, x)
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
    fluid, bone = np.median(img[finite & (img < t)]), np.median(img[finite & (img >= t)])
    thr = 0.5 * (fluid + bone)
    lam, lig = np.array(s["lamina_uv"]), np.array(s["ligament_uv"])
    dvec = lig - lam
    nrm = np.array([-dvec[1], dvec[0]]) / np.hypot(*dvec)
    if nrm[1] < 0:
        nrm = -nrm
    side = (uu - lam[0]) * nrm[0] + (vv - lam[1]) * nrm[1]
    dark = finite & (img < thr)
    mid = 0.5 * (lam + lig)
    band = int(np.ceil(2 * vox.max() / pitch))
    res = []
    for sign in (1.0, -1.0):
        on_side = side * sign > 0
        lab, _ = ndimage.label(dark & on_side)
        seed = mid + sign * 3 * vox.max() * nrm
        a = int(round((seed[0] + (n - 1) / 2 * pitch) / pitch))
        b = int(round((seed[1] + (n - 1) / 2 * pitch) / pitch))
        region = lab == lab[b, a] if lab[b, a] > 0 else np.zeros_like(dark)
        grown = ndimage.binary_dilation(region, iterations=band) & on_side & finite
        frac = (bone - img) / (bone - fluid)
        res.append(float(np.nansum(frac[grown]) * pitch * pitch))
    areas.append(res)
dt = time.perf_counter() - t0
ours = np.array([[s["sv_area_mm2"] or np.nan, s["st_area_mm2"] or np.nan] for s in meta["sections"]])
rel = np.abs(np.array(areas) - ours) / ours
print(f"scipy/scikit-image: {len(areas)} sections in {dt:.2f} s; ductline {meta['seconds']:.2f} s "
      f"→ ductline {dt / meta['seconds']:.1f}× faster; areas agree to median {100 * np.nanmedian(rel):.2f} %")
