"""End to end: `ductline measure` against the scipy/scikit-image script, same input, same run.

    cargo run --release --example bench_measure 19.5 /tmp/bm     # phantom.tif, landmarks.csv, sections.json
    cargo build --release
    python3 bench/measure_vs_scipy.py /tmp/bm [repeats]

Times whole processes (start to exit, wall clock): ductline reads the stack, fits the centreline,
measures 400 sections and writes the table; bench/measure_reference.py imports numpy/scipy/
scikit-image, reads the stack with tifffile and measures the same sections (starting from
ductline's section planes, so it does less). Both inputs: the phantom's Deflate OME-TIFF and an
uncompressed copy written here by tifffile. Prints the median of the repeats and the ratio.
"""
import json
import pathlib
import statistics
import subprocess
import sys
import time

import tifffile

d = pathlib.Path(sys.argv[1])
repeats = int(sys.argv[2]) if len(sys.argv) > 2 else 3
root = pathlib.Path(__file__).resolve().parent.parent
ductline = root / "target" / "release" / "ductline"
meta = json.loads((d / "sections.json").read_text())
plain = d / "plain.tif"
if not plain.exists():
    tifffile.imwrite(plain, tifffile.imread(d / "phantom.tif"), photometric="minisblack")
vox_um = ",".join(f"{1000 * v:g}" for v in meta["voxel_mm"])


def wall(cmd):
    t = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t


for name in ["plain.tif", "phantom.tif"]:
    ours = [wall([ductline, "measure", "--stack", d / name, "--voxel-um", vox_um, "--landmarks", d / "landmarks.csv",
                  "--out", d / "bench_table.csv", "--step-mm", str(meta["step_mm"])]) for _ in range(repeats)]
    ref = [wall([sys.executable, root / "bench" / "measure_reference.py", d, name]) for _ in range(repeats)]
    a, b = statistics.median(ours), statistics.median(ref)
    print(f"{name}: ductline {a:.2f} s (runs {', '.join(f'{x:.2f}' for x in ours)}), "
          f"scipy/scikit-image {b:.2f} s (runs {', '.join(f'{x:.2f}' for x in ref)}) -> {b / a:.1f}x")
