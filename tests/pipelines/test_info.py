"""`describe_grid` on a large sparse tiled GeoTIFF: only stored blocks are read, and the answer equals the full read."""

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

from envelope.pipelines import info


def _sparse(path, size=4096, tile=256):
    """A tiled GeoTIFF (GDAL SPARSE_OK) with data in three tiles only; returns what was written."""
    rng = np.random.default_rng(5)
    written = {}
    with rasterio.open(path, "w", driver="GTiff", height=size, width=size, count=2, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(-150.0, 46.0, 0.001, 0.001), nodata=-9999.0,
                       tiled=True, blockxsize=tile, blockysize=tile, SPARSE_OK="TRUE") as dst:
        dst.descriptions = ("t", "p")
        for row, col in ((0, 0), (3, 7), (15, 15)):
            block = rng.normal(10, 3, (2, tile, tile)).astype("float32")
            block[1, :5, :] = -9999.0  # some nodata inside a stored tile
            dst.write(block, window=Window(col * tile, row * tile, tile, tile))
            written[(row, col)] = block
    return written


def test_stored_blocks_only_and_same_answer_as_a_full_read(tmp_path, monkeypatch):
    from envelope.io.blocks import stored_windows

    path = tmp_path / "sparse.tif"
    written = _sparse(path)
    windows, n_blocks = stored_windows(path)
    # Source: the file's block index (GDAL SPARSE_OK writes no bytes for untouched tiles)
    assert n_blocks == 16 * 16 and len(windows) == 3
    monkeypatch.setattr(info, "STREAM_CELLS", 10**12)
    full = info.describe_grid(path)           # the dask path over every cell
    monkeypatch.setattr(info, "STREAM_CELLS", 1000)
    blocks = info.describe_grid(path)         # stored blocks only
    assert blocks["nodata_share"] == pytest.approx(full["nodata_share"], abs=1e-12)
    assert blocks["valid_area_km2"] == pytest.approx(full["valid_area_km2"], rel=1e-9)
    for a, b in zip(blocks["variables"], full["variables"]):
        assert a["min"] == pytest.approx(b["min"]) and a["max"] == pytest.approx(b["max"])
        assert a["nodata_share"] == pytest.approx(b["nodata_share"], abs=1e-12)
    # Analytic: values and counts straight from the arrays written
    values = np.stack([w for w in written.values()])
    t = values[:, 0]
    assert blocks["variables"][0]["min"] == pytest.approx(float(t.min()))
    valid_cells = sum(int((w[1] != -9999.0).sum()) for w in written.values())
    assert blocks["nodata_share"] == pytest.approx(1 - valid_cells / 4096**2, abs=1e-12)
