"""Peak memory of windowed writing and reading versus image size.

Not a test: run by hand, e.g.

    python tests/benchmarks/bench_raster_memory.py 4000 8000

Every size runs in fresh subprocesses (one writes the image window by window,
one reads it back tile by tile), and each reports its peak resident set size
(``ru_maxrss``). With windowed I/O the peaks should stay flat as the image
grows; a whole-image read would grow with width x height.
"""

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

_WRITE = """
import json, resource, sys, time
import numpy as np
from affine import Affine
from detector.gis.geo import MARS_SOUTH_POLAR_STEREO
from detector.gis.raster import write_by_windows

path, size = sys.argv[1], int(sys.argv[2])

def fill(col0, row0, width, height):
    # Smooth ramps plus noise, seeded per window: deterministic and not trivially compressible.
    rows, cols = np.ogrid[row0 : row0 + height, col0 : col0 + width]
    noise = np.random.default_rng((row0, col0)).integers(0, 32, size=(height, width))
    return ((rows // 7 + cols // 5) % 200 + noise).astype(np.uint8)

t = time.perf_counter()
write_by_windows(path, size, size, fill, crs=MARS_SOUTH_POLAR_STEREO,
                 transform=Affine(0.5, 0.0, -size / 4, 0.0, -0.5, size / 4))
print(json.dumps({"seconds": time.perf_counter() - t,
                  "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""

_READ = """
import json, resource, sys, time
from detector.gis.raster import open_raster

t = time.perf_counter()
total = 0
with open_raster(sys.argv[1]) as src:
    for window in src.windows(tile=(800, 600), overlap=32):
        array, mask = src.read(window)
        total += int(array[window.core_slices].sum(dtype="int64"))
print(json.dumps({"seconds": time.perf_counter() - t, "checksum": total,
                  "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def _run(script, *args):
    out = subprocess.run([sys.executable, "-c", script, *map(str, args)], check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("sizes", nargs="*", type=int, default=[4000, 8000], help="image sides, px")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        for size in args.sizes:
            path = Path(tmp) / f"bench_{size}.tif"
            write = _run(_WRITE, path, size)
            read = _run(_READ, path)
            print(
                f"{size:>6d} x {size:<6d} write {write['seconds']:6.1f} s peak {write['maxrss_mb']:6.0f} MB | "
                f"read {read['seconds']:6.1f} s peak {read['maxrss_mb']:6.0f} MB | "
                f"file {path.stat().st_size / 2**20:6.1f} MB"
            )
            path.unlink()


if __name__ == "__main__":
    main()
