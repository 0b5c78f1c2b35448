"""Times tifffile reading the same stacks ductline's bench_load reads (best of 3), with its peak RSS.

    python3 bench/tifffile_load.py STACK.tif [...]
"""
import resource
import sys
import time

import tifffile

for path in sys.argv[1:]:
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        a = tifffile.imread(path)
        best = min(best, time.perf_counter() - t)
        nbytes = a.nbytes
        del a
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(f"tifffile {tifffile.__version__} {path}: best of 3 {best:.3f} s ({nbytes / 1e6 / best:.0f} MB/s), peak RSS {peak / 1e6:.1f} MB")
