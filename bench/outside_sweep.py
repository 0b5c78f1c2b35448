"""How the measure holds on the phantom built apart from ductline, over its variants.

    cargo build --release
    python3 bench/outside_sweep.py WORKDIR [--bare-shelf] [--only NAME,...]

For each variant below, tests/fixtures/outside_phantom.py writes a stack with its truth into
WORKDIR/NAME (kept between runs: a variant already written is not written again), `ductline
measure` measures it from its landmarks (every 0.1 mm, the command line's default), and the
script's own --compare scores the table: sections 30° or more from either end, the share of sound
ones and of those with both areas, and the median |error| (with the signed median) of SV, ST and
SV+ST. Prints a Markdown table.
Not a test: the numbers are for the README and the issue notes (the tests hold three of these
cases, tests/outside.rs). With --bare-shelf, ductline is told that the shelf carries no limbus,
as it does not in this phantom.
"""
import argparse
import json
import pathlib
import subprocess
import sys

ROOT = pathlib.Path(__file__).resolve().parent.parent
SCRIPT = ROOT / "tests" / "fixtures" / "outside_phantom.py"
DUCTLINE = ROOT / "target" / "release" / "ductline"

# name, what it varies, the script's options
VARIANTS = [
    ("plain80", "as committed (tests/fixtures/outside; a left ear)", ["--voxel-um", "80"]),
    ("air80", "air-filled", ["--voxel-um", "80", "--air"]),
    ("cnr6", "contrast-to-noise 6", ["--voxel-um", "80", "--cnr", "6"]),
    ("solid80", "a solid bony capsule", ["--voxel-um", "80", "--wall-mm", "0"]),
    ("tilt50", "50 µm, tilted 25°/−15°", ["--voxel-um", "50", "--tilt-deg", "25,-15"]),
    ("thinlig50", "50 µm, ligament 0.05 mm", ["--voxel-um", "50", "--ligament-mm", "0.05"]),
    ("thicklig50", "50 µm, ligament 0.3 mm", ["--voxel-um", "50", "--ligament-mm", "0.3"]),
    ("blur15", "50 µm, blur 1.5 voxels", ["--voxel-um", "50", "--blur", "1.5"]),
    ("aniso", "40 × 40 × 80 µm, mirrored (a right ear)", ["--voxel-um", "40", "--z-um", "80", "--mirror"]),
    ("airtilt", "60 µm, air, right ear tilted 40°/20°, CNR 8", ["--voxel-um", "60", "--air", "--tilt-deg", "40,20", "--mirror", "--cnr", "8"]),
    ("v150", "150 µm", ["--voxel-um", "150"]),
    ("v200", "200 µm", ["--voxel-um", "200"]),
    ("v300", "300 µm", ["--voxel-um", "300"]),
    ("air300", "300 µm, air-filled", ["--voxel-um", "300", "--air"]),
]


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("workdir")
    ap.add_argument("--bare-shelf", action="store_true")
    ap.add_argument("--only", help="comma-separated variant names")
    a = ap.parse_args()
    only = set(a.only.split(",")) if a.only else None
    work = pathlib.Path(a.workdir)
    print("| variant | sound | areas on | SV median (signed) | ST median (signed) | SV+ST median (signed) |")
    print("|---|---|---|---|---|---|")
    for name, what, opts in VARIANTS:
        if only and name not in only:
            continue
        d = work / name
        if not (d / "truth.csv").exists():
            subprocess.run([sys.executable, SCRIPT, d, *opts], check=True, stdout=subprocess.DEVNULL)
        table = d / ("table_bare.csv" if a.bare_shelf else "table.csv")
        cmd = [DUCTLINE, "measure", "--stack", d / "stack.tif", "--landmarks", d / "landmarks.csv", "--out", table]
        subprocess.run(cmd + (["--bare-shelf"] if a.bare_shelf else []), check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        out = subprocess.run([sys.executable, SCRIPT, d, "--compare", table], check=True, capture_output=True, text=True).stdout
        r = json.loads(out.strip().splitlines()[-1])
        cell = lambda k: f"{r[k]['median_abs']:.1f} % ({r[k]['signed']:+.1f})" if k in r else "—"
        print(f"| {what} | {r['sound_pct']:.0f} % | {r['with_areas_pct']:.0f} % | {cell('sv')} | {cell('st')} | {cell('total')} |", flush=True)


if __name__ == "__main__":
    main()
