"""Benchmark of `envelope info` on a huge sparse tiled GeoTIFF: wall time and peak RSS.

Run:  .venv/bin/python bench/bench_info_sparse.py [--size 200000] [--tile 512] [--stored 20]
      [--workdir /tmp/envelope-bench-info]

Data: one float32 band of ``--size`` x ``--size`` cells of 0.0001° (EPSG:4326, a fictional
grid in the open North Pacific, west -150, north 46), tiled ``--tile`` x ``--tile``, written
with GDAL's SPARSE_OK so that only ``--stored`` tiles (seeded random positions,
``numpy.random.default_rng(0)``) hold bytes; everything else is nodata. At the default
size that is 4e10 cells (160 GB as float32) in a file of a few megabytes.

Timed: ``envelope info FILE --json`` in a subprocess under ``/usr/bin/time -v`` (wall time
and maximum resident set size). `info` reads only the blocks the file stores
(``envelope.io.blocks.stored_windows``), so memory stays at one block plus the
coordinate vectors. Not a test.
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def make(path: Path, size: int, tile: int, stored: int) -> None:
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    rng = np.random.default_rng(0)
    n = size // tile
    with rasterio.open(path, "w", driver="GTiff", height=size, width=size, count=1, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(-150.0, 46.0, 0.0001, 0.0001), nodata=-9999.0,
                       tiled=True, blockxsize=tile, blockysize=tile, SPARSE_OK="TRUE", BIGTIFF="YES",
                       compress="deflate") as dst:
        dst.set_band_description(1, "bio1")
        for k in rng.choice(n * n, size=stored, replace=False):
            row, col = divmod(int(k), n)
            dst.write(rng.normal(12, 4, (1, tile, tile)).astype("float32"), window=Window(col * tile, row * tile,
                                                                                         tile, tile))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=200_000)
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--stored", type=int, default=20)
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/envelope-bench-info"))
    args = ap.parse_args()
    args.workdir.mkdir(parents=True, exist_ok=True)
    path = args.workdir / f"sparse_{args.size}.tif"
    if not path.exists():
        t0 = time.perf_counter()
        make(path, args.size, args.tile, args.stored)
        print(f"made {path} ({path.stat().st_size / 1e6:.1f} MB) in {time.perf_counter() - t0:.1f} s")
    cmd = ["/usr/bin/time", "-v", sys.executable, "-m", "envelope.cli.main", "info", str(path), "--json"]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        sys.exit(proc.stderr)
    summary = json.loads(proc.stdout)
    rss_kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", proc.stderr)[1])
    wall = re.search(r"Elapsed \(wall clock\) time \(h:mm:ss or m:ss\): (\S+)", proc.stderr)[1]
    print(f"cells {args.size}^2 = {args.size ** 2:.3g}, stored tiles {args.stored}")
    print(f"info: wall {wall}, peak RSS {rss_kb / 1024:.0f} MB, nodata share {summary['nodata_share']:.8f}, "
          f"valid area {summary['valid_area_km2']:.1f} km²")


if __name__ == "__main__":
    main()
