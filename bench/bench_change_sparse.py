"""Benchmark of `envelope change` and `envelope info` on a huge sparse tiled GeoTIFF pair: wall time and peak RSS.

Run:  .venv/bin/python bench/bench_change_sparse.py [--size 200000] [--tile 512] [--stored 20]
      [--workdir /tmp/envelope-bench-change]

Data: two float32 suitability maps (now, future) of ``--size`` x ``--size`` cells of
0.0001° (EPSG:4326, a fictional grid in the open North Pacific, west -150, north 46),
tiled ``--tile`` x ``--tile``, written with GDAL's SPARSE_OK so that only ``--stored``
tiles hold bytes (seeded positions, ``numpy.random.default_rng(0)``; the future map keeps
three quarters of the current tiles and adds as many new ones nearby), everything else
nodata. Suitability is a smooth north-south ramp plus noise, so every class occurs. At
the default size each map is 4e10 cells (160 GB as float32) in a file of a few MB.

Timed, each in a subprocess under ``/usr/bin/time -v`` (wall time and maximum resident
set size): ``envelope change --now --future --threshold 0.5 --out --summary`` (window by
window over the stored tiles, :class:`envelope.change.WindowedChange`; the class raster is
written sparse, then GDAL builds its cloud-optimised copy with overviews), and
``envelope info --json`` on the current map. Not a test.
"""

from __future__ import annotations

import argparse
import json
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

RES = 0.0001


def make(now_path: Path, future_path: Path, size: int, tile: int, stored: int) -> None:
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    rng = np.random.default_rng(0)
    n = size // tile
    now_tiles = [divmod(int(k), n) for k in rng.choice(n * n, size=stored, replace=False)]
    kept = now_tiles[: (3 * stored) // 4]
    moved = [(max(r - 1, 0), c) for r, c in now_tiles[(3 * stored) // 4:]]  # a tile northward
    new = [divmod(int(k), n) for k in rng.choice(n * n, size=stored // 4, replace=False)]
    future_tiles = sorted(set(kept + moved + new))
    for path, tiles, shift in ((now_path, now_tiles, 0.0), (future_path, future_tiles, 0.1)):
        with rasterio.open(path, "w", driver="GTiff", height=size, width=size, count=1, dtype="float32",
                           crs="EPSG:4326", transform=from_origin(-150.0, 46.0, RES, RES), nodata=-9999.0,
                           tiled=True, blockxsize=tile, blockysize=tile, SPARSE_OK="TRUE", BIGTIFF="YES",
                           compress="deflate") as dst:
            dst.set_band_description(1, "suitability")
            dst.update_tags(threshold="0.5")
            for row, col in tiles:
                ramp = np.linspace(0.2, 0.8, tile)[:, None] + shift
                values = np.clip(ramp + rng.normal(0, 0.15, (tile, tile)), 0, 1).astype("float32")
                dst.write(values[None], window=Window(col * tile, row * tile, tile, tile))


def timed(args: list[str]) -> tuple[str, float, str]:
    cmd = ["/usr/bin/time", "-v", sys.executable, "-m", "envelope.cli.main", *args]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        sys.exit(proc.stderr)
    rss_kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", proc.stderr)[1])
    wall = re.search(r"Elapsed \(wall clock\) time \(h:mm:ss or m:ss\): (\S+)", proc.stderr)[1]
    return wall, rss_kb / 1024, proc.stdout


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=200_000)
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--stored", type=int, default=20)
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/envelope-bench-change"))
    args = ap.parse_args()
    args.workdir.mkdir(parents=True, exist_ok=True)
    now = args.workdir / f"now_{args.size}.tif"
    future = args.workdir / f"future_{args.size}.tif"
    if not (now.exists() and future.exists()):
        t0 = time.perf_counter()
        make(now, future, args.size, args.tile, args.stored)
        print(f"made {now.name} and {future.name} ({(now.stat().st_size + future.stat().st_size) / 1e6:.1f} MB) "
              f"in {time.perf_counter() - t0:.1f} s")
    out, summary = args.workdir / "change.tif", args.workdir / "change.json"
    wall, rss, _ = timed(["change", "--now", str(now), "--future", str(future), "--threshold", "0.5",
                          "--out", str(out), "--summary", str(summary), "--overwrite"])
    result = json.loads(summary.read_text())
    print(f"cells {args.size}^2 = {args.size ** 2:.3g}, stored tiles {args.stored} (now)")
    print(f"change: wall {wall}, peak RSS {rss:.0f} MB, class raster {out.stat().st_size / 1e6:.1f} MB; "
          f"range {result['range_km2']['now']:.1f} -> {result['range_km2']['future']:.1f} km², "
          f"leading edge {result['leading_edge_lat']['now']:.4f} -> {result['leading_edge_lat']['future']:.4f}")
    wall, rss, stdout = timed(["info", str(now), "--json"])
    described = json.loads(stdout)
    print(f"info: wall {wall}, peak RSS {rss:.0f} MB, nodata share {described['nodata_share']:.8f}, "
          f"valid area {described['valid_area_km2']:.1f} km²")


if __name__ == "__main__":
    main()
